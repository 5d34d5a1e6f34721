"""Score one chunk of an input table into an Arrow table of results: the step every engine shares.

The local engine, each Dask task and the DataFrame API all call
``score_chunk``, so the refusal policy, the scorer and the result columns are
the same code whichever runs them; results then differ between engines only
where the scorer's own chunking would (they do not: a partition is read in the
same chunks by either engine).
"""

from __future__ import annotations

from collections.abc import Sequence

import pyarrow as pa

from model_store.bundle import Bundle
from model_store.column_checks import check_columns
from model_store.csv_source import Chunk
from model_store.domain_policy import DEFAULT_OUTSIDE_ACTION, apply_outside_policy
from model_store.result_columns import ResultColumn, result_columns, result_table

__all__ = ["ChunkResult", "output_schema", "score_chunk"]


class ChunkResult:
    """``table`` (kept columns, then result columns) and how many of its rows were scored."""

    __slots__ = ("scored", "table")

    def __init__(self, table: pa.Table, scored: int):
        self.table = table
        self.scored = scored

    @property
    def refused(self) -> int:
        return self.table.num_rows - self.scored


def output_schema(bundle: Bundle, kept: Sequence[pa.Field], *, with_row: bool = True,
                  metadata: dict[str, str] | None = None) -> pa.Schema:
    """Kept fields first, then the result columns (``model_store.result_columns``)."""
    results = [pa.field(column.name, column.type) for column in result_columns(bundle, with_row=with_row)]
    return pa.schema([*kept, *results], metadata=metadata)


def score_chunk(bundle: Bundle, columns: list[ResultColumn], chunk: Chunk, keep: Sequence[str],
                schema: pa.Schema, outside_action: str = DEFAULT_OUTSIDE_ACTION) -> ChunkResult:
    """Refuse what the policy refuses, score the rest, and lay out one output row per input row.

    ``outside_action`` (``refuse`` or ``flag``) says what becomes of a scored row whose domain
    verdict is ``outside`` (``model_store.domain_policy``).
    """
    features = bundle.manifest.features
    checked = check_columns(features, [chunk.columns[feature.name] for feature in features], n_rows=len(chunk),
                            malformed=chunk.malformed)
    scores = bundle.scorer.score(checked.values) if len(checked.accepted) else None
    outside = apply_outside_policy(checked, scores, outside_action)
    problems = {position: "; ".join(problem.describe() for problem in found)
                for position, found in checked.problems.items()}
    results = result_table(bundle, columns, rows=chunk.rows if columns[0].name == "row" else None,
                           scored=checked.accepted, scores=scores, problems=problems, outside=outside)
    kept = [chunk.columns[name] for name in keep]
    return ChunkResult(pa.Table.from_arrays([*kept, *results], schema=schema),
                       len(checked.accepted) - int(outside.sum()))
