"""The README's performance figures are the committed benchmark results, not a retyped copy.

In the default suite (not marked ``benchmark``): it reads tests/benchmarks/results/benchmark.json and
compares the README's generated block with what tests/benchmarks/readme_figures.py makes of it.
"""

from __future__ import annotations

import json

from .readme_figures import README, RESULTS, figures_block, readme_block


def test_readme_performance_block_is_generated_from_the_committed_results():
    expected = figures_block(json.loads(RESULTS.read_text(encoding="utf-8")))
    assert readme_block(README.read_text(encoding="utf-8")) == expected, (
        "README.md's performance figures differ from tests/benchmarks/results/benchmark.json; "
        "run python3 -m tests.benchmarks.readme_figures"
    )


def test_the_block_counts_the_scorer_targets_from_the_results():
    # The count is derived, not copied: every 10,000-row case at x10 or more, out of all of them.
    results = json.loads(RESULTS.read_text(encoding="utf-8"))
    large = [case for case in results["scorer"] if case["rows"] == 10_000]
    met = sum(case["ratio_1thread"] >= 10.0 for case in large)
    assert f"x10: met for {met} of {len(large)} models" in figures_block(results)
