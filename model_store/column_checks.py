"""The refusal policy applied to whole columns at once (file scoring and the DataFrame API).

``model_store.refusal.check_records`` decides one record at a time; for a file
of a million rows that is a million Python calls. Here each feature column is
checked in one pass with Arrow kernels: text against the number grammar
(an anchored RE2 match), then parsed; numbers taken as float64; then the
finite and range checks in numpy. Only the rows that fail somewhere (the
"suspects") go through ``check_records`` with ``from_text``, which states the
same policy record by record and writes each row's problems. So a row is
refused here exactly when ``check_records`` refuses it, and its problems read
the same, by construction: the fast grammar below accepts a subset of what
``from_text`` accepts (plain ASCII decimals, optionally padded with spaces or
tabs), and Arrow's parser rounds correctly, as Python's ``float`` does
(tests/batch checks both on generated text). A suspect that ``check_records``
accepts after all (a number padded with a non-breaking space, say) is scored.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from model_store.manifest import FeatureSpec
from model_store.refusal import CheckedBatch, Problem, check_records, from_text

__all__ = ["FAST_DECIMAL", "check_columns", "column_kind"]

# from_text's grammar, anchored, with the ASCII padding str.strip() would remove; other
# padding (Unicode spaces) is rare and left to from_text on the suspect rows.
FAST_DECIMAL = r"^[ \t]*[+-]?([0-9]+\.?[0-9]*|\.[0-9]+)([eE][+-]?[0-9]+)?[ \t]*$"


def column_kind(data_type: pa.DataType) -> str | None:
    """``"text"`` (checked against the number grammar), ``"number"``, ``"null"``, or None (unusable)."""
    if pa.types.is_dictionary(data_type):
        return column_kind(data_type.value_type)
    if pa.types.is_string(data_type) or pa.types.is_large_string(data_type):
        return "text"
    if pa.types.is_integer(data_type) or pa.types.is_floating(data_type) or pa.types.is_decimal(data_type):
        return "number"
    if pa.types.is_null(data_type):
        return "null"
    return None


def check_columns(
    features: Sequence[FeatureSpec],
    columns: Sequence[pa.Array],
    *,
    n_rows: int,
    malformed: dict[int, list[Problem]] | None = None,
) -> CheckedBatch:
    """Split ``n_rows`` rows into scoreable values and refusals.

    columns:   one Arrow array of length n_rows per feature, in ``features`` order; each of a
               kind ``column_kind`` accepts (the caller checks types once per partition)
    malformed: rows refused for their shape alone (a CSV row with more fields than its header)
    Returns a CheckedBatch: values (n_accepted, f) float64 raw units, accepted positions, problems.
    """
    malformed = malformed or {}
    values = np.empty((n_rows, len(features)), dtype=np.float64)
    suspect = np.zeros(n_rows, dtype=bool)
    for position, (feature, column) in enumerate(zip(features, columns)):
        numbers, failed = _as_numbers(column)
        low, high = feature.allowed
        values[:, position] = numbers
        # Written so that NaN fails both comparisons and is suspect too.
        suspect |= failed | ~(numbers >= low) | ~(numbers <= high)
    if malformed:
        suspect[list(malformed)] = True
    suspects = np.flatnonzero(suspect)
    problems: dict[int, list[Problem]] = {}
    if len(suspects):
        problems = _recheck(features, columns, suspects, values, malformed)
    accepted = _accepted(n_rows, problems) if len(suspects) else np.arange(n_rows)
    return CheckedBatch(values[accepted], accepted.astype(np.int64), problems)


def _as_numbers(column: pa.Array) -> tuple[np.ndarray, np.ndarray]:
    """(n,) float64 values (anything for failed rows) and (n,) bool: failed the grammar or null."""
    if isinstance(column, pa.ChunkedArray):
        column = column.combine_chunks()
    if pa.types.is_dictionary(column.type):
        column = column.dictionary_decode()
    kind = column_kind(column.type)
    if kind == "null":
        return np.full(len(column), np.nan), np.ones(len(column), dtype=bool)
    if kind == "number":
        failed = column.is_null().to_numpy(zero_copy_only=False)
        numbers = pc.cast(column, pa.float64(), safe=False).fill_null(np.nan)
        return numbers.to_numpy(zero_copy_only=False), failed
    matches = pc.match_substring_regex(column, FAST_DECIMAL).fill_null(False)
    # Only matching text reaches the parser, so the cast cannot fail; the rest parse a dummy "0".
    text = pc.if_else(matches, column, pa.scalar("0", type=column.type))
    numbers = pc.cast(pc.utf8_trim(text, " \t"), pa.float64())
    return numbers.to_numpy(zero_copy_only=False), ~matches.to_numpy(zero_copy_only=False)


def _recheck(features, columns, suspects, values, malformed) -> dict[int, list[Problem]]:
    """Run the suspect rows through check_records; fill ``values`` of the ones it accepts."""
    picked = [column.take(pa.array(suspects)).to_pylist() for column in columns]
    names = [feature.name for feature in features]
    records = [{name: picked[j][k] for j, name in enumerate(names)} for k in range(len(suspects))]
    checked = check_records(features, records, from_text, allow_extra=True)
    problems: dict[int, list[Problem]] = {}
    for k, position in enumerate(suspects.tolist()):
        if position in malformed:
            problems[position] = malformed[position]  # the row's shape is the problem, whatever its values
        elif k in checked.problems:
            problems[position] = checked.problems[k]
    for slot, k in enumerate(checked.accepted.tolist()):
        values[suspects[k]] = checked.values[slot]
    return problems


def _accepted(n_rows: int, problems: dict[int, list[Problem]]) -> np.ndarray:
    keep = np.ones(n_rows, dtype=bool)
    keep[list(problems)] = False
    return np.flatnonzero(keep)
