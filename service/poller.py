"""A background thread that runs the service's periodic checks.

Each tick runs every task in order. The service runs one poller for the
store and one for the tokens file, so that neither waits for the other. A
failing task is logged and the thread goes on: serving must never stop
because one poll went wrong.
"""

from __future__ import annotations

import logging
import threading
from collections.abc import Callable, Sequence

__all__ = ["Poller"]

_log = logging.getLogger("rbfgate.service")


class Poller:
    """Runs ``tasks`` every ``interval`` seconds on a daemon thread until ``stop``."""

    def __init__(self, interval: float, tasks: Sequence[Callable[[], None]], *, name: str = "rbfgate-poller") -> None:
        self.interval = interval
        self.name = name
        self._tasks = tuple(tasks)
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None

    def start(self) -> None:
        self._thread = threading.Thread(target=self._run, name=self.name, daemon=True)
        self._thread.start()

    def stop(self, timeout: float = 10.0) -> None:
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout)

    def _run(self) -> None:
        while not self._stop.wait(self.interval):
            for task in self._tasks:
                try:
                    task()
                except Exception:  # noqa: BLE001 - keep polling whatever one task does
                    _log.exception("periodic task %s failed", getattr(task, "__qualname__", task))
