"""The file-scoring benchmark as a pytest test: ``python3 -m pytest -m benchmark tests/benchmarks``.

Runs a small plan into a temporary folder and checks what the run must get right whatever the
machine's speed: the same labels as pandas + the scorer, every engine finished, and the table
and numbers were written. Speeds are reported (file-scoring.md), not asserted.
"""

from __future__ import annotations

import json

import pytest

from .file_bench import FileBenchPlan, run_file_bench

pytestmark = pytest.mark.benchmark


@pytest.fixture(scope="module")
def quick(tmp_path_factory):
    out = tmp_path_factory.mktemp("file-bench")
    return out, run_file_bench(out, FileBenchPlan(rows=50_000, repeats=1, workers=(1, 2)), log=lambda text: None)


def test_rbfgate_and_pandas_give_the_same_labels(quick):
    _, results = quick
    assert results["same_labels"]


def test_every_engine_ran_on_every_row(quick):
    _, results = quick
    assert [row["rows"] for row in results["engines"]] == [50_000] * 3


def test_the_table_and_the_numbers_are_written(quick):
    out, results = quick
    assert "| target | measured | met |" in (out / "file-scoring.md").read_text()
    assert json.loads((out / "file-scoring.json").read_text())["csv_ratio"] == results["csv_ratio"]
