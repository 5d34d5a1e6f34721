"""Nearest-support diagnostics against a brute-force computation, and the range check.

Reference: a plain numpy loop over the support vectors in the SVC's input space (the
scikit-learn scaler's ``transform``), Euclidean distance sqrt(sum (z - s)^2), first
minimum on ties; quantiles with numpy's default 'linear' method, which is definition 7
of R. J. Hyndman and Y. Fan, "Sample quantiles in statistical packages", The American
Statistician 50(4), 1996, as the numpy.quantile documentation states.

The reference distances are leave-self-out: a reference row that is itself a support vector is
measured to the nearest *other* support vector, every other row to the nearest support vector.
"""

from __future__ import annotations

import numpy as np
import pytest

from model_store.refusal import check_records
from model_store.scoring import distance_percentile

from .reference import probe_rows

LEVELS = np.linspace(0.0, 1.0, 101)  # the manifest's quantile levels: 0 to 1 in steps of 0.01


def brute_force_nearest(Z: np.ndarray, support: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(index, distance) of the nearest support vector of each row of Z, by a loop over support vectors."""
    best_index = np.zeros(len(Z), dtype=np.int64)
    best_distance = np.full(len(Z), np.inf)
    for index, vector in enumerate(support):
        distance = np.sqrt(np.sum((Z - vector) ** 2, axis=1))
        closer = distance < best_distance  # strict: the first minimum wins
        best_index[closer] = index
        best_distance[closer] = distance[closer]
    return best_index, best_distance


def _parts(model):
    """(SVC, function raw -> SVC input) from scikit-learn's fitted objects."""
    if hasattr(model, "calibrated_classifiers_"):
        model = model.calibrated_classifiers_[0].estimator
    if hasattr(model, "steps"):
        return model[-1], model[:-1].transform
    return model, lambda X: X


@pytest.mark.parametrize("fixture", ["iris_raw", "cancer_standard", "wine_sigmoid"])
def test_nearest_support_vector_equals_brute_force(fixture, request):
    bundle, model, X = request.getfixturevalue(fixture)
    svc, transform = _parts(model)
    rows = probe_rows(X, seed=3)
    Z = transform(rows)
    index, distance = brute_force_nearest(Z, svc.support_vectors_)
    scores = bundle.score(rows)
    assert np.array_equal(bundle.support_vectors, svc.support_vectors_)
    assert np.allclose(scores.nearest_distance, distance, rtol=1e-12, atol=1e-12)
    # The same index, except where another support vector is at the same distance
    # (iris has duplicate rows); then the one found must be exactly as near.
    found = np.sqrt(np.sum((Z - svc.support_vectors_[scores.nearest_index]) ** 2, axis=1))
    assert np.allclose(found, distance, rtol=1e-12, atol=1e-12)
    assert np.mean(scores.nearest_index == index) > 0.99
    class_of_support = np.repeat(svc.classes_, svc.n_support_)  # scikit-learn groups support vectors by class
    assert scores.nearest_label.tolist() == class_of_support[scores.nearest_index].tolist()
    gamma = bundle.manifest.kernel.gamma
    assert np.allclose(scores.nearest_similarity, np.exp(-gamma * distance**2), rtol=1e-12, atol=0)


def leave_self_out(Z: np.ndarray, support: np.ndarray) -> np.ndarray:
    """Distance of each row of Z to the nearest support vector that is not the row itself, by brute force:
    all distances by a loop, a row's own support vector (distance exactly 0 in the SVC's input
    space, where the scaler's transform gives the support vectors bit for bit) set aside."""
    distances = np.stack([np.sqrt(np.sum((Z - vector) ** 2, axis=1)) for vector in support], axis=1)
    distances[distances == 0.0] = np.inf
    return distances.min(axis=1)


# Not iris: it repeats rows, and a duplicate of a support vector is at 0 from it without being it.
@pytest.mark.parametrize("fixture", ["cancer_standard", "wine_sigmoid"])
def test_reference_quantiles_are_quantiles_of_the_leave_self_out_distances(fixture, request):
    # The exporter's reference rows are X (no holdout): the stored quantiles are numpy's quantiles
    # (Hyndman and Fan definition 7) of the brute-force leave-self-out distances, none of them 0.
    bundle, model, X = request.getfixturevalue(fixture)
    svc, transform = _parts(model)
    Z = transform(X)
    assert len(np.unique(Z, axis=0)) == len(Z)
    expected = np.quantile(leave_self_out(Z, svc.support_vectors_), LEVELS)
    assert np.allclose(bundle.scorer.reference_quantiles, expected, rtol=1e-12, atol=1e-12)
    assert bundle.scorer.reference_quantiles[0] > 0


def test_a_record_on_a_support_vector_reads_as_the_nearest_there_is(cancer_standard):
    # A training row that is a support vector is at distance 0 from it: percentile 0, the most
    # typical distance, not the share of zero self-distances it read as before.
    bundle, model, X = cancer_standard
    scores = bundle.score(X[model[-1].support_[:5]])
    assert np.all(scores.nearest_distance == 0.0)
    assert np.all(scores.nearest_percentile == 0.0)


def test_far_row_gets_percentile_100(cancer_standard):
    bundle, _, X = cancer_standard
    far = X.max(axis=0) + 50.0 * X.std(axis=0)
    scores = bundle.score(far[np.newaxis, :])
    assert scores.nearest_distance[0] > bundle.scorer.reference_quantiles[-1]
    assert scores.nearest_percentile[0] == 100.0


def test_reference_rows_that_are_not_support_vectors_spread_over_0_to_100(cancer_standard):
    # How it is computed: the reference distances are the leave-self-out distances of all n
    # reference rows (brute force above); a row that is not a support vector is scored at its own
    # distance d, whose share of reference distances below it is rank / (n - 1) (definition 7).
    # Interpolating in 101 stored quantiles is off by at most one step, one percentile point.
    bundle, model, X = cancer_standard
    svc, transform = _parts(model)
    reference = leave_self_out(transform(X), svc.support_vectors_)
    not_support = np.setdiff1d(np.arange(len(X)), svc.support_)
    scores = bundle.score(X[not_support])
    assert np.allclose(scores.nearest_distance, reference[not_support], rtol=1e-12, atol=0)
    rank = np.searchsorted(np.sort(reference), reference[not_support], side="left")
    expected = 100.0 * rank / (len(X) - 1)
    assert np.max(np.abs(scores.nearest_percentile - expected)) <= 1.0 + 1e-9
    counts, _ = np.histogram(scores.nearest_percentile, bins=10, range=(0, 100))
    assert np.all(counts > 0), counts  # every decile of 0-100 is reached, none floored at a zero share


def test_percentile_interpolates_linearly_between_quantiles():
    # With strictly increasing quantiles, the percentile is the inverse of the piecewise-linear
    # quantile function: numpy.interp(d, quantiles, 0..100), clipped to [0, 100].
    rng = np.random.default_rng(11)
    quantiles = np.cumsum(rng.uniform(0.01, 1.0, size=101))
    distance = rng.uniform(quantiles[0] - 1.0, quantiles[-1] + 1.0, size=500)
    expected = np.interp(distance, quantiles, 100.0 * LEVELS)
    assert np.allclose(distance_percentile(distance, quantiles), expected, rtol=0, atol=1e-9)


def test_percentile_below_the_smallest_quantile_is_zero():
    quantiles = np.linspace(1.0, 2.0, 101)
    assert distance_percentile(np.array([0.0, 0.5, 1.0 - 1e-12]), quantiles).tolist() == [0.0, 0.0, 0.0]


# -- range check ------------------------------------------------------------------------------------


def _allowed(bundle):
    low = np.array([feature.allowed[0] for feature in bundle.manifest.features])
    high = np.array([feature.allowed[1] for feature in bundle.manifest.features])
    return low, high


def test_range_excess_is_zero_inside_the_allowed_range(cancer_standard):
    bundle, _, X = cancer_standard
    low, high = _allowed(bundle)
    scores = bundle.score(np.vstack([X.mean(axis=0), low, high]))  # the boundaries are allowed
    assert np.all(scores.range_excess == 0.0)
    assert scores.in_range.tolist() == [True, True, True]


def test_range_excess_above_is_value_minus_high(cancer_standard):
    bundle, _, X = cancer_standard
    low, high = _allowed(bundle)
    row = X.mean(axis=0)
    row[3] = high[3] + 2.5
    scores = bundle.score(row[np.newaxis, :])
    assert scores.range_excess[0, 3] == pytest.approx(2.5, rel=1e-12)
    assert np.count_nonzero(scores.range_excess) == 1
    assert scores.out_of_range[0].tolist() == [index == 3 for index in range(X.shape[1])]
    assert not scores.in_range[0]


def test_range_excess_below_is_value_minus_low_and_negative(cancer_standard):
    bundle, _, X = cancer_standard
    low, _ = _allowed(bundle)
    row = X.mean(axis=0)
    row[0], row[7] = low[0] - 0.75, low[7] - 0.001
    scores = bundle.score(row[np.newaxis, :])
    assert scores.range_excess[0, 0] == pytest.approx(-0.75, rel=1e-12)
    assert scores.range_excess[0, 7] == pytest.approx(-0.001, rel=1e-9)
    assert np.count_nonzero(scores.range_excess) == 2


def test_range_check_agrees_with_the_refusal_policy_at_the_boundaries(cancer_standard):
    # The scorer's range_excess and refusal.check_records must draw the same line:
    # exactly low and high are inside, the next float outward is outside.
    bundle, _, X = cancer_standard
    low, high = _allowed(bundle)
    rows = np.tile(X.mean(axis=0), (4, 1))
    rows[0, 2], rows[1, 2] = low[2], high[2]
    rows[2, 2], rows[3, 2] = np.nextafter(low[2], -np.inf), np.nextafter(high[2], np.inf)
    names = bundle.feature_names
    checked = check_records(bundle.manifest.features, [dict(zip(names, row.tolist())) for row in rows])
    scores = bundle.score(rows)
    assert scores.in_range.tolist() == [True, True, False, False]
    assert checked.accepted.tolist() == [0, 1]
    assert sorted(checked.problems) == [2, 3]
    assert all(problem.reason == "out_of_range" for problems in checked.problems.values() for problem in problems)
