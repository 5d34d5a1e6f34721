"""The domain model in the bundle against scikit-learn's OneClassSVM, its verdicts, ranges and old bundles.

Reference: scikit-learn's ``OneClassSVM`` (Schölkopf et al., "Estimating the support of a
high-dimensional distribution", Neural Computation 13(7), 2001), refitted here independently of
rbfgate on the pipeline scaler's ``transform`` of the reference rows with the gamma and nu the
manifest records; its ``decision_function`` is the reference score. Datasets shipped with
scikit-learn: iris (Fisher 1936), wine (Forina et al. 1988), breast cancer (Street, Wolberg and
Mangasarian 1993) and digits (Alpaydin and Kaynak 1998), all on the UCI repository.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from conftest import export_model  # tests/conftest.py
from sklearn.model_selection import train_test_split
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler
from sklearn.svm import SVC, OneClassSVM

from model_store import load_bundle
from model_store.refusal import check_records

from .reference import assert_close, dataset, probe_rows

FORMAT_1_BUNDLE = Path(__file__).parent / "data" / "format1-iris"


def _exported(name: str, tmp_path: Path, *, with_holdout: bool = True):
    X, y = dataset(name)
    reference, holdout, labels, holdout_labels = train_test_split(X, y, test_size=0.3, stratify=y, random_state=0)
    model = make_pipeline(StandardScaler(), SVC(C=1.0)).fit(reference, labels)
    bundle = export_model(model, reference, tmp_path / name, y=labels,
                          holdout=holdout if with_holdout else None,
                          holdout_y=holdout_labels if with_holdout else None)
    return bundle, model, reference, holdout


@pytest.mark.parametrize("name", ["iris", "wine", "cancer", "digits"])
def test_domain_score_is_scikit_learns_one_class_decision(name, tmp_path):
    bundle, model, reference, holdout = _exported(name, tmp_path)
    spec = bundle.manifest.domain
    scaler = model[0]
    reference_model = OneClassSVM(kernel="rbf", gamma=spec.gamma, nu=spec.nu).fit(scaler.transform(reference))
    rows = probe_rows(np.vstack([reference, holdout]), seed=4)
    ours = bundle.score(rows).domain_score
    # |ours - scikit-learn| <= 1e-9 x max(1, |scikit-learn|): relative, absolute near 0.
    assert_close(ours, reference_model.decision_function(scaler.transform(rows)), f"{name} one-class decision")
    assert spec.support_vectors == len(reference_model.support_vectors_)


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
    assert scores.domain_verdict[-1] == "outside"


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
