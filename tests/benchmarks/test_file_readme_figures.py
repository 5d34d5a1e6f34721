"""The README's file-scoring figures are the committed results, not a retyped copy (default suite)."""

from __future__ import annotations

import json

from .file_bench import README, RESULTS, with_figures


def test_readme_file_scoring_figures_are_generated_from_the_committed_results():
    text = README.read_text(encoding="utf-8")
    assert with_figures(text, json.loads(RESULTS.read_text(encoding="utf-8"))) == text, (
        "README.md's file-scoring figures differ from tests/benchmarks/results/file-scoring.json; "
        "run python3 -m tests.benchmarks.file_bench --readme-only"
    )
