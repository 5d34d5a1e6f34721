"""What the exporter refuses, and that a refused or failed export leaves nothing behind.

Reference: the accepted model shapes (model_store/estimator_parts.py, README "Command reference":
anything else, such as another kernel, ensemble=True, other pipeline steps, an unfitted model or a
file that is not a model, exits 2 and writes nothing) and the scikit-learn estimators' own
documented parameters. At library level each refusal is a
ModelFileError (exit code 2 in the CLI) raised before anything is written.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse
from conftest import export_model  # tests/conftest.py
from sklearn.calibration import CalibratedClassifierCV
from sklearn.decomposition import PCA
from sklearn.linear_model import LogisticRegression
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import MinMaxScaler, StandardScaler
from sklearn.svm import SVC

from model_store import GoldenMismatchError, InputError, ModelFileError
from model_store.bundle import Bundle

from .reference import dataset


def _iris():
    return dataset("iris")


def _fitted(model):
    X, y = _iris()
    return model.fit(X, y)


def _unfitted_scaler_with_fitted_svc():
    X, y = _iris()
    return make_pipeline(StandardScaler(), SVC().fit(X, y))


def _sparse_fitted():
    X, y = _iris()
    return SVC().fit(scipy.sparse.csr_matrix(X), y)


def _float_labels():
    X, y = _iris()
    return SVC().fit(X, y.astype(float))


def _calibrated_twice():
    X, y = _iris()
    inner = make_pipeline(StandardScaler(), CalibratedClassifierCV(SVC(), ensemble=False))
    return CalibratedClassifierCV(inner, ensemble=False).fit(X, y)


REFUSED = {
    # name: (model factory, text the message must contain)
    "linear-kernel": (lambda: _fitted(SVC(kernel="linear")), "kernel is 'linear'"),
    "poly-kernel": (lambda: _fitted(SVC(kernel="poly")), "kernel is 'poly'"),
    "sigmoid-kernel": (lambda: _fitted(SVC(kernel="sigmoid")), "kernel is 'sigmoid'"),
    "ensemble-calibrator": (lambda: _fitted(CalibratedClassifierCV(SVC(), cv=3, ensemble=True)), "ensemble=True"),
    "pipeline-with-pca": (lambda: _fitted(make_pipeline(StandardScaler(), PCA(2), SVC())), "'PCA'"),
    "pca-instead-of-scaler": (lambda: _fitted(make_pipeline(PCA(2), SVC())), "'PCA'"),
    "unfitted-svc": (lambda: SVC(), "not fitted"),
    "unfitted-pipeline": (lambda: make_pipeline(StandardScaler(), SVC()), "not fitted"),
    "unfitted-calibrator": (lambda: CalibratedClassifierCV(SVC(), ensemble=False), "not fitted"),
    "unfitted-scaler": (_unfitted_scaler_with_fitted_svc, "StandardScaler is not fitted"),
    "clipping-minmax": (lambda: _fitted(make_pipeline(MinMaxScaler(clip=True), SVC())), "clip=True"),
    "float-labels": (_float_labels, "class labels of type float64"),
    "not-an-svc": (lambda: _fitted(LogisticRegression(max_iter=500)), "got LogisticRegression"),
    "not-a-model": (lambda: {"weights": [1, 2, 3]}, "got dict"),
    "sparse-fit": (_sparse_fitted, "sparse"),
    "break-ties-with-ovo": (lambda: _fitted(SVC(break_ties=True, decision_function_shape="ovo")), "break_ties"),
    "calibrated-twice": (_calibrated_twice, "calibrated twice"),
}


@pytest.mark.parametrize("case", REFUSED)
def test_unsupported_model_is_refused_and_nothing_is_written(case, tmp_path):
    factory, expected = REFUSED[case]
    model = factory()
    X, _ = _iris()
    out = tmp_path / "out"
    with pytest.raises(ModelFileError) as caught:
        export_model(model, X, out)
    assert expected in str(caught.value)
    assert caught.value.exit_code == 2
    assert list(tmp_path.iterdir()) == []  # no bundle, no staging directory


def test_break_ties_with_ovo_is_exportable_when_calibrated(bundle_factory):
    # CalibratedClassifierCV predicts argmax(predict_proba) and never calls the SVC's predict,
    # so scikit-learn answers for this model and the bundle must reproduce it.
    X, y = _iris()
    model = CalibratedClassifierCV(SVC(break_ties=True, decision_function_shape="ovo"), ensemble=False).fit(X, y)
    bundle = bundle_factory(model, X, y=y)
    scores = bundle.score(X)
    assert scores.labels.tolist() == model.predict(X).tolist()
    assert np.allclose(scores.probabilities, model.predict_proba(X), rtol=1e-9, atol=1e-9)


def test_golden_mismatch_after_writing_removes_the_bundle(tmp_path, monkeypatch):
    # The exporter replays the golden vectors after writing; on a mismatch nothing may remain.
    def mismatch(self):
        raise GoldenMismatchError("golden vector 0: forced mismatch")

    monkeypatch.setattr(Bundle, "self_test", mismatch)
    X, y = _iris()
    with pytest.raises(GoldenMismatchError):
        export_model(SVC().fit(X, y), X, tmp_path / "out")
    assert list(tmp_path.iterdir()) == []


def test_existing_output_directory_is_left_untouched(tmp_path):
    X, y = _iris()
    out = tmp_path / "out"
    out.mkdir()
    (out / "keep.txt").write_text("mine", encoding="utf-8")
    with pytest.raises(InputError, match="already exists"):
        export_model(SVC().fit(X, y), X, out)
    assert [p.name for p in out.iterdir()] == ["keep.txt"]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out"]


def test_reference_with_the_wrong_number_of_features_is_refused(tmp_path):
    X, y = _iris()
    with pytest.raises(InputError, match="the model expects 4 features, the reference has 3"):
        export_model(SVC().fit(X, y), X[:, :3], tmp_path / "out")
    assert list(tmp_path.iterdir()) == []


def test_allowed_range_is_the_reference_range_widened_by_the_margin(bundle_factory):
    # README, Concepts: the allowed range is the reference min/max widened by margin x range; every
    # iris measurement is positive, so a lower bound widened below 0 stops at 0 (inferred non-negative).
    X, y = _iris()
    bundle = bundle_factory(SVC().fit(X, y), X, margin=0.1)
    low, high = X.min(axis=0), X.max(axis=0)
    for index, feature in enumerate(bundle.manifest.features):
        span = high[index] - low[index]
        expected_low = max(0.0, low[index] - 0.1 * span)
        assert feature.allowed == pytest.approx((expected_low, high[index] + 0.1 * span), rel=1e-12)
        assert feature.non_negative == (low[index] - 0.1 * span < 0)
        assert feature.training.min == low[index] and feature.training.max == high[index]
