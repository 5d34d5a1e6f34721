"""File scoring in this process (``rbfgate score --engine local``): streaming, one output row per input row.

Parts are read one chunk at a time (a CSV block of ``csv_source.BLOCK_BYTES``,
a Parquet batch of ``batch_inputs.PARQUET_BATCH_ROWS`` rows), checked and
scored with ``chunk_scoring.score_chunk`` and written at once, so memory
holds one chunk and its results whatever the table's size. Rows with a
missing, empty, non-numeric, NaN, infinite or out-of-range feature are refused
(never scored) and the rest are scored; a scored row whose domain verdict is ``outside`` is
refused as ``outside_domain`` unless the action is ``flag``. The output is staged beside the target
and moved into place at the end (``batch_outputs``).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

from threadpoolctl import threadpool_limits
from tqdm import tqdm

from model_store.batch_inputs import InputPart, check_part, discover_parts, kept_types, open_part
from model_store.batch_outputs import OutputTarget, PartWriter, identity, part_name
from model_store.bundle import Bundle
from model_store.chunk_scoring import output_schema, score_chunk
from model_store.domain_policy import DEFAULT_OUTSIDE_ACTION
from model_store.errors import InputError, TableError
from model_store.result_columns import result_columns, result_names

__all__ = ["ScoreSummary", "check_keep", "output_columns", "score_file", "summary_document"]


@dataclass(frozen=True)
class ScoreSummary:
    scored: int
    refused: int
    parts: int = 1

    @property
    def rows(self) -> int:
        return self.scored + self.refused


def output_columns(bundle: Bundle, keep: Sequence[str] = ()) -> list[str]:
    """The output header: the kept columns, then ``model_store.result_columns``."""
    return [*keep, *result_names(bundle)]


def check_keep(bundle: Bundle, keep: Sequence[str]) -> list[str]:
    """``--keep`` names, checked: no repeats, no clash with a result column."""
    keep = list(keep)
    results = set(result_names(bundle))
    for name in keep:
        if not name.strip():
            raise InputError("--keep: an empty column name; give COLUMN[,COLUMN...] as named in the input header")
        if keep.count(name) > 1:
            raise InputError(f"--keep: column {name!r} is given twice")
        if name in results:
            raise InputError(f"--keep: {name!r} is also a result column of the output; rename that input column "
                             "before scoring")
    return keep


def score_file(bundle: Bundle, source: Path, out: Path, *, keep: Sequence[str] = (), origin: str | None = None,
               progress: bool | None = None, outside_action: str = DEFAULT_OUTSIDE_ACTION) -> ScoreSummary:
    """Score every row of ``source`` (CSV/Parquet file or directory of parts) into ``out``.

    ``outside_action``: ``refuse`` rows whose domain verdict is outside (``outside_domain``), or ``flag`` them.
    """
    keep = check_keep(bundle, keep)
    parts = discover_parts(source)
    target = OutputTarget(out)
    first = open_part(parts[0])
    check_part(first, bundle.manifest.features, keep)
    kept = kept_types(first, keep)
    about = identity(bundle, source=origin or bundle.source)
    schema = output_schema(bundle, kept)
    columns = result_columns(bundle)
    needed = list(dict.fromkeys([*bundle.feature_names, *keep]))
    total = sum(part.num_rows for part in map(open_part, parts)) if all(p.format == "parquet" for p in parts) else None
    bar = tqdm(total=total, unit="rows", desc="scoring", disable=None if progress is None else not progress)
    staging = target.stage()
    writers: list[PartWriter] = []
    scored = refused = 0
    # One BLAS thread: the scorer's thin products gain little from more, and a second OpenBLAS
    # thread competing with the reader for the same cores made scoring 5 to 10 times slower on a
    # busy 2-core machine (measured; tests/benchmarks/file_bench.py). As the service workers do.
    limits = threadpool_limits(limits=1, user_api="blas")
    try:
        if target.format == "csv":
            writers.append(PartWriter(staging / "joined.csv", schema, "csv"))
        next_row = 1
        for index, part in enumerate(parts):
            reader = first if index == 0 else _opened(part, bundle, keep, kept)
            if target.format == "parquet":
                writers.append(PartWriter(staging / part_name(index, "parquet"), schema, "parquet", metadata=about))
            for chunk in reader.chunks(needed, first_row=next_row):
                result = score_chunk(bundle, columns, chunk, keep, schema, outside_action)
                writers[-1].write(result.table)
                scored, refused = scored + result.scored, refused + result.refused
                next_row += len(chunk)
                bar.update(len(chunk))
            if target.format == "parquet":
                writers[-1].commit()
        if target.format == "csv":
            writers[-1].commit()
        summary = ScoreSummary(scored, refused, len(parts))
        target.commit(None, summary_document(about, source, summary, schema, engine="local"))
    except BaseException:
        for writer in writers:
            writer.abort()
        target.abort()
        raise
    finally:
        limits.restore_original_limits()
        bar.close()
    return summary


def _opened(part: InputPart, bundle: Bundle, keep: list[str], kept) -> object:
    """Open a later part and check it against the bundle and against the first part's kept columns."""
    reader = open_part(part)
    check_part(reader, bundle.manifest.features, keep)
    for expected, found in zip(kept, kept_types(reader, keep)):
        if expected.type != found.type:
            raise TableError(str(part.path), f"has type {found.type}, but {expected.type} in the first part; every "
                             "part must have the same schema", column=expected.name)
    return reader


def summary_document(about: dict, source: Path, summary: ScoreSummary, schema, *, engine: str) -> dict:
    """The CSV sidecar: the model's identity, the input, the counts and the columns."""
    return {
        **about,
        "input": str(source),
        "engine": engine,
        "rows": summary.rows,
        "scored": summary.scored,
        "refused": summary.refused,
        "columns": list(schema.names),
    }
