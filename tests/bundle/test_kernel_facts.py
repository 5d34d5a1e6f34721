"""Facts about the RBF kernel K(x, s) = exp(-gamma |x - s|^2) that the scorer must obey.

Sources: the Gaussian RBF kernel and gamma = 1 / (2 sigma^2) as in B. Schoelkopf and
A. J. Smola, Learning with Kernels, MIT Press, 2002; scikit-learn's SVC documentation for
how gamma='scale' is resolved. K(x, x) = 1, a vanishing kernel far from the data and a
wider bump for a larger sigma follow from that formula; they are marked "common practice"
where they describe how the decision behaves.
"""

from __future__ import annotations

import numpy as np
import pytest

from model_store.scoring import Scorer


def single_support_scorer(sigma: float, *, support=(0.0, 0.0), coef: float = 1.0, intercept: float = 0.0) -> Scorer:
    """A binary scorer with one support vector, so that decision(x) = coef * K(x, s) + intercept."""
    gamma = 1.0 / (2.0 * sigma**2)  # Schoelkopf and Smola 2002
    return Scorer(
        classes=[0, 1],
        center=np.zeros(2),
        scale=np.ones(2),
        gamma=gamma,
        support_vectors=np.array([support]),
        support_per_class=[1, 0],
        dual_coef=np.array([[coef]]),
        intercepts=np.array([intercept]),
        allowed_low=np.full(2, -1e6),
        allowed_high=np.full(2, 1e6),
        reference_quantiles=np.linspace(0.0, 1.0, 101),
        calibrator=None,
    )


def test_kernel_of_a_support_vector_with_itself_is_one():
    # K(s, s) = exp(0) = 1 (Schoelkopf and Smola 2002): decision = coef * 1 + intercept.
    scorer = single_support_scorer(0.7, support=(1.5, -2.25), coef=0.375, intercept=-0.125)
    scores = scorer.score(np.array([[1.5, -2.25]]))
    assert scores.nearest_distance[0] == 0.0
    assert scores.nearest_similarity[0] == 1.0
    assert scores.decision[0] == 0.375 * 1.0 - 0.125


def test_every_support_vector_is_at_distance_zero_from_itself(iris_raw):
    # No scaler: the raw rows are the support vectors, so each is its own nearest one,
    # at distance exactly 0 and similarity exp(0) = 1 (common practice).
    bundle, model, _ = iris_raw
    support = model.support_vectors_
    scores = bundle.score(support)
    assert np.all(scores.nearest_distance == 0.0)
    assert np.all(scores.nearest_similarity == 1.0)
    # iris has duplicate rows, so compare the vector found rather than its index.
    assert np.array_equal(bundle.support_vectors[scores.nearest_index], support)


def test_scaled_support_vectors_are_at_distance_zero_up_to_rounding(cancer_standard):
    # Through StandardScaler the raw training row maps back onto its support vector;
    # (x - mean) / scale is what scikit-learn's transform computes, so the distance is 0.
    bundle, model, X = cancer_standard
    scores = bundle.score(X[model[-1].support_])
    assert np.max(scores.nearest_distance) <= 1e-12
    assert np.min(scores.nearest_similarity) >= 1.0 - 1e-15


def test_far_from_every_support_vector_binary_decision_is_the_intercept(cancer_standard):
    # Common practice: K -> 0 far away, so sum(coef * K) + b -> b = scikit-learn's intercept_[0].
    bundle, model, X = cancer_standard
    far = X.max(axis=0) + 1000.0 * X.std(axis=0)
    scores = bundle.score(far[np.newaxis, :])
    assert scores.nearest_similarity[0] == 0.0  # exp underflows to exactly 0
    assert scores.decision[0] == model[-1].intercept_[0]
    assert model.decision_function(far[np.newaxis, :])[0] == pytest.approx(model[-1].intercept_[0], abs=1e-12)


def test_far_from_every_support_vector_pairwise_decisions_are_the_intercepts(iris_raw):
    # Common practice, multiclass: each one-vs-one decision tends to its own intercept_ (libsvm -rho).
    bundle, model, X = iris_raw
    far = X.min(axis=0) - 1000.0
    scores = bundle.score(far[np.newaxis, :])
    assert np.array_equal(scores.pairwise_decision[0], model.intercept_)


def test_decision_approaches_the_intercept_as_the_row_moves_away(cancer_standard):
    # Common practice: |decision - b| shrinks to 0 along a ray leaving the data.
    bundle, model, X = cancer_standard
    direction = X.std(axis=0)
    start = X.mean(axis=0)
    intercept = model[-1].intercept_[0]
    rows = np.array([start + t * direction for t in (2, 3, 5, 7, 10)])
    gaps = [abs(bundle.score(row[np.newaxis, :]).decision[0] - intercept) for row in rows]
    assert gaps[0] > gaps[1] > gaps[2] > gaps[3] > gaps[4] == 0.0


def test_larger_sigma_widens_the_bump():
    # Common practice: at a fixed distance r from a support vector the similarity
    # exp(-r^2 / (2 sigma^2)) grows with sigma (Gaussian form, Schoelkopf and Smola 2002).
    row = np.array([[0.6, 0.8]])  # distance 1 from the origin
    sigmas = [0.25, 0.5, 1.0, 2.0, 4.0]
    similarity = [single_support_scorer(sigma).score(row).nearest_similarity[0] for sigma in sigmas]
    assert all(a < b for a, b in zip(similarity, similarity[1:]))
    expected = [np.exp(-1.0 / (2.0 * sigma**2)) for sigma in sigmas]
    assert similarity == pytest.approx(expected, rel=1e-14)


def test_bump_half_width_is_proportional_to_sigma():
    # Half of the peak is reached at r = sigma * sqrt(2 ln 2) (solve exp(-r^2 / (2 sigma^2)) = 1/2).
    for sigma in (0.5, 1.0, 3.0):
        r = sigma * np.sqrt(2.0 * np.log(2.0))
        decision = single_support_scorer(sigma).score(np.array([[r, 0.0]])).decision[0]
        assert decision == pytest.approx(0.5, rel=1e-14)


@pytest.mark.parametrize("fixture", ["iris_raw", "cancer_standard", "wine_sigmoid"])
def test_manifest_gamma_is_one_over_two_sigma_squared(fixture, request):
    # gamma = 1 / (2 sigma^2): Schoelkopf and Smola, Learning with Kernels, MIT Press, 2002.
    bundle, _, _ = request.getfixturevalue(fixture)
    kernel = bundle.manifest.kernel
    assert kernel.gamma == pytest.approx(1.0 / (2.0 * kernel.sigma**2), rel=1e-14)


def test_explicit_gamma_gives_the_matching_sigma(iris_raw):
    # gamma = 0.5 was given to SVC; 1 / (2 sigma^2) = 0.5 means sigma = 1 (Schoelkopf and Smola 2002).
    bundle, _, _ = iris_raw
    assert bundle.manifest.kernel.gamma == 0.5
    assert bundle.manifest.kernel.sigma == 1.0


def test_scale_gamma_is_resolved_to_the_fitted_number(cancer_standard):
    # scikit-learn SVC documentation: gamma='scale' means 1 / (n_features * X.var()) of the SVC's input.
    bundle, model, X = cancer_standard
    Z = model[0].transform(X)
    assert bundle.manifest.kernel.gamma == pytest.approx(1.0 / (Z.shape[1] * Z.var()), rel=1e-12)


def test_a_row_so_far_away_that_its_squared_norm_overflows_gets_the_intercept_not_nan():
    """libsvm sums (x - s)^2 directly and gets exp(-inf) = 0, so scikit-learn answers with the
    intercept; the expanded |z|^2 + |s|^2 - 2 z.s form must not turn that into inf - inf = NaN."""
    import tempfile
    from pathlib import Path

    from sklearn.datasets import load_iris
    from sklearn.svm import SVC

    from conftest import export_model

    X, y = load_iris(return_X_y=True)
    model = SVC(gamma=5.0).fit(X, y)
    bundle = export_model(model, X, Path(tempfile.mkdtemp()) / "b")
    row = X[:1].copy()
    row[0, 0] = 1e307
    scores = bundle.score(row)
    expected = model.decision_function(row)  # scikit-learn reference
    np.testing.assert_allclose(scores.decision, expected, rtol=1e-9, atol=1e-9)
    assert scores.labels[0] == model.predict(row)[0]
    assert scores.nearest_similarity[0] == 0.0 and scores.nearest_percentile[0] == 100.0
