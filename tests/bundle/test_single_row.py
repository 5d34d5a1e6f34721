"""A single row is scored with one matrix-vector product (gemv) instead of a matrix product (gemm).

gemv sums each exponent -gamma |z - s|^2 in another order than gemm, so the two can differ in the
last bits. The nearest support vector must still be the one a batch picks (README, Exactness: nearest
support vectors are identical for any batch size), so the kernel trusts gemv's largest exponent only
when it leads every other by more than the rounding bound of the sums, and otherwise scores the row
the batch way. The rows here sit at midpoints between pairs of support vectors, the near ties where
the two orders could disagree.
"""

from __future__ import annotations

import numpy as np
import pytest

from .reference import assert_close, sklearn_decisions

BATCH_TOLERANCE = 1e-12  # as in test_batch_sizes
EXACT = ("labels", "nearest_index", "nearest_label", "nearest_distance", "nearest_similarity",
         "nearest_percentile", "range_excess", "domain_verdict")


def _midpoint_rows(bundle, count: int, seed: int) -> np.ndarray:
    """``count`` rows in raw units, each halfway between two support vectors (scaled space)."""
    scorer = bundle.scorer
    support = scorer.support_vectors
    rng = np.random.default_rng(seed)
    first, second = rng.integers(0, len(support), size=(2, count))
    scaled = (support[first] + support[second]) / 2.0
    return scaled * scorer.scale + scorer.center


@pytest.mark.parametrize("fixture", ["cancer_standard", "wine_sigmoid"])
def test_one_row_at_a_time_gives_the_batch_results_at_near_ties(fixture, request):
    bundle, _, _ = request.getfixturevalue(fixture)
    rows = _midpoint_rows(bundle, 2_000, seed=11)
    whole = bundle.score(rows)
    singles = [bundle.score(rows[index:index + 1]) for index in range(len(rows))]
    for field in EXACT:
        want = getattr(whole, field)
        if want is not None:
            got = np.concatenate([getattr(one, field) for one in singles])
            assert np.array_equal(got, want), field
    assert_close(np.concatenate([one.decision for one in singles]), whole.decision, "decision",
                 tolerance=BATCH_TOLERANCE)


def test_one_row_on_a_support_vector_matches_scikit_learn(cancer_standard):
    # Distance 0 to one support vector: the exponent is clamped at 0 there; scikit-learn's
    # decision_function is the reference.
    bundle, model, _ = cancer_standard
    scorer = bundle.scorer
    raw = scorer.support_vectors[:25] * scorer.scale + scorer.center
    for index in range(len(raw)):
        row = raw[index:index + 1]
        scores = bundle.score(row)
        decision, _ = sklearn_decisions(model, row)
        assert_close(scores.decision, decision, f"support vector {index}")
        assert scores.nearest_index[0] == index
