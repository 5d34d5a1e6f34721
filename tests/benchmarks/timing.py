"""Timing helpers: medians of repeated runs, bounded in count and in time, alternated between rivals."""

from __future__ import annotations

import statistics
import time
from collections.abc import Callable, Sequence

__all__ = ["alternate", "median_seconds"]

# A call slower than this is its own warm-up: first-call effects are negligible at that scale.
_SLOW_CALL_SECONDS = 0.5


def median_seconds(run: Callable[[], object], *, budget: float = 1.0, least: int = 3, most: int = 200) -> float:
    """Median wall time of ``run()`` over at least ``least`` and at most ``most`` calls, about ``budget`` s."""
    return alternate([run], budget=budget, least=least, most=most)[0]


def alternate(runs: Sequence[Callable[[], object]], *, budget: float, least: int = 3, most: int = 200,
              rounds: int = 3) -> list[float]:
    """Median time of each of ``runs``, measured A B A B ... in ``rounds`` rounds so that drift hits all alike.

    Each run gets about ``budget`` seconds in total and at least ``least`` and at most ``most`` timed calls.
    """
    samples: list[list[float]] = [[] for _ in runs]
    for index, run in enumerate(runs):
        started = time.perf_counter()
        run()  # warm-up: first-call allocations, lazy imports, page faults
        seconds = time.perf_counter() - started
        if seconds > _SLOW_CALL_SECONDS:
            samples[index].append(seconds)
    per_round = budget / rounds
    for round_index in range(rounds):
        for index, run in enumerate(runs):
            round_started = time.perf_counter()
            wanted = -(-least * (round_index + 1) // rounds)  # the least count spread over the rounds
            cap = -(-most * (round_index + 1) // rounds)
            while len(samples[index]) < cap and (
                len(samples[index]) < wanted or time.perf_counter() - round_started < per_round
            ):
                started = time.perf_counter()
                run()
                samples[index].append(time.perf_counter() - started)
    return [statistics.median(times) for times in samples]
