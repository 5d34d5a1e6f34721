"""How export chooses the range margin and the domain thresholds out of sample (model_store.policy_fit).

References: the allowed-range rule itself (``feature_ranges``, checked against scikit-learn-free
numpy in tests/bundle/test_export_refusals.py), recomputed here directly row by row; scikit-learn's
``OneClassSVM``. Datasets shipped with scikit-learn: iris (Fisher 1936, UCI Iris) and digits
(Alpaydin and Kaynak 1998, UCI Optical Recognition of Handwritten Digits).
"""

from __future__ import annotations

import hashlib

import numpy as np
import pytest
from conftest import export_model  # tests/conftest.py
from sklearn.datasets import load_digits, load_iris
from sklearn.model_selection import KFold
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler
from sklearn.svm import SVC, OneClassSVM

from model_store.domain_fit import NU, cross_fitted_scores, fit_one_class, whitening_map
from model_store.policy_fit import RANGE_SHARE, choose, leave_one_out_needs
from model_store.reference_rows import feature_ranges, margin_needed

NAMES = ["a", "b", "c"]
INFO = {"b": {"bounds": [-1.0, 9.0]}, "c": {"allowed": [0.0, 5.0]}}


def _inside(rows: np.ndarray, ranges) -> np.ndarray:
    low = np.array([allowed[0] for allowed, _ in ranges])
    high = np.array([allowed[1] for allowed, _ in ranges])
    return ((rows >= low) & (rows <= high)).all(axis=1)


@pytest.mark.parametrize("margin", [0.0, 0.03, 0.2, 0.7])
def test_a_row_is_inside_the_ranges_exactly_when_it_needs_no_more_than_the_margin(margin):
    # "a" is non-negative in the fitted rows (inferred bound 0), "b" has physical bounds, "c" an allowed range.
    rng = np.random.default_rng(3)
    fitted = np.column_stack([rng.uniform(0.5, 2.0, 40), rng.normal(4.0, 1.0, 40), rng.uniform(1.0, 4.0, 40)])
    rows = np.column_stack([rng.uniform(-0.5, 3.0, 500), rng.normal(4.0, 3.0, 500), rng.uniform(-1.0, 6.0, 500)])
    need = margin_needed(NAMES, fitted, rows, INFO)
    assert ((need <= margin) == _inside(rows, feature_ranges(NAMES, fitted, margin, INFO))).all()


def test_leave_one_out_needs_measure_each_row_against_the_ranges_of_the_other_rows():
    X, _ = load_iris(return_X_y=True)  # ties at the extremes: 4.3 cm and 7.9 cm sepal lengths, ...
    names = ["x0", "x1", "x2", "x3"]
    expected = [margin_needed(names, np.delete(X, row, axis=0), X[row:row + 1], {})[0] for row in range(len(X))]
    assert leave_one_out_needs(names, X, {}).tolist() == expected


def test_the_ranges_take_half_the_budget_and_the_domain_the_rest():
    # 400 rows at refuse rate 0.05: a budget of 20 rows, 10 for the ranges, 10 for the domain.
    rng = np.random.default_rng(5)
    need = np.where(rng.random(400) < 0.3, rng.exponential(0.1, 400), 0.0)
    score = rng.normal(size=400)
    margin, _, outside = choose(need, score, 0.05, None)
    out_of_range = need > margin
    assert out_of_range.sum() == RANGE_SHARE * 20
    assert (~out_of_range & (score < outside)).sum() == 20 - RANGE_SHARE * 20


def test_a_given_margin_is_kept_and_the_domain_gets_what_it_leaves():
    rng = np.random.default_rng(6)
    need = np.where(rng.random(400) < 0.3, rng.exponential(0.1, 400), 0.0)
    score = rng.normal(size=400)
    margin, _, outside = choose(need, score, 0.05, 0.05)
    out_of_range = need > 0.05
    assert margin == 0.05
    assert (~out_of_range & (score < outside)).sum() == max(0, 20 - out_of_range.sum())


def _cross_fitted(loader):
    """(scaled rows, the model fitted on all of them, ten folds, the cross-fitted scores) for a dataset."""
    X, _ = loader(return_X_y=True)
    scaled = StandardScaler().fit_transform(X)
    full = fit_one_class(scaled, seed=0)
    folds = [held for _, held in KFold(10, shuffle=True, random_state=0).split(scaled)]
    return scaled, full, folds, cross_fitted_scores(scaled, folds, full, seed=0)


def test_cross_fitted_scores_are_on_the_scale_of_the_model_fitted_on_all_rows():
    # libsvm's one-class coefficients sum to nu x rows, so a model fitted on 9/10 of the rows scores
    # about 10 % lower everywhere. At the median row, inside the support, in-sample and
    # out-of-sample scores nearly agree (each fold model whitens with the covariance of its own rows,
    # which puts a held-out row a little further out: measured 4 % lower on digits), so what is left
    # is the scale: rescaled, the medians agree within 5 %.
    scaled, full, _, cross_fitted = _cross_fitted(load_digits)
    assert np.median(cross_fitted) == pytest.approx(np.median(full.decision(scaled)), rel=0.05)


def test_a_fold_score_is_its_own_model_s_decision_times_the_ratio_of_coefficient_sums():
    # Recomputed for one fold with scikit-learn directly: a OneClassSVM with the bundle model's
    # gamma and nu on the other folds' rows, whitened by their own Ledoit-Wolf map (the bundle
    # model's feature deviations), its decision on the fold's rows, times sum(alpha_full) /
    # sum(alpha_fold).
    scaled, full, folds, cross_fitted = _cross_fitted(load_iris)
    held = folds[3]
    others = np.setdiff1d(np.arange(len(scaled)), held)
    whitening, _ = whitening_map(scaled[others], full.deviation)
    fold_model = OneClassSVM(kernel="rbf", gamma=full.gamma, nu=NU).fit(scaled[others] @ whitening)
    ratio = full.estimator.dual_coef_.sum() / fold_model.dual_coef_.sum()
    expected = fold_model.decision_function(scaled[held] @ whitening) * ratio
    assert np.allclose(cross_fitted[held], expected, rtol=1e-9, atol=1e-12)
    assert ratio == pytest.approx(len(scaled) / len(others), rel=0.05)  # libsvm: sum(alpha) = nu x rows


def test_the_manifest_records_the_seeded_choice_and_the_same_rows_give_the_same_policy(tmp_path):
    X, y = load_iris(return_X_y=True)
    model = make_pipeline(StandardScaler(), SVC()).fit(X, y)
    first, second = (export_model(model, X, tmp_path / name, y=y, margin=None) for name in ("a", "b"))
    sample = first.manifest.refusal_report.out_of_sample
    assert sample.seed == int(hashlib.sha256(X.tobytes()).hexdigest()[:8], 16)  # the reference's SHA-256
    assert sample.margin_source == "chosen" and sample.rows == len(X)
    assert second.manifest.refusal_report.out_of_sample == sample
    assert second.manifest.domain.thresholds == first.manifest.domain.thresholds


def test_the_bundle_ranges_are_widened_by_the_chosen_margin(tmp_path):
    X, y = load_iris(return_X_y=True)
    model = make_pipeline(StandardScaler(), SVC()).fit(X, y)
    bundle = export_model(model, X, tmp_path / "b", y=y, margin=None)
    margin = bundle.manifest.refusal_report.out_of_sample.margin
    names = bundle.feature_names
    expected = [allowed for allowed, _ in feature_ranges(names, X, margin, {})]
    assert [list(feature.allowed) for feature in bundle.manifest.features] == expected


def test_the_outside_threshold_never_falls_below_the_floor():
    # 400 rows, a 1 % budget of which the ranges take none (need 0): 4 rows' worth for the domain,
    # so the budget's threshold lies between the 4th and 5th lowest scores; a floor above them wins.
    score = np.arange(400, dtype=float)
    need = np.zeros(400)
    _, _, by_budget = choose(need, score, 0.01, 0.0)
    _, unusual, floored = choose(need, score, 0.01, 0.0, floor=10.0)
    assert by_budget == pytest.approx(3.5)
    assert floored == 10.0 and unusual >= floored
