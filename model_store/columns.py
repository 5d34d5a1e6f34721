"""Turning what a caller hands to ``Bundle.score`` into rows in the bundle's feature order.

Named tables are matched by feature name, the way scikit-learn checks
``feature_names_in_`` at predict time, so a table whose columns come in another
order is scored correctly instead of by position:

- a pandas DataFrame (anything with ``columns`` and ``to_numpy``; pandas itself is
  never imported): its columns by name, when every column name is a string;
- a mapping of feature name -> 1-D array (all of one length);
- a numpy structured array: its fields by name.

A feature missing from a named table is an ``InputError`` naming it. Columns the
bundle does not use (an id, a timestamp) are ignored, as ``rbfgate score`` ignores
extra CSV columns; scikit-learn would refuse them, but a scoring call has no reason
to: every feature the bundle needs is still matched by name. A DataFrame whose
column names are not strings (``pd.DataFrame(X)`` numbers them 0, 1, ...) has no
feature names and is read by position, as scikit-learn reads it. Plain 2-D arrays
and lists of rows are positional: columns in ``bundle.feature_names`` order.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from model_store.errors import InputError

__all__ = ["feature_matrix"]

_NOT_REAL = {"c": "complex", "M": "date-time", "m": "time-span"}  # numpy dtype kinds


def feature_matrix(X: Any, feature_names: Sequence[str]) -> np.ndarray:
    """``X`` as a float64 array of shape (n, f), columns in ``feature_names`` order.

    Shapes and finiteness are not checked here beyond what naming needs; ``Bundle.score``
    checks them on the result.
    """
    if isinstance(X, Mapping):
        return _from_mapping(X, feature_names)
    if isinstance(X, np.ndarray) and X.dtype.names is not None:
        return _from_columns({name: X[name] for name in X.dtype.names}, feature_names, "structured array field")
    columns = getattr(X, "columns", None)
    if columns is not None and hasattr(X, "to_numpy") and not isinstance(X, np.ndarray):
        return _from_frame(X, list(columns), feature_names)
    return _as_float(X, "the rows")


def _from_frame(frame: Any, columns: list, feature_names: Sequence[str]) -> np.ndarray:
    kinds = {isinstance(column, str) for column in columns}
    if kinds == {False} or not columns:
        return _as_float(frame.to_numpy(), "the DataFrame")  # no feature names: positional, as in scikit-learn
    if kinds == {True, False}:
        # scikit-learn raises here too (sklearn.utils.validation._get_feature_names).
        raise InputError(
            "the DataFrame mixes string and non-string column names; name every column as a string "
            f"(the bundle's features are {list(feature_names)}) or pass a plain array in that order"
        )
    duplicated = sorted({column for column in columns if columns.count(column) > 1} & set(feature_names))
    if duplicated:
        raise InputError(f"the DataFrame has more than one column named {duplicated[0]!r}; keep one")
    _check_present(feature_names, set(columns), "DataFrame column")
    return _from_columns({name: frame[name].to_numpy() for name in feature_names}, feature_names, "DataFrame column")


def _from_mapping(mapping: Mapping, feature_names: Sequence[str]) -> np.ndarray:
    return _from_columns(mapping, feature_names, "key")


def _from_columns(columns: Mapping, feature_names: Sequence[str], what: str) -> np.ndarray:
    _check_present(feature_names, set(columns), what)
    arrays = []
    for name in feature_names:
        column = _as_float(columns[name], f"feature {name!r}")
        if column.ndim == 0:
            raise InputError(f"feature {name!r}: expected a 1-D array of values, one per row, got a single value; "
                             f"wrap it in a list ({{{name!r}: [value]}}) to score one row")
        if column.ndim != 1:
            raise InputError(f"feature {name!r}: expected a 1-D array of values, one per row, got shape {column.shape}")
        arrays.append(column)
    lengths = sorted({len(column) for column in arrays})
    if len(lengths) > 1:
        counts = {name: len(column) for name, column in zip(feature_names, arrays)}
        raise InputError(f"the feature columns differ in length {counts}; give every feature one value per row")
    if not arrays:
        return np.empty((0, 0))
    return np.column_stack(arrays)


def _check_present(feature_names: Sequence[str], present: set, what: str) -> None:
    missing = [name for name in feature_names if name not in present]
    if missing:
        raise InputError(
            f"feature {missing[0]!r} is missing ({len(missing)} of {len(feature_names)} missing); "
            f"the bundle needs the {what}s {list(feature_names)}"
        )


def _as_float(values: Any, what: str) -> np.ndarray:
    kind = getattr(getattr(values, "dtype", None), "kind", None)
    if kind in _NOT_REAL:
        # numpy would cast these silently: complex drops its imaginary part, times become counts of units.
        raise InputError(f"{what}: not numbers ({_NOT_REAL[kind]} values, dtype {values.dtype}); "
                         "pass float values in raw units")
    try:
        return np.asarray(values, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise InputError(f"{what}: not numbers ({exc}); pass float values in raw units") from exc
