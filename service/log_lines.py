"""The service's log sink: one JSON object per line (RFC 8259), written behind the requests.

    write = JsonLines()              # stdout; lines reach it within FLUSH_SECONDS
    write({"event": "request", ...})
    write.flush()                    # what shutdown does: every pending line, now

Each event becomes its line at once (its time stamped, its values copied into the text), so a
line says what was true when it was logged. The lines are then collected and written together by
one writer thread, at most ``flush_seconds`` after the first of them, with one ``write`` and one
``flush`` for the lot. Writing and flushing every line at once cost a one-record request about
19 us of a worker's ~305 us of CPU (tests/benchmarks, A/B of two `rbfgate serve` processes under
wrk, 2026-12-03): a system call per request, and the caches it disturbs. Access logs written from a
buffer on a short timer are common practice (nginx's ``access_log ... buffer= flush=``).

What this trades: lines appear up to ``flush_seconds`` late, and a process killed outright
(SIGKILL, the OOM killer) loses the lines of its last ``flush_seconds``. A worker that stops
normally, SIGTERM or one Ctrl-C included, writes them all: the app's shutdown calls ``flush``
(uvicorn ends a signalled worker by re-raising the signal, so atexit, registered for the stdout
sink, covers only a plain interpreter exit); a second Ctrl-C skips the shutdown and loses them.
Each write(2) holds whole lines, at most PIPE_BUF (4,096) bytes of them unless one line is longer,
so lines from several workers on one pipe do not cut into each other, in the order the events were
logged (``service.write_behind``). ``flush_seconds=0`` writes each line at once, as before.
"""

from __future__ import annotations

import atexit
import json
import sys
import time
from typing import Any, TextIO

import orjson

from service.write_behind import WriteBehind

__all__ = ["FLUSH_SECONDS", "JsonLines"]

# Short enough that someone following the log sees a request as it happens, long enough that a
# busy worker (thousands of requests a second) writes once for hundreds of lines.
FLUSH_SECONDS = 0.05
# POSIX's smallest PIPE_BUF is 512; Linux's is 4,096 (pipe(7)), the machines rbfgate serves on.
_PIPE_BUF = 4096


class JsonLines:
    """Writes each event as one JSON line to ``stream`` (stdout by default), whole lines only."""

    def __init__(self, stream: TextIO | None = None, flush_seconds: float = FLUSH_SECONDS) -> None:
        self._stream = stream
        # A stream that cannot be written (a full disk, a closed pipe) drops that batch, not later ones.
        self._batch = WriteBehind(self._write, seconds=flush_seconds, name="rbfgate-log-writer",
                                  errors=(OSError, ValueError))
        if stream is None:
            atexit.register(self.flush)  # the process's own sink: nothing pending is lost on a normal exit

    def __call__(self, event: dict[str, Any]) -> None:
        self._batch.add(_line({"time": _now(), **event}))

    def flush(self) -> None:
        """Write every pending line now."""
        self._batch.flush()

    def _write(self, lines: list[str]) -> None:
        stream = self._stream or sys.stdout
        for chunk in _whole_line_chunks(lines):
            stream.write(chunk)
            stream.flush()  # one write(2) per chunk: never more than PIPE_BUF bytes of several lines


def _whole_line_chunks(lines: list[str]) -> list[str]:
    """``lines`` joined into chunks of whole lines of at most ``_PIPE_BUF`` bytes each (a longer
    line is a chunk of its own). Several workers write to one stdout, often a pipe, and POSIX keeps
    a pipe write whole only up to PIPE_BUF bytes: a batch written at once had its lines cut into
    others' (a review found 182 of 9,000 lines broken with three processes on one pipe)."""
    chunks: list[str] = []
    current: list[str] = []
    size = 0
    for line in lines:
        length = len(line) if line.isascii() else len(line.encode("utf-8"))
        if current and size + length > _PIPE_BUF:
            chunks.append("".join(current))
            current, size = [], 0
        current.append(line)
        size += length
    if current:
        chunks.append("".join(current))
    return chunks


def _line(document: dict[str, Any]) -> str:
    try:  # orjson: a few microseconds per line instead of tens (a line is logged on every request)
        return orjson.dumps(document, default=str).decode("utf-8") + "\n"
    except TypeError:  # an integer past 64 bits (a logged input value, say): the json module writes it
        return json.dumps(document, ensure_ascii=False, default=str, allow_nan=False) + "\n"


# The last whole second and its text, one tuple read and replaced at once (threads log too):
# strftime runs once per second rather than once per line.
_second_text = (-1, "")


def _now() -> str:
    """RFC 3339 UTC time with microseconds, ``2026-01-02T03:04:05.123456Z``."""
    global _second_text
    now = time.time()
    second = int(now)
    cached = _second_text
    if cached[0] != second:
        cached = _second_text = (second, time.strftime("%Y-%m-%dT%H:%M:%S", time.gmtime(second)))
    return f"{cached[1]}.{int((now - second) * 1e6):06d}Z"
