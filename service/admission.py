"""Admission of scoring work: a fixed number of scoring threads and a bounded queue per worker.

Scoring a large request (parsing the body, the refusal policy, the scorer, building the answer)
runs on one of ``threads`` dedicated threads, never on the event loop, so health checks,
metadata and small requests keep being answered while it works. At most ``threads + queue``
requests are admitted at once; the next one is answered at once with 503 problem details and
``Retry-After`` (RFC 9110 sections 15.6.4 and 10.2.3) instead of waiting, so memory and latency
stay bounded under any load: what scoring holds in memory is at most ``threads + queue``
requests' worth (see the README's sizing section for the measured cost of each).

A request counts as admitted from the moment it is handed over until its thread has finished
with it, even if its client went away meanwhile (the thread cannot be interrupted), so the bound
holds for the work itself, not only for the waiting.
"""

from __future__ import annotations

import asyncio
import threading
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from typing import TypeVar

from service.problems import ServiceProblem

__all__ = ["RETRY_AFTER_SECONDS", "ScoringGate"]

RETRY_AFTER_SECONDS = 1
_Result = TypeVar("_Result")


class ScoringGate:
    """``await gate.run(work)`` runs ``work()`` on a scoring thread, or raises the 503 problem when full."""

    def __init__(self, threads: int, queue: int) -> None:
        self.threads = threads
        self.queue = queue
        self._executor = ThreadPoolExecutor(max_workers=threads, thread_name_prefix="rbfgate-scoring")
        self._lock = threading.Lock()
        self._admitted = 0

    @property
    def admitted(self) -> int:
        """Requests handed over and not yet finished (running or queued)."""
        return self._admitted

    async def run(self, work: Callable[[], _Result]) -> _Result:
        with self._lock:
            if self._admitted >= self.threads + self.queue:
                raise _overloaded(self.threads, self.queue)
            self._admitted += 1
        try:
            future = self._executor.submit(work)
        except BaseException:
            self._release()
            raise
        # Released when the work is done, failed, or was cancelled before it started (a client
        # that went away while queued): whichever way, exactly once.
        future.add_done_callback(lambda _: self._release())
        return await asyncio.wrap_future(future)

    def close(self) -> None:
        """Stop accepting work; threads finish what they hold (on worker shutdown)."""
        self._executor.shutdown(wait=False, cancel_futures=True)

    def _release(self) -> None:
        with self._lock:
            self._admitted -= 1


def _overloaded(threads: int, queue: int) -> ServiceProblem:
    return ServiceProblem(
        503,
        "overloaded",
        "The service is busy",
        f"this worker is already scoring {threads} request(s) with {queue} more waiting, its limit; "
        f"retry after {RETRY_AFTER_SECONDS} s, or send smaller requests",
        extra={"scoring_threads": threads, "scoring_queue": queue},
        headers={"Retry-After": str(RETRY_AFTER_SECONDS)},
    )
