"""The result columns of file scoring, defined once for the CSV and the Parquet output.

Every writer (CSV file, Parquet parts, the DataFrame API) builds its columns
from ``result_columns(bundle)``: a column's name, its Arrow type and how to
take its values from the scorer's ``Scores``. Adding a column is one line in
``_per_bundle_columns``. Refused rows get nulls (an empty CSV field) in every
column that only a score fills.

    row                 data row number, counted from 1 (files only; frames keep their index)
    status              "scored" or "refused"
    label               the predicted class (the bundle's label type: string or int64)
    decision            binary; decision[<class>] for each class when multiclass
    probability[<c>]    when the bundle is calibrated
    nearest_distance, nearest_similarity, nearest_label, nearest_percentile
    domain_verdict, domain_score   null without a domain model; kept for rows refused as outside_domain
    problems            null when scored, else each feature and why ("; "-separated)
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import pyarrow as pa

from model_store.bundle import Bundle
from model_store.scoring import Scores

__all__ = ["ResultColumn", "result_columns", "result_names", "result_table"]

_FLOAT = pa.float64()
_TEXT = pa.string()


@dataclass(frozen=True)
class ResultColumn:
    """One output column: ``values(scores)`` gives the (n_scored,) values of the scored rows."""

    name: str
    type: pa.DataType
    values: Callable[[Scores], np.ndarray | None] | None  # None: filled by the writer (row, status, problems)
    labels: bool = False  # holds class labels: built from label indices, not from values
    domain: bool = False  # also filled for rows refused as outside_domain (their verdict is the reason)


def result_columns(bundle: Bundle, *, with_row: bool = True) -> list[ResultColumn]:
    """The columns in output order; ``with_row=False`` leaves out ``row`` (the frame API keeps the index)."""
    head = [ResultColumn("row", pa.int64(), None)] if with_row else []
    return [*head, ResultColumn("status", _TEXT, None), *_per_bundle_columns(bundle), ResultColumn("problems", _TEXT, None)]


def result_names(bundle: Bundle, *, with_row: bool = True) -> list[str]:
    return [column.name for column in result_columns(bundle, with_row=with_row)]


def _per_bundle_columns(bundle: Bundle) -> list[ResultColumn]:
    classes = [str(label) for label in bundle.classes]
    label_type = _TEXT if isinstance(bundle.classes[0], str) else pa.int64()
    if len(classes) == 2:
        decision = [ResultColumn("decision", _FLOAT, lambda s: s.decision)]
    else:
        decision = [ResultColumn(f"decision[{c}]", _FLOAT, _column_of("decision", i)) for i, c in enumerate(classes)]
    probability = []
    if bundle.manifest.is_calibrated:
        probability = [ResultColumn(f"probability[{c}]", _FLOAT, _column_of("probabilities", i))
                       for i, c in enumerate(classes)]
    return [
        ResultColumn("label", label_type, lambda s: s.label_index, labels=True),
        *decision,
        *probability,
        ResultColumn("nearest_distance", _FLOAT, lambda s: s.nearest_distance),
        ResultColumn("nearest_similarity", _FLOAT, lambda s: s.nearest_similarity),
        ResultColumn("nearest_label", label_type, lambda s: _nearest_label_index(bundle, s), labels=True),
        ResultColumn("nearest_percentile", _FLOAT, lambda s: s.nearest_percentile),
        ResultColumn("domain_verdict", _TEXT, lambda s: s.domain_verdict, domain=True),
        ResultColumn("domain_score", _FLOAT, lambda s: s.domain_score, domain=True),
    ]


def _column_of(field: str, index: int) -> Callable[[Scores], np.ndarray]:
    return lambda scores: getattr(scores, field)[:, index]


def _nearest_label_index(bundle: Bundle, scores: Scores) -> np.ndarray:
    return bundle.scorer.support_class[scores.nearest_index]


def result_table(
    bundle: Bundle,
    columns: list[ResultColumn],
    *,
    rows: np.ndarray | None,
    scored: np.ndarray,
    scores: Scores | None,
    problems: dict[int, str],
    outside: np.ndarray | None = None,
) -> list[pa.Array]:
    """Arrays for ``columns`` over n rows.

    rows:     (n,) int64 row numbers, or None when ``columns`` has no ``row``
    scored:   (n_scored,) positions (0..n-1, increasing) of the rows that went through the scorer
    scores:   the Scores of exactly those rows, in that order (None when none was scored)
    problems: position -> the problems text of every refused row
    outside:  (n_scored,) bool, the scored rows then refused as outside_domain (None: none)
    """
    n = len(rows) if rows is not None else len(problems) + len(scored) - int(np.sum(outside) if outside is not None else 0)
    unscored = np.ones(n, dtype=bool)  # True where the scorer never saw the row
    unscored[scored] = False
    mask = unscored.copy()  # True where the row was refused (null in score columns)
    if outside is not None:
        mask[scored[outside]] = True
    arrays = []
    for column in columns:
        if column.name == "row":
            arrays.append(pa.array(rows, type=pa.int64()))
        elif column.name == "status":
            arrays.append(_status(mask))
        elif column.name == "problems":
            text = np.full(n, None, dtype=object)
            for position, described in problems.items():
                text[position] = described
            arrays.append(pa.array(text, type=_TEXT))
        elif column.labels:
            arrays.append(_labels(bundle, column, mask, scored, scores))
        else:
            arrays.append(_values(column, unscored if column.domain else mask, scored, scores))
    return arrays


def _values(column: ResultColumn, mask, scored, scores) -> pa.Array:
    numeric = pa.types.is_floating(column.type) or pa.types.is_integer(column.type)
    values = column.values(scores) if scores is not None else None
    if values is None and scores is not None:
        return pa.nulls(len(mask), type=column.type)  # a bundle without a domain model, say
    full = np.zeros(len(mask), dtype=column.type.to_pandas_dtype()) if numeric else np.full(len(mask), None, object)
    if values is not None:
        full[scored] = values
    return pa.array(full, type=column.type, mask=mask)


def _status(refused: np.ndarray) -> pa.Array:
    indices = pa.array(refused.astype(np.int8))
    return pa.DictionaryArray.from_arrays(indices, pa.array(["scored", "refused"])).dictionary_decode()


def _labels(bundle: Bundle, column: ResultColumn, mask, scored, scores) -> pa.Array:
    index = np.zeros(len(mask), dtype=np.int64)
    if scores is not None:
        index[scored] = column.values(scores)
    if column.type == _TEXT:
        dictionary = pa.array([str(label) for label in bundle.classes], type=_TEXT)
        return pa.DictionaryArray.from_arrays(pa.array(index, mask=mask), dictionary).dictionary_decode()
    classes = np.asarray(bundle.classes, dtype=np.int64)
    return pa.array(classes[index], type=pa.int64(), mask=mask)
