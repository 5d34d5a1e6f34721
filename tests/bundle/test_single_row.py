"""A single row is scored with one matrix-vector product (gemv) instead of a matrix product (gemm).

gemv sums each exponent -gamma |z - s|^2 in another order than gemm, so the two can differ in the
last bits. The nearest support vector must still be the one a batch picks (README, Exactness: nearest
support vectors are identical for any batch size), so the kernel trusts gemv's largest exponent only
when it leads every other by more than the rounding bound of the sums, and otherwise scores the row
the batch way. The rows here sit at midpoints between pairs of support vectors, the near ties where
the two orders could disagree.
"""

from __future__ import annotations

import copy
from pathlib import Path

import numpy as np
import pytest
from conftest import export_model  # tests/conftest.py: the shared export helper
from sklearn.calibration import CalibratedClassifierCV
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import MinMaxScaler, StandardScaler
from sklearn.svm import SVC, NuSVC

from model_store import load_bundle
from model_store.kernel import KernelExpansion

from .reference import assert_close, dataset, probe_rows, sklearn_decisions

BATCH_TOLERANCE = 1e-12  # as in test_batch_sizes
EXACT = ("labels", "label_index", "nearest_index", "nearest_label", "nearest_distance", "nearest_similarity",
         "nearest_percentile", "range_excess", "domain_verdict")


def _midpoint_rows(bundle, count: int, seed: int) -> np.ndarray:
    """``count`` rows in raw units, each halfway between two support vectors (scaled space)."""
    scorer = bundle.scorer
    support = scorer.support_vectors
    rng = np.random.default_rng(seed)
    first, second = rng.integers(0, len(support), size=(2, count))
    scaled = (support[first] + support[second]) / 2.0
    return scaled * scorer.scale + scorer.center


def _assert_singles_match_the_batch(bundle, rows: np.ndarray) -> None:
    """Each row scored alone gives the batch's exact fields bit for bit, and its numbers within
    the batch tolerance (README, Exactness)."""
    whole = bundle.score(rows)
    singles = [bundle.score(rows[index:index + 1]) for index in range(len(rows))]
    for field in EXACT:
        want = getattr(whole, field)
        if want is not None:
            got = np.concatenate([getattr(one, field) for one in singles])
            assert np.array_equal(got, want), field
    for field in ("decision", "pairwise_decision", "probabilities", "domain_score"):
        want = getattr(whole, field)
        if want is None:
            assert all(getattr(one, field) is None for one in singles), field
        else:
            assert_close(np.concatenate([getattr(one, field) for one in singles]), want, field,
                         tolerance=BATCH_TOLERANCE)


@pytest.mark.parametrize("fixture", ["cancer_standard", "wine_sigmoid"])
def test_one_row_at_a_time_gives_the_batch_results_at_near_ties(fixture, request):
    bundle, _, _ = request.getfixturevalue(fixture)
    _assert_singles_match_the_batch(bundle, _midpoint_rows(bundle, 2_000, seed=11))


# Every branch of the one-row path: labels by vote, by break_ties and by calibration (sigmoid,
# isotonic, one-vs-one columns), string labels, NuSVC, a MinMaxScaler, a bundle without a domain
# model and one whose domain model works in the scaled space (exported at 93ad4f6).
_MODELS = {
    "iris, string labels, break_ties": ("iris", lambda: make_pipeline(
        StandardScaler(), SVC(C=1.0, break_ties=True)), True),
    "iris, string labels, sigmoid": ("iris", lambda: CalibratedClassifierCV(
        make_pipeline(StandardScaler(), SVC(C=1.0)), method="sigmoid", ensemble=False), True),
    "cancer, isotonic": ("cancer", lambda: CalibratedClassifierCV(
        make_pipeline(StandardScaler(), SVC(C=1.0)), method="isotonic", ensemble=False), False),
    "wine, NuSVC, MinMaxScaler": ("wine", lambda: make_pipeline(MinMaxScaler(), NuSVC(nu=0.3)), False),
    "digits, one-vs-one columns calibrated": ("digits", lambda: CalibratedClassifierCV(
        make_pipeline(StandardScaler(), SVC(C=1.0, decision_function_shape="ovo")), method="sigmoid",
        ensemble=False), False),
}


@pytest.fixture(scope="module", params=sorted(_MODELS))
def model_kind(request, tmp_path_factory):
    data, build, string_labels = _MODELS[request.param]
    X, y = dataset(data)
    if string_labels:
        y = np.array(["setosa", "versicolor", "virginica"])[y]
    bundle = export_model(build().fit(X, y), X, tmp_path_factory.mktemp("one-row") / "bundle", y=y,
                          name="one-row", version="1")
    return bundle, X


def _rows_of_every_kind(bundle, X: np.ndarray) -> np.ndarray:
    """Near ties, support vectors themselves, reference rows, jittered and out-of-range rows."""
    scorer = bundle.scorer
    on_support = scorer.support_vectors[:40] * scorer.scale + scorer.center
    return np.vstack([_midpoint_rows(bundle, 300, seed=5), on_support, probe_rows(X, seed=3)[::3]])


def test_one_row_at_a_time_gives_the_batch_results_for_every_kind_of_model(model_kind):
    bundle, X = model_kind
    _assert_singles_match_the_batch(bundle, _rows_of_every_kind(bundle, X))


def test_one_row_at_a_time_gives_the_batch_results_without_a_domain_model(model_kind):
    bundle, X = model_kind
    plain = copy.copy(bundle)
    plain._scorer = copy.copy(bundle.scorer)
    plain._scorer.domain = None
    _assert_singles_match_the_batch(plain, _rows_of_every_kind(plain, X))


def test_one_row_at_a_time_gives_the_batch_results_with_a_scaled_space_domain_model():
    bundle = load_bundle(Path(__file__).parent / "data" / "format2-scaled-iris")
    assert bundle.manifest.domain.space == "scaled"
    X, _ = dataset("iris")
    _assert_singles_match_the_batch(bundle, _rows_of_every_kind(bundle, X))


def test_one_row_whose_rounding_bound_overflows_is_scored_as_in_a_batch():
    # |z| + max |s| past sqrt(max float) = 1.34078e154: the bound's square overflows a Python float, which then
    # raises instead of giving inf (found in review); the row must go the batch way instead.
    kernel = KernelExpansion(np.array([[1e150, 0.0, 0.0], [0.0, 1e150, 0.0]]), np.array([[1.0], [-1.0]]), 1e-300)
    row = np.array([1.3407e154, 0.0, 0.0])  # |z|^2 still finite; (|z| + 1e150)^2 is not (sqrt(max) = 1.34078e154)
    sums, index = kernel.evaluate_row(row, float(row @ row))
    batch_sums, batch_index = kernel.evaluate(np.stack([row, row]), np.array([row @ row, row @ row]))
    assert index == batch_index[0]
    assert sums[0] == batch_sums[0, 0]


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


@pytest.mark.parametrize("n_classes", [3, 4, 10])
def test_one_row_vote_and_ovr_decision_are_the_batch_functions_bit_for_bit(n_classes):
    # The batch functions follow scikit-learn's _ovr_decision_function and libsvm's vote
    # (tests/bundle/test_sklearn_matrix.py); the one-row versions must give the same bits,
    # ties (zeros, equal votes) and NaN included.
    from model_store.one_vs_one import libsvm_vote, libsvm_vote_one, ovr_decision, ovr_decision_one

    pairs = [(i, j) for i in range(n_classes) for j in range(i + 1, n_classes)]
    rng = np.random.default_rng(n_classes)
    rows = rng.normal(size=(400, len(pairs)))
    rows[::4] = np.round(rows[::4])  # exact zeros: decisions on the boundary
    rows[1::4] = np.where(rng.random((100, len(pairs))) < 0.5, 1.0, -1.0)  # many equal votes
    rows[2, 0] = np.nan
    decisions = ovr_decision(rows, pairs, n_classes)
    votes = libsvm_vote(rows, pairs, n_classes)
    for row, decision, vote in zip(rows, decisions, votes):
        assert np.array_equal(ovr_decision_one(row.tolist(), pairs, n_classes), decision, equal_nan=True)
        assert libsvm_vote_one(row.tolist(), pairs, n_classes) == vote
