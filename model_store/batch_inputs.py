"""Input tables for file scoring: a CSV or Parquet file, or a directory of part files.

A directory's parts are its ``*.csv`` or ``*.parquet`` files (one format per
directory; names starting with ``.`` or ``_``, such as ``_SUCCESS``, are not
parts), in name order. Rows are numbered from 1 across the whole table in that
order. Each part is one partition: the unit a Dask worker scores and the unit
of output parts. A part's columns are checked against the bundle once, before
any of its rows is read: every feature present and of a usable type (numbers,
or text in the number grammar), every ``--keep`` column present.
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from model_store.column_checks import column_kind
from model_store.csv_source import Chunk, CsvSource
from model_store.errors import InputError, NotFoundError, TableError
from model_store.manifest import FeatureSpec

__all__ = [
    "PARQUET_BATCH_ROWS",
    "InputPart",
    "ParquetSource",
    "check_part",
    "count_rows",
    "discover_parts",
    "kept_types",
    "open_part",
]

# Rows per Parquet batch: about the rows of one CSV block, so memory per batch is alike.
PARQUET_BATCH_ROWS = 32_768
_PARQUET_MAGIC = b"PAR1"
_SUFFIXES = {".csv": "csv", ".parquet": "parquet", ".parq": "parquet", ".pq": "parquet"}


@dataclass(frozen=True)
class InputPart:
    """One partition of the input: a file and its format (``"csv"`` or ``"parquet"``)."""

    path: Path
    format: str


def discover_parts(path: Path) -> list[InputPart]:
    """The parts of ``path`` in order: the file itself, or a directory's part files by name."""
    path = Path(path)
    if not path.exists():
        raise NotFoundError(f"{path}: no such input file or directory")
    if path.is_file():
        return [InputPart(path, _file_format(path))]
    names = sorted(child for child in path.iterdir() if not child.name.startswith((".", "_")))
    nested = [child for child in names if child.is_dir()]
    if nested:
        raise InputError(f"{path}: holds the folder {nested[0].name}; give a directory of part files "
                         "(nested or hive-style partition folders are not read)")
    parts = [InputPart(child, _SUFFIXES[child.suffix.lower()]) for child in names if child.suffix.lower() in _SUFFIXES]
    if not parts:
        raise InputError(f"{path}: no .csv or .parquet part files in this directory")
    formats = sorted({part.format for part in parts})
    if len(formats) > 1:
        raise InputError(f"{path}: mixes CSV and Parquet parts; keep one format per directory")
    return parts


def _file_format(path: Path) -> str:
    try:
        with open(path, "rb") as handle:
            magic = handle.read(4)
    except OSError as exc:
        raise TableError(str(path), f"cannot open: {exc.strerror}") from exc
    # Parquet files start with PAR1 (the Apache Parquet file format); a CSV cannot be mistaken for one.
    return "parquet" if magic == _PARQUET_MAGIC else "csv"


class ParquetSource:
    """One Parquet part: ``header``, ``types``, ``num_rows`` (from its footer) and ``chunks(names)``."""

    def __init__(self, path: Path, *, batch_rows: int | None = None):
        self.path = Path(path)
        self.batch_rows = batch_rows or PARQUET_BATCH_ROWS
        try:
            self._file = pq.ParquetFile(self.path)
        except (pa.ArrowException, OSError) as exc:
            raise TableError(str(self.path), f"not a readable Parquet file: {exc}") from exc
        schema = self._file.schema_arrow
        self.header = list(schema.names)
        self.types = {field.name: field.type for field in schema}
        self.num_rows = self._file.metadata.num_rows
        duplicates = sorted({name for name in self.header if self.header.count(name) > 1})
        if duplicates:
            raise TableError(str(self.path), f"column {duplicates[0]!r} appears more than once")

    def chunks(self, names: list[str], *, first_row: int = 1) -> Iterator[Chunk]:
        next_row = first_row
        try:
            for batch in self._file.iter_batches(batch_size=self.batch_rows, columns=list(dict.fromkeys(names))):
                rows = next_row + np.arange(batch.num_rows, dtype=np.int64)
                next_row += batch.num_rows
                yield Chunk(rows, {name: batch.column(name) for name in names})
        except (pa.ArrowException, OSError) as exc:
            raise TableError(str(self.path), f"cannot read the Parquet data near row {next_row}: {exc}") from exc


def open_part(part: InputPart, *, block_bytes: int | None = None) -> CsvSource | ParquetSource:
    if part.format == "parquet":
        return ParquetSource(part.path)
    return CsvSource(part.path, block_bytes=block_bytes)


def check_part(source: CsvSource | ParquetSource, features: Sequence[FeatureSpec], keep: Sequence[str]) -> None:
    """Every feature present with a usable type and every kept column present, else a one-line error."""
    wanted = [feature.name for feature in features]
    for name in wanted:
        if name not in source.header:
            raise TableError(str(source.path), f"feature column {name!r} not found; the bundle needs {wanted}")
    for name in keep:
        if name not in source.header:
            raise TableError(str(source.path), f"--keep column {name!r} not found; the columns are {source.header}")
    types = getattr(source, "types", None)
    if types is None:
        return  # CSV: every column is text, checked value by value
    for name in wanted:
        if column_kind(types[name]) is None:
            raise TableError(
                str(source.path),
                f"has type {types[name]}; the bundle needs numbers (integer, float or decimal) or text in the number "
                "grammar; cast the column before scoring",
                column=name,
            )


def kept_types(source: CsvSource | ParquetSource, keep: Sequence[str]) -> list[pa.Field]:
    """The output fields of the kept columns: text for CSV, the stored type for Parquet."""
    types = getattr(source, "types", None)
    return [pa.field(name, pa.string() if types is None else types[name]) for name in keep]


def count_rows(source: CsvSource | ParquetSource) -> int:
    """Data rows of a part: the footer's count for Parquet; a reading pass (no scoring) for CSV."""
    if isinstance(source, ParquetSource):
        return source.num_rows
    return sum(len(chunk) for chunk in source.chunks([]))
