"""Timing helpers: medians of repeated runs, bounded in count and in time, alternated between rivals.

Both the wall time and the process CPU time (all threads) of each call are
kept: wall time is what a caller waits for; CPU time shows the same work
without the time lost to other processes on a shared machine.
"""

from __future__ import annotations

import statistics
import time
from collections.abc import Callable, Sequence
from contextlib import AbstractContextManager, nullcontext
from dataclasses import dataclass

__all__ = ["Timing", "alternate", "median_seconds"]

# A call slower than this is its own warm-up: first-call effects are negligible at that scale.
_SLOW_CALL_SECONDS = 0.5


@dataclass(frozen=True)
class Timing:
    """Medians over ``calls`` calls: ``wall`` and ``cpu`` seconds per call."""

    wall: float
    cpu: float
    calls: int


def median_seconds(run: Callable[[], object], *, budget: float = 1.0, least: int = 3, most: int = 200) -> float:
    """Median wall time of ``run()`` over at least ``least`` and at most ``most`` calls, about ``budget`` s."""
    return alternate([run], budget=budget, least=least, most=most)[0].wall


def alternate(runs: Sequence[Callable[[], object]], *, budget: float, least: int = 3, most: int = 200,
              rounds: int = 3, settings: Sequence[Callable[[], AbstractContextManager]] | None = None) -> list[Timing]:
    """Medians of each of ``runs``, measured A B A B ... in ``rounds`` rounds so that drift hits all alike.

    Each run gets about ``budget`` seconds in total and at least ``least`` and at most ``most`` timed calls.
    ``settings[i]()`` (a BLAS thread limit, say) is entered around each stretch of run i's calls,
    outside the timed calls, because changing it can cost more than a small call.
    """
    settings = settings or [nullcontext] * len(runs)
    wall: list[list[float]] = [[] for _ in runs]
    cpu: list[list[float]] = [[] for _ in runs]

    def timed(index: int) -> float:
        started, cpu_started = time.perf_counter(), time.process_time()
        runs[index]()
        seconds = time.perf_counter() - started
        wall[index].append(seconds)
        cpu[index].append(time.process_time() - cpu_started)
        return seconds

    for index in range(len(runs)):
        with settings[index]():
            if timed(index) <= _SLOW_CALL_SECONDS:  # a fast call was only a warm-up: drop it
                wall[index].pop()
                cpu[index].pop()
    per_round = budget / rounds
    for round_index in range(rounds):
        for index in range(len(runs)):
            round_started = time.perf_counter()
            wanted = -(-least * (round_index + 1) // rounds)  # the least count spread over the rounds
            cap = -(-most * (round_index + 1) // rounds)
            with settings[index]():
                while len(wall[index]) < cap and (
                    len(wall[index]) < wanted or time.perf_counter() - round_started < per_round
                ):
                    timed(index)
    return [Timing(statistics.median(w), statistics.median(c), len(w)) for w, c in zip(wall, cpu)]
