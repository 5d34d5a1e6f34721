"""How fast a switch reaches every worker of a saturated server: ``python3 -m pytest -m benchmark -s tests/benchmarks``.

Prints the figures measured in this run (the slowest switch as a ratio to the poll interval, and the
bound it stayed within); asserts only what must hold whatever the machine's speed: every switch
reached both workers and no scoring request failed meanwhile.
"""

from __future__ import annotations

import pytest

from .convergence_bench import measure_convergence

pytestmark = pytest.mark.benchmark


@pytest.mark.parametrize("support_vectors", [0, 100_000], ids=["iris", "100k-x-50"])
def test_a_switch_reaches_both_saturated_workers(tmp_path, support_vectors):
    figures = measure_convergence(tmp_path, switches=8, support_vectors=support_vectors, log=print)
    print(f"\n2 workers, wrk 8 connections, poll {figures.poll_seconds:g} s, "
          f"{'iris' if not support_vectors else f'{support_vectors} support vectors x 50'}: slowest switch "
          f"{figures.max_lag:.2f} s after the activate was sent ({figures.ratio:.2f} poll intervals), "
          f"{max(figures.after_commit):.2f} s after the pointer was written; slowest load {max(figures.load_seconds):.2f} s; "
          f"median {sorted(figures.lags)[len(figures.lags) // 2]:.2f} s")
    assert len(figures.lags) == 8
    assert figures.scored_during > 0 and figures.non_2xx == 0
