"""Streaming a CSV file as chunks of text columns, with Arrow's CSV reader.

Arrow parses blocks of ``BLOCK_BYTES`` into columns of text (every column
read as a string, so the number grammar stays ours, ``model_store.column_checks``);
memory holds one block at a time, whatever the file's size. The reading rules
are the ones ``model_store.tables.CsvFile`` states for the rest of rbfgate:

- the header is the first record (a UTF-8 byte-order mark is skipped); names are
  stripped, and a name given twice is an error;
- a record whose fields are all blank is a blank line: skipped, not counted;
- data rows are numbered from 1 (``first_row`` for a part after the first);
- a record with more fields than the header is refused (``malformed_row``), one
  with fewer fields lacks the last columns (their features are ``missing``);
- a byte that is not UTF-8 is an error naming its file line.

Arrow hands records with the wrong number of fields to a callback, with their
record number (the header is record 1), and leaves them out of its batches;
they are put back in their place here, so the output keeps the input's order.
"""

from __future__ import annotations

import codecs
import csv
import io
import threading
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pcsv

from model_store.errors import CsvError
from model_store.refusal import Problem
from model_store.tables import CsvFile

__all__ = ["BLOCK_BYTES", "Chunk", "CsvSource"]

# Arrow's block size (about 5,000 rows of 10 features): per-block costs are still negligible, and
# memory stays flat. With 4 MiB blocks Arrow's buffers grew over the first ten blocks (peak RSS
# 255 MiB at 200,000 rows, 359 MiB at 1,000,000); with 1 MiB, 205 and 204 MiB at the same speed
# (measured on this project's benchmark file). A record longer than this is refused, clearly.
BLOCK_BYTES = 1 << 20
# A field holding any printable ASCII character other than space is not blank: the exact
# (str.strip) test then runs only on the rare rows whose first field fails this one.
_MAYBE_BLANK = r"^[^!-~]*$"


@dataclass
class Chunk:
    """Consecutive data rows of one input part.

    rows:       (n,) int64 data-row numbers
    columns:    column name -> Arrow array of length n (text for CSV, the stored type for Parquet)
    malformed:  position -> problems, for rows refused for their shape alone
    """

    rows: np.ndarray
    columns: dict[str, pa.Array]
    malformed: dict[int, list[Problem]] = field(default_factory=dict)

    def __len__(self) -> int:
        return len(self.rows)


class CsvSource:
    """One CSV file: ``header`` (read on construction) and ``chunks(names)``."""

    def __init__(self, path: Path, *, block_bytes: int | None = None):
        self.path = Path(path)
        self.block_bytes = block_bytes or BLOCK_BYTES
        with CsvFile(self.path) as opened:  # header rules and their messages live there
            self.header = opened.header

    def chunks(self, names: list[str], *, first_row: int = 1) -> Iterator[Chunk]:
        """Chunks holding the columns ``names`` (each in the header), rows numbered from ``first_row``."""
        width = len(self.header)
        positions = [self.header.index(name) for name in names]
        reported: list[tuple[int, int, str]] = []
        lock = threading.Lock()

        def on_invalid(row) -> str:
            with lock:
                reported.append((row.number, row.actual_columns, row.text))
            return "skip"

        self._stream = _Utf8Stream(self.path)
        try:
            yield from self._read(self._open(width, on_invalid), reported, lock, positions, names, width, first_row)
        finally:
            self._stream.close()

    def _read(self, reader, reported, lock, positions, names, width, first_row) -> Iterator[Chunk]:
        state = _Numbering(next_record=2, next_row=first_row)
        pending: list[tuple[int, int, str]] = []
        first = True
        while True:
            batch = self._next_batch(reader)
            with lock:
                pending.extend(reported)
                reported.clear()
            pending.sort(key=lambda item: item[0])
            if batch is None:
                break
            if first:
                if batch.num_columns != width:
                    raise CsvError(str(self.path), f"the header has {width} names, but Arrow read {batch.num_columns} "
                                   "columns in it; check its quoting")
                batch, first = batch.slice(1), False
            texts = [batch.column(index) for index in range(width)]
            chunk, pending = self._assemble(texts, pending, state, positions, names, width)
            if len(chunk):
                yield chunk
        if pending:
            chunk, _ = self._assemble([pa.array([], pa.string())] * width, pending, state, positions, names, width,
                                      final=True)
            if len(chunk):
                yield chunk

    def _open(self, width: int, on_invalid):
        try:
            return pcsv.open_csv(
                self._stream,
                read_options=pcsv.ReadOptions(autogenerate_column_names=True, block_size=self.block_bytes,
                                              use_threads=False),  # serial: records keep their numbers
                parse_options=pcsv.ParseOptions(newlines_in_values=True, ignore_empty_lines=False,
                                                invalid_row_handler=on_invalid),
                convert_options=pcsv.ConvertOptions(column_types={f"f{i}": pa.string() for i in range(width)},
                                                    strings_can_be_null=False),
            )
        except (pa.ArrowInvalid, OSError) as exc:
            raise self._error(exc) from exc

    def _next_batch(self, reader) -> pa.RecordBatch | None:
        try:
            return reader.read_next_batch()
        except StopIteration:
            return None
        except (pa.ArrowInvalid, OSError) as exc:
            raise self._error(exc) from exc

    def _error(self, exc: Exception) -> CsvError:
        if self._stream.error is not None:
            return self._stream.error
        text = str(exc)
        if "straddling" in text or "block size" in text:
            return CsvError(str(self.path), f"a record is longer than {self.block_bytes} bytes (or a quote is never "
                            "closed); check the quoting of the file")
        return CsvError(str(self.path), f"unreadable: {text}")

    def _assemble(self, texts, pending, state, positions, names, width, final=False):
        """Put the reported records that fall among (or, at the end, after) these rows in their place."""
        count = len(texts[0])
        numbers = state.next_record + np.arange(count, dtype=np.int64)
        inside: list[tuple[int, int, str]] = []
        rest = []
        for item in pending:
            if item[0] < state.next_record:
                raise CsvError(str(self.path), f"record {item[0]} was reported out of order by the reader; "
                               "rerun, and report this file if it happens again")
            if final or (count and item[0] <= numbers[-1]):
                numbers[numbers >= item[0]] += 1
                inside.append(item)
            else:
                rest.append(item)
        if count:
            state.next_record = int(numbers[-1]) + 1
        if inside:
            state.next_record = max(state.next_record, inside[-1][0] + 1)
        shape: dict[int, int] = {}
        if inside:
            texts, shape = self._merge(texts, numbers, inside, width)
        keep = _not_blank(texts)
        if keep is not None:
            texts = [column.filter(pa.array(keep)) for column in texts]
            shape = {int(new): shape[int(old)] for new, old in enumerate(np.flatnonzero(keep)) if int(old) in shape}
        size = len(texts[0])
        rows = state.next_row + np.arange(size, dtype=np.int64)
        state.next_row += size
        malformed = {position: [Problem("(row)", fields, "malformed_row", None)]
                     for position, fields in shape.items() if fields > width}
        return Chunk(rows, {name: texts[index] for name, index in zip(names, positions)}, malformed), rest

    def _merge(self, texts, numbers, inside, width):
        """Columns with the reported records inserted by record number; their field counts by position."""
        extra_fields = [self._fields(text, number) for number, _, text in inside]
        extra = [pa.array([(row[i] if i < len(row) else "") for row in extra_fields], pa.string())
                 for i in range(width)]
        merged = [pa.concat_arrays([column, added]) for column, added in zip(texts, extra)]
        order_keys = np.concatenate([numbers, np.array([number for number, _, _ in inside], dtype=np.int64)])
        order = np.argsort(order_keys, kind="stable")
        where = np.empty_like(order)
        where[order] = np.arange(len(order))
        shape = {int(where[len(numbers) + k]): max(len(row), 1) for k, row in enumerate(extra_fields)}
        return [column.take(pa.array(order)) for column in merged], shape

    def _fields(self, text: str, number: int) -> list[str]:
        try:
            return next(csv.reader(io.StringIO(text, newline="")), [""]) or [""]
        except csv.Error as exc:
            raise CsvError(str(self.path), f"unreadable record {number - 1}: {exc}") from exc


@dataclass
class _Numbering:
    next_record: int  # Arrow's record number of the next record (the header is record 1)
    next_row: int     # our data-row number of the next non-blank row


def _not_blank(texts: list[pa.Array]) -> np.ndarray | None:
    """(n,) bool, False for rows whose fields are all blank (str.strip() empty); None when none is."""
    if not len(texts[0]):
        return None
    candidates = np.flatnonzero(pc.match_substring_regex(texts[0], _MAYBE_BLANK).to_numpy(zero_copy_only=False))
    if not len(candidates):
        return None
    picked = [column.take(pa.array(candidates)).to_pylist() for column in texts]
    blank = [k for k in range(len(candidates)) if not any(values[k].strip() for values in picked)]
    if not blank:
        return None
    keep = np.ones(len(texts[0]), dtype=bool)
    keep[candidates[blank]] = False
    return keep


class _Utf8Stream(io.RawIOBase):
    """The file's bytes as Arrow reads them, checked as UTF-8 on the way (about 1 ms per MiB).

    A byte that is not UTF-8 stops the read with a CsvError naming its file line,
    before Arrow parses anything after it (Arrow alone would name a record number,
    or fail inside its callback for a short row).
    """

    def __init__(self, path: Path):
        super().__init__()
        self.path = path
        try:
            self._handle = open(path, "rb")
        except OSError as exc:
            raise CsvError(str(path), f"cannot open: {exc.strerror}") from exc
        self._decoder = codecs.getincrementaldecoder("utf-8")()
        self._lines_before = 0  # newlines in the bytes already passed on
        self._line_start = 0    # bytes since the last newline, for the byte position in a line
        self._held = b""        # a carriage return kept back for the next read
        self.error: CsvError | None = None

    def readable(self) -> bool:
        return True

    def readinto(self, buffer) -> int:
        view = memoryview(buffer).cast("B")
        start = len(self._held)
        view[:start] = self._held
        self._held = b""
        count = start + (self._handle.readinto(view[start:]) or 0)
        if count > 1 and view[count - 1] == 0x0D:
            # Never end a block on a carriage return: Arrow (pyarrow 26) then drops the line feed
            # that follows it in the next block, even inside a quoted value ("a\r\nb" read as
            # "a\rb"). The byte starts the next read instead; Arrow takes short reads as blocks.
            self._held = bytes(view[count - 1:count])
            count -= 1
        data = view[:count].tobytes()
        try:
            self._decoder.decode(data, final=count == 0)
        except UnicodeDecodeError as exc:
            self._fail(data, exc)
            raise self.error from exc
        newlines = data.count(b"\n")
        self._line_start = len(data) - data.rfind(b"\n") - 1 if newlines else self._line_start + len(data)
        self._lines_before += newlines
        return count

    def _fail(self, data: bytes, exc: UnicodeDecodeError) -> None:
        # The decoder may hold up to 3 bytes of an unfinished character from the previous read.
        held = len(exc.object) - len(data)
        position = max(exc.start - held, 0)
        before = data[:position]
        line = self._lines_before + before.count(b"\n") + 1
        in_line = position - before.rfind(b"\n") if b"\n" in before else self._line_start + position + 1
        if line == 1 and self._lines_before == 0 and data.startswith(b"\xef\xbb\xbf"):
            in_line -= 3  # counted as CsvFile counts: after the byte-order mark
        self.error = CsvError(str(self.path), f"line {line} is not UTF-8 text (byte {in_line} of the line)")

    def close(self) -> None:
        self._handle.close()
        super().close()
