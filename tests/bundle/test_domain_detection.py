"""The refusal policy on real and shifted rows of four scikit-learn datasets (tests/benchmarks/domain_detection).

Datasets shipped with scikit-learn: iris (Fisher 1936), wine (Forina et al. 1988), breast cancer
(Street, Wolberg and Mangasarian 1993), digits (Alpaydin and Kaynak 1998), UCI repository; each
split 70/30, stratified, with seeds 0, 1 and 2, and exported from the 70 % alone: the 30 % are the
real rows, new to the bundle. The shifts and policies are described in
tests/benchmarks/domain_detection.py, which also prints the table quoted in the README. The bound
on real rows refused is tests/bundle/test_fresh_refusals.py.

The comparison box ("box-same") is widened just enough to refuse no more of a seed's 30 % than the
whole policy does: its margin is tuned on the very rows it is then measured on, which the whole
policy's margin and thresholds never see, and still the whole policy catches at least as many
shifted rows on every dataset (on digits by a few rows only). What that tuning is worth is
measured too: a box tuned so on one half of the 30 % refuses two to seven times as many of the
other half's rows as of its own on iris, wine and breast cancer (1.2 times on digits) (exchangeability: k of n rows outside a margin set for them means
about (k + 1) / (n + 1) of new rows outside; Vovk, Gammerman and Shafer 2005).

The like-for-like box ("box-oos") has its margin chosen as the bundle's is, out of sample from the
reference rows alone, for the whole refuse rate (the bundle's ranges get half of it). It is
compared at the same target rate, not at the same measured share of the 30 %. On digits (64
features) the whole policy catches fewer shifted rows than that box: the half of the budget the
domain model spends buys less there than it would as range margin (strict xfail, README).
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from tests.benchmarks.domain_detection import DATASETS, detection_case, render_table, summarise

SEEDS = (0, 1, 2)
_DIGITS = pytest.mark.xfail(strict=True, reason="on digits the domain model's half of the budget catches fewer "
                            "shifted rows than the same budget spent on the box margin (README, How rbfgate decides)")


@pytest.fixture(scope="module")
def summary():
    return summarise([detection_case(dataset, seed) for dataset in DATASETS for seed in SEEDS])


@pytest.mark.parametrize("dataset", DATASETS)
def test_the_whole_policy_catches_at_least_as_many_shifted_rows_as_a_box_at_the_same_refusal_rate(dataset, summary):
    result = summary[dataset]
    assert result["holdout_refused"]["box-same"] <= result["holdout_refused"]["whole"]  # the box's budget
    assert result["caught_all_shifts"]["whole"] >= result["caught_all_shifts"]["box-same"], result["caught_all_shifts"]


def test_the_whole_policy_catches_more_than_the_box_on_at_least_two_datasets(summary):
    better = [name for name, result in summary.items()
              if result["caught_all_shifts"]["whole"] > result["caught_all_shifts"]["box-same"]]
    assert len(better) >= 2, {name: result["caught_all_shifts"] for name, result in summary.items()}


@pytest.mark.parametrize("dataset", DATASETS)
def test_a_box_tuned_on_the_measured_rows_refuses_more_of_rows_it_was_not_tuned_on(dataset, summary):
    halves = summary[dataset]["box_same_halves"]
    assert halves["other_half"] > halves["tuning_half"], halves


@pytest.mark.parametrize("dataset", [pytest.param(name, marks=_DIGITS) if name == "digits" else name
                                     for name in DATASETS])
def test_the_whole_policy_catches_at_least_as_many_shifted_rows_as_a_box_chosen_out_of_sample(dataset, summary):
    caught = summary[dataset]["caught_all_shifts"]
    assert caught["whole"] >= caught["box-oos"], caught


def test_the_whole_policy_catches_more_than_the_out_of_sample_box_on_at_least_two_datasets(summary):
    better = [name for name, result in summary.items()
              if result["caught_all_shifts"]["whole"] > result["caught_all_shifts"]["box-oos"]]
    assert len(better) >= 2, {name: result["caught_all_shifts"] for name, result in summary.items()}


def test_the_readme_quotes_the_committed_detection_results():
    # The README's figures are generated, not retyped: its tables are render_table's output for the
    # committed results of the default seeds 0-4, written by
    # python3 -m tests.benchmarks.domain_detection --json tests/benchmarks/results/domain_detection.json
    # (a run on another platform may differ by a row or two; the tests above check the properties).
    root = Path(__file__).resolve().parents[2]
    committed = json.loads((root / "tests" / "benchmarks" / "results" / "domain_detection.json").read_text())
    readme = (root / "README.md").read_text(encoding="utf-8")
    assert render_table(committed) in readme, "README tables differ from the committed domain_detection.json"
