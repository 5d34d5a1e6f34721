"""The two writers of a scored result agree byte for byte: the column writer for many rows and the
one-row writer a single record takes (service.result_encoding).

The reference is the column writer, whose answers the HTTP tests compare with scikit-learn; here
each row of real bundles (string and integer labels, binary and three-class, calibrated or not,
with and without a domain model) is scored alone and written both ways.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import orjson
import pytest
from sklearn.datasets import load_iris
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler
from sklearn.svm import SVC

from service.result_encoding import _one_element, _scored_elements, encode_results


def _rows(X: np.ndarray) -> np.ndarray:
    rng = np.random.default_rng(3)
    return np.vstack([X[::17], X[::23] + rng.normal(scale=0.3, size=X[::23].shape)])


def _three_class_uncalibrated(bundle_factory):
    X, y = load_iris(return_X_y=True)
    model = make_pipeline(StandardScaler(), SVC(C=2.0, decision_function_shape="ovr")).fit(X, y)
    return bundle_factory(model, X, y=y), X


@pytest.fixture(params=["iris calibrated, string labels", "cancer binary, integer labels", "iris uncalibrated"])
def bundle_and_rows(request, iris_calibrated, cancer_binary, bundle_factory):
    if request.param.startswith("iris calibrated"):
        bundle, _, X = iris_calibrated
    elif request.param.startswith("cancer"):
        bundle, _, X = cancer_binary
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
