"""The Python API of file scoring: score a pandas or Dask DataFrame with a bundle.

    from model_store import load_bundle
    from model_store.frames import score_frame

    results = score_frame(bundle, frame, keep=["pallet_id"])     # pandas in, pandas out
    results = score_frame(bundle, dask_frame).compute()          # Dask in, Dask out (lazy)

Feature columns are matched by name (the bundle's feature names; other
columns are ignored unless kept), never by position. Each input row gives one
result row with the input's index: the kept columns, then the result columns
of ``rbfgate score`` (``model_store.result_columns``) without ``row``. Rows
are refused by the same policy as files: numbers must be finite and in range,
text must follow the number grammar, a null is refused as ``null``. A Dask
frame is scored partition by partition on the workers; each receives the
bundle as bytes and verifies it once (``model_store.bundle_transport``).
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import pyarrow as pa

from model_store.bundle import Bundle
from model_store.bundle_transport import bundle_bytes, verified_bundle
from model_store.chunk_scoring import output_schema, score_chunk
from model_store.column_checks import column_kind
from model_store.csv_source import Chunk
from model_store.domain_policy import DEFAULT_OUTSIDE_ACTION
from model_store.errors import InputError
from model_store.result_columns import result_columns, result_names

__all__ = ["score_frame"]


def score_frame(bundle: Bundle, frame, *, keep: Sequence[str] = (), outside_action: str = DEFAULT_OUTSIDE_ACTION):
    """Results for every row of ``frame`` (pandas.DataFrame or dask.dataframe.DataFrame), same type back.

    ``outside_action``: ``refuse`` rows whose domain verdict is outside, or ``flag`` them (answered).
    """
    keep = list(keep)
    _check_names(bundle, list(frame.columns), keep)
    if _is_dask(frame):
        import dask

        data = dask.delayed(bundle_bytes(bundle), pure=True)
        meta = _score_pandas(bundle, frame._meta, keep, outside_action)
        return frame.map_partitions(_score_partition, data, bundle.digest, keep, outside_action, meta=meta)
    return _score_pandas(bundle, frame, keep, outside_action)


def _is_dask(frame) -> bool:
    return type(frame).__module__.split(".")[0] in ("dask", "dask_expr")


def _score_partition(frame, data: bytes, digest: str, keep: list[str], outside_action: str):
    return _score_pandas(verified_bundle(data, digest), frame, keep, outside_action)


def _check_names(bundle: Bundle, columns: list, keep: list[str]) -> None:
    missing = [name for name in bundle.feature_names if name not in columns]
    if missing:
        raise InputError(f"the frame has no column {missing[0]!r}; the bundle needs {bundle.feature_names} "
                         f"(matched by name), the frame has {[str(c) for c in columns]}")
    results = set(result_names(bundle, with_row=False))
    for name in keep:
        if name not in columns:
            raise InputError(f"keep: the frame has no column {name!r}")
        if name in results:
            raise InputError(f"keep: {name!r} is also a result column; rename that column of the frame first")


def _score_pandas(bundle: Bundle, frame, keep: list[str], outside_action: str):
    import pandas as pd

    columns = {name: _arrow_column(frame[name], name) for name in bundle.feature_names}
    chunk = Chunk(np.arange(1, len(frame) + 1, dtype=np.int64), columns)
    result_cols = result_columns(bundle, with_row=False)
    schema = output_schema(bundle, [], with_row=False)
    table = score_chunk(bundle, result_cols, chunk, [], schema, outside_action).table
    results = table.to_pandas(types_mapper={pa.int64(): pd.Int64Dtype()}.get)
    results.index = frame.index
    if keep:
        results = pd.concat([frame[keep], results], axis=1)
    return results


def _arrow_column(series, name: str) -> pa.Array:
    """One feature column as Arrow: numbers stay numbers (NaN stays NaN, refused as not finite),
    missing values (None, pandas' NA) become nulls (refused as null), text stays text."""
    import pandas as pd

    try:
        if isinstance(series.dtype, pd.api.extensions.ExtensionDtype):
            column = pa.Array.from_pandas(series)  # masked and Arrow-backed dtypes: NA is null
        elif series.dtype == object:
            column = _object_column(series.tolist())
        else:
            column = pa.array(series.to_numpy(), from_pandas=False)
    except (pa.ArrowException, TypeError, ValueError) as exc:
        raise InputError(f"column {name!r} cannot be read as numbers or text ({exc}); convert it first") from exc
    if column_kind(column.type) is None:
        raise InputError(f"column {name!r} has type {column.type}; the bundle needs numbers or text in the number "
                         "grammar; cast the column before scoring")
    return column


def _object_column(values: list) -> pa.Array:
    import pandas as pd

    values = [None if value is pd.NA else value for value in values]
    try:
        return pa.array(values, from_pandas=False)
    except (pa.ArrowException, TypeError, ValueError):
        # Mixed numbers and text: as text, each value is then judged alone (str() of a float
        # round-trips exactly; True, nested values and text are refused as not a number).
        return pa.array([None if value is None else str(value) for value in values], type=pa.string())
