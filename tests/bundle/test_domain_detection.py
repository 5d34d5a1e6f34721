"""The refusal policy on real and shifted rows of four scikit-learn datasets (tests/benchmarks/domain_detection).

Datasets shipped with scikit-learn: iris (Fisher 1936), wine (Forina et al. 1988), breast cancer
(Street, Wolberg and Mangasarian 1993), digits (Alpaydin and Kaynak 1998), UCI repository; each
split 70/30, stratified, with seeds 0, 1 and 2. The shifts and policies are described in
tests/benchmarks/domain_detection.py, which also prints the table quoted in the README.
"""

from __future__ import annotations

import pytest

from tests.benchmarks.domain_detection import DATASETS, REFUSE_RATE, detection_case, summarise

SEEDS = (0, 1, 2)


@pytest.fixture(scope="module")
def summary():
    return summarise([detection_case(dataset, seed) for dataset in DATASETS for seed in SEEDS])


@pytest.mark.parametrize("dataset", DATASETS)
@pytest.mark.parametrize("seed", SEEDS)
def test_the_whole_policy_refuses_at_most_twice_the_refuse_rate_of_holdout_rows(dataset, seed):
    case = detection_case(dataset, seed)
    assert case.holdout_refused["whole"] <= 2 * REFUSE_RATE, case.holdout_refused


@pytest.mark.parametrize("dataset", DATASETS)
def test_the_whole_policy_catches_at_least_as_many_shifted_rows_as_a_box_at_the_same_holdout_rate(dataset, summary):
    result = summary[dataset]
    assert result["holdout_refused"]["box-same"] <= result["holdout_refused"]["whole"]  # the box's budget
    assert result["caught_all_shifts"]["whole"] >= result["caught_all_shifts"]["box-same"], result["caught_all_shifts"]


def test_the_whole_policy_catches_more_than_the_box_on_at_least_two_datasets(summary):
    better = [name for name, result in summary.items()
              if result["caught_all_shifts"]["whole"] > result["caught_all_shifts"]["box-same"]]
    assert len(better) >= 2, {name: result["caught_all_shifts"] for name, result in summary.items()}
