"""Work done behind the requests: items collected per request, handled together a moment later.

    batch = WriteBehind(write_lines, seconds=0.05, name="rbfgate-log-writer")
    batch.add(line)       # on the request's path: one append under a lock
    batch.flush()         # everything added so far, handled now (shutdown, a metrics scrape)

One writer thread per batch sleeps until an item arrives, waits ``seconds`` for the items that
follow it, then hands them all, in the order they were added, to ``handle`` in one call. The log
sink (``service.log_lines``) and the metrics (``service.metrics``) use it: per request they cost an
append instead of a write system call or a dozen locked counter updates (tests/benchmarks, A/B of
two `rbfgate serve` processes under wrk). ``seconds=0`` handles each item at once, on the caller's
thread. ``handle`` runs under one lock, so two flushes never interleave.
"""

from __future__ import annotations

import logging
import threading
import time
from collections.abc import Callable
from typing import Any

__all__ = ["WriteBehind"]

_log = logging.getLogger("rbfgate.service")


class WriteBehind:
    """Items added from any thread, handed to ``handle(items)`` in order at most ``seconds`` after the first."""

    def __init__(self, handle: Callable[[list[Any]], None], *, seconds: float, name: str,
                 errors: tuple[type[BaseException], ...] = ()) -> None:
        """``errors``: what ``handle`` may raise on the writer thread and is then dropped with its
        batch, silently (a log stream that cannot be written, say: there is nowhere to say so);
        anything else drops the batch too and is logged with its traceback (stderr). Either way the
        writer thread goes on with the next batch. ``flush`` raises whatever ``handle`` raises."""
        self._handle = handle
        self._seconds = seconds
        self._name = name
        self._errors = errors
        self._pending: list[Any] = []
        self._pending_lock = threading.Lock()  # held for an append or a swap, never while handling
        self._handle_lock = threading.Lock()
        self._wake = threading.Event()
        self._writer: threading.Thread | None = None

    def add(self, item: Any) -> None:
        with self._pending_lock:
            self._pending.append(item)
            first = len(self._pending) == 1
        if self._seconds <= 0:
            self.flush()
        elif first:  # the writer sleeps until a batch begins
            if self._writer is None:
                self._start_writer()
            self._wake.set()

    def flush(self) -> None:
        """Handle every item added so far, now, on this thread."""
        with self._handle_lock:
            with self._pending_lock:
                items, self._pending = self._pending, []
            if items:
                self._handle(items)

    def _start_writer(self) -> None:
        with self._handle_lock:
            if self._writer is None:
                self._writer = threading.Thread(target=self._write_behind, name=self._name, daemon=True)
                self._writer.start()

    def _write_behind(self) -> None:
        while True:
            self._wake.wait()
            self._wake.clear()
            time.sleep(self._seconds)  # the batch: what else arrives meanwhile
            try:
                self.flush()
            except self._errors:
                pass
            except Exception:  # a bug in handle: that batch is lost, later ones are not (the thread lives on)
                _log.exception("%s: a batch could not be handled and was dropped", self._name)
