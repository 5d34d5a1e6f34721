"""The two writers of a scored result agree byte for byte: the column writer for many rows and the
one-row writer a single record takes (service.result_encoding).

The reference is the column writer, whose answers the HTTP tests compare with scikit-learn; here
each row of real bundles (string and integer labels, binary and three-class, ovr and ovo, with
break_ties, calibrated or not, with and without a domain model) is scored alone and written both ways.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import orjson
import pytest
from sklearn.calibration import CalibratedClassifierCV
from sklearn.datasets import load_breast_cancer, load_iris
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler
from sklearn.svm import SVC

from service.result_encoding import _one_element, _scored_elements, encode_results


def _rows(X: np.ndarray) -> np.ndarray:
    rng = np.random.default_rng(3)
    return np.vstack([X[::17], X[::23] + rng.normal(scale=0.3, size=X[::23].shape)])


def _three_class_uncalibrated(bundle_factory, **svc):
    X, y = load_iris(return_X_y=True)
    model = make_pipeline(StandardScaler(), SVC(C=2.0, **svc)).fit(X, y)
    return bundle_factory(model, X, y=y), X


def _binary_calibrated_string_labels(bundle_factory):
    X, y = load_breast_cancer(return_X_y=True)
    labels = np.array(["malignant", "benign"])[y]
    model = CalibratedClassifierCV(make_pipeline(StandardScaler(), SVC()), method="isotonic", ensemble=False)
    return bundle_factory(model.fit(X, labels), X, y=labels), X


_BUNDLES = ["iris calibrated, string labels", "cancer binary, integer labels", "iris uncalibrated, ovr",
            "iris uncalibrated, ovo", "iris uncalibrated, break_ties", "cancer calibrated, string labels"]


@pytest.fixture(params=_BUNDLES)
def bundle_and_rows(request, iris_calibrated, cancer_binary, bundle_factory):
    kind = request.param
    if kind == "iris calibrated, string labels":
        bundle, _, X = iris_calibrated
    elif kind == "cancer binary, integer labels":
        bundle, _, X = cancer_binary
    elif kind == "cancer calibrated, string labels":
        bundle, X = _binary_calibrated_string_labels(bundle_factory)
    elif kind == "iris uncalibrated, ovo":
        bundle, X = _three_class_uncalibrated(bundle_factory, decision_function_shape="ovo")
    elif kind == "iris uncalibrated, break_ties":
        bundle, X = _three_class_uncalibrated(bundle_factory, break_ties=True)
    else:
        bundle, X = _three_class_uncalibrated(bundle_factory)
    return bundle, _rows(X)


@pytest.mark.parametrize("with_domain", [True, False])
def test_one_row_writer_gives_the_column_writers_bytes(bundle_and_rows, with_domain):
    bundle, rows = bundle_and_rows
    for row in rows:
        scores = bundle.score(row[None, :])
        if not with_domain:  # a bundle of format rbfgate-bundle/1 has no domain model
            scores = dataclasses.replace(scores, domain_score=None, domain_verdict=None)
        assert _one_element(scores, bundle.classes) == _scored_elements(scores, bundle.classes)[0]


def test_one_row_answer_has_the_documented_members_in_order(iris_calibrated):
    # service.scoring's module docstring: status, label, decision, probability, nearest_support, domain.
    bundle, _, X = iris_calibrated
    result = orjson.loads(encode_results(1, bundle.score(X[:1]), bundle.classes, np.array([0]), {}, ["a-1"])[1:-1])
    assert list(result) == ["id", "status", "label", "decision", "probability", "nearest_support", "domain"]
    assert list(result["nearest_support"]) == ["distance", "similarity", "label", "index", "percentile"]
    assert result["id"] == "a-1" and result["label"] == "setosa"  # iris row 0 is a setosa (Fisher 1936)
