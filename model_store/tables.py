"""Reading CSV files of feature values, with errors that name file, row and column.

Rows are numbered from 1 for the first non-blank data row (the header is not
counted); messages also give the file line where the row starts. Numbers
follow one grammar everywhere (``model_store.refusal.from_text``).
"""

from __future__ import annotations

import csv
import re
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from model_store.errors import CsvError, NotFoundError
from model_store.refusal import from_text

__all__ = ["CsvFile", "CsvRow", "Table", "read_table"]

_INTEGER_LABEL = re.compile(r"[+-]?(0|[1-9][0-9]*)")


@dataclass(frozen=True)
class Table:
    """A fully read CSV: ``values`` (n, f) float64 in ``features`` order, ``target`` labels or None."""

    path: str
    features: list[str]
    values: np.ndarray
    target: list | None


@dataclass(frozen=True)
class CsvRow:
    """One non-blank data row: ``number`` counts data rows from 1, ``line`` is its first file line."""

    number: int
    line: int
    fields: list[str]


class CsvFile:
    """A CSV file opened for streaming: ``header`` and an iterator of ``CsvRow`` (blank rows skipped).

    The file is decoded line by line, so a byte that is not UTF-8 is reported
    at its exact line. Use it as a context manager so the file is closed.
    """

    def __init__(self, path: Path) -> None:
        self.path = Path(path)
        try:
            self._handle = open(self.path, "rb")
        except FileNotFoundError as exc:
            raise NotFoundError(f"{self.path}: no such file") from exc
        except IsADirectoryError as exc:
            raise CsvError(str(self.path), "is a directory; expected a CSV file") from exc
        except OSError as exc:
            raise CsvError(str(self.path), f"cannot open: {exc.strerror}") from exc
        self._reader = csv.reader(self._decoded_lines())
        try:
            header = next(self._reader, None)
        except csv.Error as exc:
            self.close()
            raise CsvError(str(self.path), f"unreadable header: {exc}") from exc
        except BaseException:
            self.close()
            raise
        if header is None:
            self.close()
            raise CsvError(str(self.path), "the file is empty; expected a header row of column names")
        self.header = [name.strip() for name in header]
        duplicates = sorted({name for name in self.header if self.header.count(name) > 1})
        if duplicates:
            self.close()
            raise CsvError(str(self.path), f"column {duplicates[0]!r} appears more than once in the header")

    def __enter__(self) -> "CsvFile":
        return self

    def __exit__(self, *exc_info) -> None:
        self.close()

    def close(self) -> None:
        self._handle.close()

    def __iter__(self) -> Iterator[CsvRow]:
        number = 0
        while True:
            line = self._reader.line_num + 1
            try:
                fields = next(self._reader)
            except StopIteration:
                return
            except csv.Error as exc:
                raise CsvError(str(self.path), f"unreadable (line {line}): {exc}", row=number + 1) from exc
            if not any(field.strip() for field in fields):
                continue  # blank lines carry no record
            number += 1
            yield CsvRow(number, line, fields)

    def _decoded_lines(self) -> Iterator[str]:
        for line_number, raw in enumerate(self._handle, start=1):
            if line_number == 1 and raw.startswith(b"\xef\xbb\xbf"):
                raw = raw[3:]  # a byte-order mark some spreadsheets write
            try:
                yield raw.decode("utf-8")
            except UnicodeDecodeError as exc:
                raise CsvError(
                    str(self.path), f"line {line_number} is not UTF-8 text (byte {exc.start + 1} of the line)"
                ) from exc


def read_table(path: Path, *, target: str | None = None, features: list[str] | None = None) -> Table:
    """Read every row strictly: any missing or non-numeric feature value is an error.

    ``features`` picks and orders the feature columns (default: every column but the target).
    The target column, when named, is read as int labels if every value is an integer, else strings.
    """
    with CsvFile(path) as source:
        header = source.header
        if target is not None and target not in header:
            raise CsvError(str(path), f"target column {target!r} not found; the header has {header}")
        if features is None:
            features = [name for name in header if name != target]
        missing = [name for name in features if name not in header]
        if missing:
            raise CsvError(str(path), f"feature column {missing[0]!r} not found; the header has {header}")
        if not features:
            raise CsvError(str(path), "no feature columns; the header holds only the target")
        positions = [header.index(name) for name in features]
        target_position = header.index(target) if target is not None else None
        values: list[list[float]] = []
        labels: list[str] = []
        for row in source:
            fields = row.fields
            if len(fields) != len(header):
                raise CsvError(
                    str(path), f"has {len(fields)} fields, the header has {len(header)} (line {row.line})", row=row.number
                )
            row_values = []
            for name, position in zip(features, positions):
                value = from_text(fields[position])
                if isinstance(value, str):
                    shown = fields[position] or "(empty)"
                    raise CsvError(
                        str(path), f"value {shown!r} is not a finite number (line {row.line})", row=row.number, column=name
                    )
                row_values.append(value)
            values.append(row_values)
            if target_position is not None:
                label = fields[target_position].strip()
                if not label:
                    raise CsvError(str(path), f"empty target label (line {row.line})", row=row.number, column=target)
                labels.append(label)
    if not values:
        raise CsvError(str(path), "no data rows after the header")
    array = np.asarray(values, dtype=np.float64)
    return Table(str(path), list(features), array, _typed_labels(labels) if target is not None else None)


def _typed_labels(labels: list[str]) -> list:
    """Integers when every label is a plain integer ("01" and "1_0" are not), else the strings."""
    if all(_INTEGER_LABEL.fullmatch(label) for label in labels):
        return [int(label) for label in labels]
    return labels
