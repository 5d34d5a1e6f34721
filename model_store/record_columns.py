"""JSON records to a feature matrix a column at a time: the refusal policy's fast path.

``model_store.refusal.check_records`` visits every value of every record in Python, which cost
about 10 us per record of 10 features (measured in tests/benchmarks, a sixth of a 1,000-record
request). Almost every record a service sees is *plain*: each feature present as a JSON number
(not a boolean), every number finite and inside its allowed range, and no member besides the
features and the record id. ``plain_rows`` finds those records with one gather and a few numpy
passes per feature column, and returns their values; whatever is not plain goes back to the
per-value rules, which alone decide its problems and their order, so the two paths cannot give
different answers (tests/reliability checks them against each other on random records).

    values:  (n, f) float64, each plain record's features in manifest order; rows of other
             records hold NaN
    plain:   (n,) bool

A value becomes a float exactly as ``float(value)`` makes it: numpy converts a Python int by the
same correctly rounded conversion, and an int too large for a float makes its record not plain.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from itertools import chain
from math import isfinite
from operator import itemgetter, le
from typing import Any

import numpy as np

__all__ = ["allowed_rows", "column_values", "plain_record", "plain_rows"]

_MISSING = object()
_NUMBERS = frozenset({int, float})


def plain_rows(
    names: Sequence[str], low: np.ndarray, high: np.ndarray, records: Sequence[Mapping[str, Any]],
    extra_members: np.ndarray | None,
) -> tuple[np.ndarray, np.ndarray]:
    """(values, plain) for ``records`` against features ``names`` with allowed ranges [low, high] (f,).

    ``extra_members`` (n,) int is how many members besides the features each record may hold
    (1 for a record that sends an id, say), or None when extra members are allowed anyway.
    """
    n_rows = len(records)
    values = _all_numbers(names, records)
    if values is None:
        values, plain = _column_by_column(names, records)
    else:
        plain = np.ones(n_rows, dtype=bool)
    plain &= allowed_rows(values, low, high)
    if extra_members is not None:
        plain &= np.fromiter(map(len, records), dtype=np.int64, count=n_rows) == len(names) + extra_members
    values[~plain] = np.nan
    return values, plain


def plain_record(
    getter: Callable[[Mapping[str, Any]], Any], low: Sequence[float], high: Sequence[float], record: Any,
    members: int | None, record_id: str | None,
) -> list[float] | None:
    """The values of one plain ``record`` (see the module docstring), in ``getter``'s feature order,
    or None when the per-value rules must decide (anything not plain, or a record with an id).

    getter:     ``itemgetter(*names)`` of the f feature names
    low, high:  (f,) allowed ranges, Python floats
    members:    how many members the record must hold (f), or None when extra members are allowed
    record_id:  the id member's name when ids are read (such a record is left to the rules), or None

    The single-record form of ``plain_rows``, in Python rather than numpy: for one record of
    10 features a few C-level calls cost less than numpy's conversions (8.3 -> 3 us, in process).
    """
    if type(record) is not dict:  # JSON's objects; a mapping that invents missing keys (defaultdict) goes to the rules
        return None
    if (members is not None and len(record) != members) or (record_id is not None and record_id in record):
        return None
    try:
        cells = getter(record)
    except KeyError:  # a missing feature
        return None
    if len(low) == 1:
        cells = (cells,)
    if not set(map(type, cells)) <= _NUMBERS:  # bool is its own type: a boolean is not plain
        return None
    try:
        values = list(map(float, cells))
    except OverflowError:  # an int beyond float64
        return None
    # The rules' own comparisons (low <= value <= high); NaN fails them, and so does an infinity
    # unless a range reaches it, which finite() then catches.
    if all(map(le, low, values)) and all(map(le, values, high)) and all(map(isfinite, values)):
        return values
    return None


def allowed_rows(values: np.ndarray, low: np.ndarray, high: np.ndarray) -> np.ndarray:
    """(n,) bool: the rows of ``values`` (n, f) whose every value is finite and inside [low, high] (f,)."""
    with np.errstate(invalid="ignore"):
        return (np.isfinite(values) & (values >= low) & (values <= high)).all(axis=1)  # NaN fails too


def _all_numbers(names: Sequence[str], records: Sequence[Mapping[str, Any]]) -> np.ndarray | None:
    """(n, f) values when every record holds every feature as an int or a float that fits float64, else None.

    The common case, gathered with one C-level ``itemgetter`` map and one type scan over all the
    cells (a Python comprehension per feature column cost about 0.5 ms per 1,000 records of 10).
    """
    getter = itemgetter(*names)
    try:
        cells = list(map(getter, records))
    except KeyError:  # a record without some feature
        return None
    if len(names) == 1:
        cells = [(cell,) for cell in cells]
    if not set(map(type, chain.from_iterable(cells))) <= _NUMBERS:
        return None
    try:
        flat = np.fromiter(chain.from_iterable(cells), dtype=np.float64, count=len(records) * len(names))
        return flat.reshape(len(records), len(names))
    except OverflowError:  # an int beyond float64
        return None


def _column_by_column(names: Sequence[str], records: Sequence[Mapping[str, Any]]) -> tuple[np.ndarray, np.ndarray]:
    """(values, numbers): each feature column gathered on its own; a cell that is not a number
    that fits float64 (missing, a boolean, a string, an int too large) is NaN and its row not plain."""
    n_rows = len(records)
    values = np.empty((n_rows, len(names)))
    plain = np.ones(n_rows, dtype=bool)
    for column, name in enumerate(names):
        values[:, column], numbers = column_values([record.get(name, _MISSING) for record in records])
        plain &= numbers
    return values, plain


def column_values(cells: Sequence[Any]) -> tuple[np.ndarray, np.ndarray]:
    """(values, numbers) of one column of JSON values (n,): each cell that is an int or a float
    fitting float64, as ``float(cell)`` makes it, and NaN where ``numbers`` is False."""
    n_rows = len(cells)
    if set(map(type, cells)) <= _NUMBERS:
        try:
            return np.fromiter(cells, dtype=np.float64, count=n_rows), np.ones(n_rows, dtype=bool)
        except OverflowError:  # an int beyond float64: only those cells are not numbers
            pass
    numbers = np.fromiter(map(_is_number, cells), dtype=bool, count=n_rows)
    values = np.full(n_rows, np.nan)
    values[numbers] = [cell for cell, number in zip(cells, numbers.tolist()) if number]
    return values, numbers


def _is_number(cell: Any) -> bool:
    kind = type(cell)
    if kind is float:
        return True
    if kind is not int:
        return False
    try:
        float(cell)
    except OverflowError:
        return False
    return True
