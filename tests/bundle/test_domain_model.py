"""The domain model in the bundle against scikit-learn's OneClassSVM, its verdicts, ranges and old bundles.

Reference: scikit-learn's ``OneClassSVM`` (Schölkopf et al., "Estimating the support of a
high-dimensional distribution", Neural Computation 13(7), 2001), refitted here independently of
rbfgate on the pipeline scaler's ``transform`` of the reference rows, whitened by the inverse square
root of scikit-learn's ``LedoitWolf`` covariance of those rows (Ledoit and Wolf 2004, taken with
scipy's ``fractional_matrix_power``, not rbfgate's eigendecomposition), with the gamma and nu the
manifest records; its ``decision_function`` is the reference score. Datasets shipped with
scikit-learn: iris (Fisher 1936), wine (Forina et al. 1988), breast cancer (Street, Wolberg and
Mangasarian 1993) and digits (Alpaydin and Kaynak 1998), all on the UCI repository.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from conftest import export_model  # tests/conftest.py
from scipy.linalg import fractional_matrix_power
from sklearn.covariance import LedoitWolf
from sklearn.model_selection import train_test_split
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler
from sklearn.svm import SVC, OneClassSVM

from model_store import load_bundle
from model_store.domain import DomainModel
from model_store.domain_fit import EIGENVALUE_FLOOR, feature_deviation, fit_one_class, whitening_map
from model_store.refusal import check_records

from .reference import assert_close, dataset, probe_rows

FORMAT_1_BUNDLE = Path(__file__).parent / "data" / "format1-iris"
SCALED_SPACE_BUNDLE = Path(__file__).parent / "data" / "format2-scaled-iris"


def _exported(name: str, tmp_path: Path, *, with_holdout: bool = True):
    X, y = dataset(name)
    reference, holdout, labels, holdout_labels = train_test_split(X, y, test_size=0.3, stratify=y, random_state=0)
    model = make_pipeline(StandardScaler(), SVC(C=1.0)).fit(reference, labels)
    bundle = export_model(model, reference, tmp_path / name, y=labels,
                          holdout=holdout if with_holdout else None,
                          holdout_y=holdout_labels if with_holdout else None)
    return bundle, model, reference, holdout


def _reference_whitening(scaled: np.ndarray) -> np.ndarray:
    """W = D^-1 R^(-1/2): D the rows' deviations (1 if constant), R scikit-learn's LedoitWolf of rows / D."""
    deviation = scaled.std(axis=0)
    deviation[deviation == 0] = 1.0
    root = np.real(fractional_matrix_power(LedoitWolf().fit(scaled / deviation).covariance_, -0.5))
    return np.diag(1.0 / deviation) @ root


@pytest.mark.parametrize("name", ["iris", "wine", "cancer", "digits"])
def test_domain_score_is_scikit_learns_one_class_decision(name, tmp_path):
    bundle, model, reference, holdout = _exported(name, tmp_path)
    spec = bundle.manifest.domain
    scaler = model[0]
    scaled = scaler.transform(reference)
    whitening = _reference_whitening(scaled)
    reference_model = OneClassSVM(kernel="rbf", gamma=spec.gamma, nu=spec.nu).fit(scaled @ whitening)
    rows = probe_rows(np.vstack([reference, holdout]), seed=4)
    ours = bundle.score(rows).domain_score
    # |ours - scikit-learn| <= 1e-9 x max(1, |scikit-learn|): relative, absolute near 0.
    assert_close(ours, reference_model.decision_function(scaler.transform(rows) @ whitening),
                 f"{name} one-class decision")
    assert spec.space == "whitened" and spec.support_vectors == len(reference_model.support_vectors_)


def test_the_whitening_turns_the_shrunk_covariance_into_the_identity(tmp_path):
    # W^T (D R D) W = I for W = D^-1 R^(-1/2), R symmetric positive definite: the whitened rows
    # have the shrunk covariance's inverse as metric, every direction of it counting alike.
    bundle, model, reference, _ = _exported("wine", tmp_path)
    scaled = model[0].transform(reference)
    deviation = scaled.std(axis=0)
    estimate = LedoitWolf().fit(scaled / deviation)
    covariance = deviation[:, None] * estimate.covariance_ * deviation[None, :]
    whitening = np.load(Path(bundle.source) / "domain_whitening.npy", allow_pickle=False)
    assert_close(whitening.T @ covariance @ whitening, np.eye(len(covariance)), "W^T C W", tolerance=1e-9)
    assert bundle.manifest.domain.whitening.shrinkage == pytest.approx(estimate.shrinkage_)


def test_the_whitening_does_not_depend_on_the_features_units(tmp_path):
    # No scaler: features in units 1,000 and 0.001 apart. Dividing by each feature's deviation
    # before the Ledoit-Wolf fit (whose target is a multiple of the identity) makes a move by 8
    # standard deviations count the same in either feature; without it the small feature drowned.
    rng = np.random.default_rng(3)
    latent = rng.normal(size=(300, 3))
    X = latent * np.array([1e3, 1.0, 1e-3])
    y = (latent[:, 0] + latent[:, 2] > 0).astype(int)
    bundle = export_model(SVC(gamma=1e-6).fit(X, y), X, tmp_path / "units", y=y, margin=None)
    assert bundle.manifest.scaler.kind == "none"
    centre = X.mean(axis=0)
    moved = np.array([centre + 8.0 * X.std(axis=0)[feature] * np.eye(3)[feature] for feature in range(3)])
    assert bundle.score(moved).domain_verdict.tolist() == ["outside", "outside", "outside"]
    assert bundle.score(centre[None, :]).domain_verdict.tolist() == ["typical"]


def test_gamma_is_the_median_heuristic_on_the_whitened_reference_rows(tmp_path):
    # gamma = 1 / (2 sigma^2), sigma^2 the median squared distance between two distinct reference
    # rows (common practice: Gretton et al. 2012, "A kernel two-sample test", JMLR 13), recomputed
    # here with numpy over every pair. Iris repeats some rows: their distance 0 is left out.
    bundle, model, reference, _ = _exported("iris", tmp_path)
    scaled = model[0].transform(reference)
    whitened = scaled @ _reference_whitening(scaled)
    squared = ((whitened[:, None, :] - whitened[None, :, :]) ** 2).sum(axis=2)
    pairs = squared[np.triu_indices(len(whitened), k=1)]
    assert bundle.manifest.domain.gamma == pytest.approx(1.0 / (2.0 * np.median(pairs[pairs > 0])), rel=1e-9)


def test_mostly_repeated_rows_still_get_a_kernel_width_from_the_distinct_ones():
    # 90 copies of one row and 10 others: most pairwise distances are 0, whose median would give
    # no width at all; the median over distinct pairs does.
    rng = np.random.default_rng(4)
    rows = np.vstack([np.repeat(rng.normal(size=(1, 3)), 90, axis=0), rng.normal(size=(10, 3))])
    fit = fit_one_class(rows, seed=0)
    whitened = rows @ fit.whitening
    squared = ((whitened[:, None, :] - whitened[None, :, :]) ** 2).sum(axis=2)[np.triu_indices(100, k=1)]
    assert fit.gamma == pytest.approx(1.0 / (2.0 * np.median(squared[squared > 1e-20])), rel=1e-9)


@pytest.mark.parametrize("rows", [1, 2])
def test_fewer_than_three_rows_are_not_whitened(rows):
    # Ledoit-Wolf's shrinkage is 0 for two rows, and a covariance of rank 1 has nothing to invert.
    points = np.random.default_rng(rows).normal(size=(rows, 4))
    whitening, shrinkage = whitening_map(points, feature_deviation(points))
    assert np.array_equal(whitening, np.eye(4)) and shrinkage is None


def test_no_direction_is_magnified_more_than_the_eigenvalue_floor_allows():
    # A fourth feature that is the sum of the other three: the sample covariance is singular, and
    # with 20,000 rows Ledoit-Wolf shrinks so little (about 5.5e-4) that its smallest eigenvalue is
    # under EIGENVALUE_FLOOR x the mean. W's largest singular value (in units of D) is then held at
    # 1 / sqrt(EIGENVALUE_FLOOR x mean eigenvalue of R), not 1 / sqrt(the smallest eigenvalue).
    first = np.random.default_rng(9).normal(size=(20_000, 3))
    points = np.column_stack([first, first.sum(axis=1)])
    deviation = feature_deviation(points)
    eigenvalues = np.linalg.eigvalsh(LedoitWolf().fit(points / deviation).covariance_)
    bound = (EIGENVALUE_FLOOR * float(eigenvalues.mean())) ** -0.5
    assert eigenvalues.min() ** -0.5 > bound  # the floor has something to do here
    whitening, _ = whitening_map(points, deviation)
    assert np.linalg.norm(whitening * deviation[:, None], 2) == pytest.approx(bound, rel=1e-9)


def test_single_rows_score_the_same_domain_as_batches(tmp_path):
    bundle, _, _, holdout = _exported("wine", tmp_path)
    whole = bundle.score(holdout)
    singles = np.concatenate([bundle.score(row[None, :]).domain_score for row in holdout])
    assert_close(singles, whole.domain_score, "one row at a time vs one batch", tolerance=1e-12)


def test_verdicts_follow_the_manifest_thresholds(tmp_path):
    bundle, _, reference, holdout = _exported("cancer", tmp_path)
    thresholds = bundle.manifest.domain.thresholds
    far = reference.mean(axis=0) + 6.0 * reference.std(axis=0)
    scores = bundle.score(np.vstack([holdout, far]))
    expected = np.where(scores.domain_score < thresholds.outside_below, "outside",
                        np.where(scores.domain_score < thresholds.unusual_below, "unusual", "typical"))
    assert scores.domain_verdict.tolist() == expected.tolist()
    assert set(expected[:-1]) >= {"typical", "unusual"}


def test_a_row_far_beyond_every_reference_row_is_outside(tmp_path):
    # 20 standard deviations up on every breast-cancer feature: along the direction the reference
    # rows vary most, which whitening shrinks, and still every kernel vanishes. (At 3 and 6
    # standard deviations such a row is only unusual; the ranges refuse it from about 6 on.)
    bundle, _, reference, _ = _exported("cancer", tmp_path)
    far = reference.mean(axis=0) + 20.0 * reference.std(axis=0)
    assert bundle.score(far[None, :]).domain_verdict.tolist() == ["outside"]


def test_a_row_without_kernel_mass_is_outside_even_with_no_refusal_budget(tmp_path):
    # --refuse-rate 0 puts the budget's threshold below every real row's score, and a row far from
    # every reference row scores the intercept (all its kernels underflow to 0): the no-mass floor
    # (model_store.policy_fit.NO_MASS of the coefficients' sum above the intercept) still refuses it.
    X, y = dataset("cancer")
    model = make_pipeline(StandardScaler(), SVC()).fit(X, y)
    bundle = export_model(model, X, tmp_path / "cancer", y=y, margin=None, refuse_rate=0.0)
    far = X.mean(axis=0) + 50.0 * X.std(axis=0)
    scores = bundle.score(far[None, :])
    assert scores.domain_score[0] == pytest.approx(bundle.manifest.domain.intercept, abs=1e-12)
    assert scores.domain_verdict.tolist() == ["outside"]


def test_thresholds_are_chosen_on_the_reference_and_holdout_rows_together(tmp_path):
    bundle, _, reference, holdout = _exported("cancer", tmp_path)
    calibration = bundle.manifest.domain.calibration
    assert calibration.source == "cross-fitting" and calibration.rows == len(reference) + len(holdout)
    assert bundle.manifest.refusal_report.out_of_sample.rows == len(reference) + len(holdout)


def test_without_a_holdout_the_thresholds_come_from_the_reference_rows_alone(tmp_path):
    bundle, _, reference, _ = _exported("wine", tmp_path, with_holdout=False)
    calibration = bundle.manifest.domain.calibration
    assert calibration.source == "cross-fitting" and calibration.rows == len(reference)
    assert bundle.manifest.refusal_report.holdout is None


def test_refusal_report_counts_each_rule_on_the_holdout(tmp_path):
    bundle, _, _, holdout = _exported("cancer", tmp_path)
    report = bundle.manifest.refusal_report.holdout
    scores = bundle.score(holdout)
    outside = scores.in_range & (scores.domain_verdict == "outside")
    assert report.rows == len(holdout)
    assert report.refused_range == pytest.approx(np.mean(~scores.in_range))
    assert report.refused_domain == pytest.approx(np.mean(outside))
    assert report.flagged_unusual == pytest.approx(np.mean(scores.in_range & (scores.domain_verdict == "unusual")))
    assert report.refused_total == pytest.approx(np.mean(~scores.in_range | outside))


def test_holdout_metrics_are_computed_on_the_holdout(tmp_path):
    bundle, model, _, holdout = _exported("wine", tmp_path)
    _, truth_split = train_test_split(*dataset("wine"), test_size=0.3, stratify=dataset("wine")[1], random_state=0)[2:]
    metrics = bundle.manifest.training["holdout_metrics"]
    assert metrics["rows"] == len(holdout)
    assert metrics["accuracy"] == pytest.approx(np.mean(model.predict(holdout) == truth_split))


def test_ranges_cover_the_holdout_rows_too(tmp_path):
    bundle, _, _, holdout = _exported("cancer", tmp_path)
    assert bundle.score(holdout).in_range.all()


def test_a_non_negative_feature_refuses_a_negative_value_as_out_of_range(tmp_path):
    # Every breast-cancer feature is >= 0; "mean concavity" reaches 0 itself, so the 5 % margin
    # would put its lower bound below 0: it is inferred non-negative and -0.01 is refused.
    bundle, _, reference, _ = _exported("cancer", tmp_path)
    index = 6  # mean concavity
    feature = bundle.manifest.features[index]
    assert reference[:, index].min() == 0.0
    assert feature.allowed[0] == 0.0 and feature.non_negative
    record = dict(zip(bundle.feature_names, reference[0].tolist()))
    record[feature.name] = -0.01
    problems = check_records(bundle.manifest.features, [record]).problems[0]
    assert [(problem.feature, problem.reason) for problem in problems] == [(feature.name, "out_of_range")]


def test_a_format_1_bundle_still_loads_scores_and_has_no_domain():
    bundle = load_bundle(FORMAT_1_BUNDLE)
    assert bundle.manifest.format == "rbfgate-bundle/1" and bundle.manifest.domain is None
    bundle.self_test()
    scores = bundle.score(np.asarray(bundle.manifest.golden.inputs))
    assert scores.domain_score is None and scores.domain_verdict is None
    assert scores.labels.tolist() == bundle.manifest.golden.labels


def test_a_scaled_space_domain_model_of_format_2_still_loads_and_scores_as_exported():
    # Recomputed with numpy from the bundle's own arrays: sum_j alpha_j exp(-gamma |z - s_j|^2) +
    # intercept on the scaled row z itself (no whitening), scikit-learn's one-class decision.
    bundle = load_bundle(SCALED_SPACE_BUNDLE)
    spec = bundle.manifest.domain
    assert spec.space == "scaled" and spec.whitening is None
    bundle.self_test()
    inputs = np.asarray(bundle.manifest.golden.inputs)
    scaled = (inputs - np.asarray(bundle.manifest.scaler.center)) / np.asarray(bundle.manifest.scaler.scale)
    support = np.load(SCALED_SPACE_BUNDLE / "domain_support_vectors.npy", allow_pickle=False)
    alpha = np.load(SCALED_SPACE_BUNDLE / "domain_alpha.npy", allow_pickle=False)
    squared = ((scaled[:, None, :] - support[None, :, :]) ** 2).sum(axis=2)
    expected = np.exp(-spec.gamma * squared) @ alpha + spec.intercept
    assert_close(bundle.score(inputs).domain_score, expected, "scaled-space one-class decision")


def _whitened_model(features: int = 3) -> "DomainModel":
    rng = np.random.default_rng(5)
    mixing = rng.normal(size=(features, features))
    return DomainModel(support_vectors=rng.normal(size=(6, features)), alpha=np.full(6, 0.5), intercept=-1.25,
                       gamma=0.3, unusual_below=-0.5, outside_below=-1.0, whitening=mixing @ mixing.T + np.eye(features))


def test_a_row_whose_whitened_norm_overflows_scores_the_intercept_without_a_warning():
    # |z W|^2 overflows float64 (1e200 squared): the row is infinitely far from every support
    # vector, so every kernel is 0 and the decision is the intercept (libsvm's answer for such a row).
    # The 1e153 row has a finite |z|^2 (3e306) but |z|^2 |W|_F^2 beyond the guard's 1e300.
    model = _whitened_model()
    rows = np.array([[1e200, -1e200, 1e200], [0.1, 0.2, -0.3], [1e153, 1e153, -1e153]])
    squared = np.einsum("ij,ij->i", rows, rows)
    with np.errstate(over="raise", invalid="raise", divide="raise"):  # exp's underflow to 0 is the answer
        score = model.decision(rows, squared)
        single = model.decision(rows[:1], squared[:1])
        guarded = model.decision(rows[2:], squared[2:])
    assert np.isfinite(squared[2])
    assert score[0] == -1.25 and single[0] == -1.25 and score[2] == -1.25 and guarded[0] == -1.25
    assert model.verdicts(score).tolist()[0] == "outside" and np.isfinite(score[1])


def test_one_score_gets_the_verdict_a_batch_gives_it_at_and_around_each_threshold():
    model = _whitened_model()
    scores = np.array([-2.0, -1.0, np.nextafter(-1.0, -2.0), -0.75, -0.5, np.nextafter(-0.5, -1.0), 3.0])
    batch = model.verdicts(scores).tolist()
    assert batch == ["outside", "unusual", "outside", "unusual", "typical", "unusual", "typical"]
    assert [model.verdicts(scores[index:index + 1]).tolist()[0] for index in range(len(scores))] == batch


def test_whitened_single_rows_score_what_the_batch_scores():
    model = _whitened_model(5)
    rows = np.random.default_rng(8).normal(size=(40, 5))
    squared = np.einsum("ij,ij->i", rows, rows)
    singles = np.concatenate([model.decision(rows[index:index + 1], squared[index:index + 1]) for index in range(40)])
    assert_close(singles, model.decision(rows, squared), "one row at a time vs one batch", tolerance=1e-12)


def test_a_scaled_space_bundle_is_inspected_described_and_compared_with_a_whitened_one(tmp_path):
    # The version before and after the whitening, side by side: inspect says which space, the record
    # schema's annotation too, and the contract comparison lists the change of space.
    from sklearn.datasets import load_iris

    from model_store.inspection import describe, render_description
    from model_store.store.contract_domain import compare_domain
    from service.schema import record_schema

    old = load_bundle(SCALED_SPACE_BUNDLE)
    X, y = load_iris(return_X_y=True)
    model = make_pipeline(StandardScaler(), SVC(C=1.0, gamma=0.25)).fit(X[::3], y[::3])
    new = export_model(model, X[::3], tmp_path / "new", y=y[::3], name="iris", version="2", margin=None,
                       features=old.feature_names)
    assert ", scaled space; gamma" in render_description(describe(old))
    assert "scaled space whitened (Ledoit-Wolf covariance, shrinkage" in render_description(describe(new))
    assert "whitened" not in record_schema(old.manifest, old.digest)["x-rbfgate-domain"]["model"]
    assert "whitened" in record_schema(new.manifest, new.digest)["x-rbfgate-domain"]["model"]
    [change] = compare_domain(old.manifest, new.manifest, [], lambda value: value)
    assert change.kind == "domain_changed" and "space scaled -> whitened" in change.detail
