"""Reading CSV files of feature values, with errors that name file, row and column.

Rows are numbered from 1 for the first data row (the header is not counted);
messages also give the file line, which is the row number plus one.
"""

from __future__ import annotations

import csv
import math
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from model_store.errors import CsvError, NotFoundError

__all__ = ["Table", "open_csv", "parse_number", "read_table"]


@dataclass(frozen=True)
class Table:
    """A fully read CSV: ``values`` (n, f) float64 in ``features`` order, ``target`` labels or None."""

    path: str
    features: list[str]
    values: np.ndarray
    target: list | None


def parse_number(text: str) -> float | None:
    """The finite float in ``text``, or None when it is empty, not a number, NaN or infinite."""
    try:
        value = float(text)
    except (TypeError, ValueError):
        return None
    return value if math.isfinite(value) else None


def open_csv(path: Path) -> tuple[list[str], Iterator[list[str]], object]:
    """Open ``path``; return its header, a row iterator and the handle (close it when done)."""
    path = Path(path)
    try:
        handle = open(path, newline="", encoding="utf-8-sig")
    except FileNotFoundError as exc:
        raise NotFoundError(f"{path}: no such file") from exc
    except OSError as exc:
        raise CsvError(str(path), f"cannot open: {exc.strerror}") from exc
    reader = csv.reader(handle)
    try:
        header = next(reader)
    except StopIteration:
        handle.close()
        raise CsvError(str(path), "the file is empty; expected a header row of column names") from None
    except (csv.Error, UnicodeDecodeError) as exc:
        handle.close()
        raise CsvError(str(path), f"unreadable header: {exc}", row=0) from exc
    header = [name.strip() for name in header]
    duplicates = sorted({name for name in header if header.count(name) > 1})
    if duplicates:
        handle.close()
        raise CsvError(str(path), f"column {duplicates[0]!r} appears more than once in the header")
    return header, _guarded(path, reader), handle


def _guarded(path: Path, reader) -> Iterator[list[str]]:
    row = 0
    while True:
        try:
            fields = next(reader)
        except StopIteration:
            return
        except (csv.Error, UnicodeDecodeError) as exc:
            raise CsvError(str(path), f"unreadable (line {row + 2}): {exc}", row=row + 1) from exc
        row += 1
        yield fields


def read_table(path: Path, *, target: str | None = None, features: list[str] | None = None) -> Table:
    """Read every row strictly: any missing or non-numeric feature value is an error.

    ``features`` picks and orders the feature columns (default: every column but the target).
    The target column, when named, is read as int labels if every value is an integer, else strings.
    """
    header, rows, handle = open_csv(path)
    try:
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
        for number, fields in enumerate(rows, start=1):
            if not any(field.strip() for field in fields):
                continue  # blank lines carry no record
            if len(fields) != len(header):
                raise CsvError(
                    str(path), f"has {len(fields)} fields, the header has {len(header)} (line {number + 1})", row=number
                )
            row_values = []
            for name, position in zip(features, positions):
                value = parse_number(fields[position])
                if value is None:
                    shown = fields[position] or "(empty)"
                    raise CsvError(
                        str(path), f"value {shown!r} is not a finite number (line {number + 1})", row=number, column=name
                    )
                row_values.append(value)
            values.append(row_values)
            if target_position is not None:
                label = fields[target_position].strip()
                if not label:
                    raise CsvError(str(path), f"empty target label (line {number + 1})", row=number, column=target)
                labels.append(label)
    finally:
        handle.close()
    if not values:
        raise CsvError(str(path), "no data rows after the header")
    array = np.asarray(values, dtype=np.float64)
    return Table(str(path), list(features), array, _typed_labels(labels) if target is not None else None)


def _typed_labels(labels: list[str]) -> list:
    try:
        return [int(label) for label in labels]
    except ValueError:
        return labels
