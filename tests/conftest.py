"""Shared fixtures: small bundles exported from scikit-learn models fitted on its shipped datasets.

Datasets (shipped with scikit-learn):
- iris: R. A. Fisher, "The use of multiple measurements in taxonomic problems", 1936 (UCI Iris).
- wine: M. Forina et al., PARVUS, 1988 (UCI Wine).
- breast cancer: W. H. Wolberg, W. N. Street, O. L. Mangasarian, Wisconsin Diagnostic Breast Cancer, 1995 (UCI).
"""

from __future__ import annotations

import hashlib
import itertools
from collections.abc import Callable
from pathlib import Path

import numpy as np
import pytest
from sklearn.calibration import CalibratedClassifierCV
from sklearn.datasets import load_breast_cancer, load_iris
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler
from sklearn.svm import SVC

from model_store import Bundle
from model_store.estimator_parts import take_apart
from model_store.exporter import ExportRequest, export_bundle

_counter = itertools.count()


def export_model(
    model,
    X: np.ndarray,
    out: Path,
    *,
    y=None,
    name: str = "model",
    version: str | None = None,
    features: list[str] | None = None,
    margin: float = 0.05,
    holdout: np.ndarray | None = None,
    holdout_y=None,
    refuse_rate: float = 0.01,
    feature_info: dict | None = None,
) -> Bundle:
    """Export a fitted ``model`` with ``X`` (n, f) as reference rows (and ``holdout`` rows); return the loaded bundle."""
    X = np.asarray(X, dtype=np.float64)
    features = features or [f"x{index}" for index in range(X.shape[1])]
    request = ExportRequest(
        parts=take_apart(model),
        features=features,
        reference=X,
        reference_labels=None if y is None else list(y),
        reference_file="reference.csv",
        reference_sha256=hashlib.sha256(X.tobytes()).hexdigest(),
        name=name,
        version=version or f"v{next(_counter)}",
        out=Path(out),
        margin=margin,
        holdout=None if holdout is None else np.asarray(holdout, dtype=np.float64),
        holdout_labels=None if holdout_y is None else list(holdout_y),
        refuse_rate=refuse_rate,
        feature_info=feature_info or {},
    )
    return export_bundle(request)


@pytest.fixture
def bundle_factory(tmp_path) -> Callable[..., Bundle]:
    """``bundle_factory(model, X, **kw)`` exports into a fresh directory under tmp_path."""

    def make(model, X, **kwargs) -> Bundle:
        return export_model(model, X, tmp_path / f"bundle-{next(_counter)}", **kwargs)

    return make


@pytest.fixture(scope="session")
def iris_calibrated(tmp_path_factory) -> tuple[Bundle, object, np.ndarray]:
    """Three-class, string labels, StandardScaler + SVC + sigmoid calibration on iris."""
    X, y = load_iris(return_X_y=True)
    labels = np.array(["setosa", "versicolor", "virginica"])[y]
    model = CalibratedClassifierCV(make_pipeline(StandardScaler(), SVC(C=3.0)), method="sigmoid", ensemble=False)
    model.fit(X, labels)
    features = ["sepal_length_cm", "sepal_width_cm", "petal_length_cm", "petal_width_cm"]
    bundle = export_model(model, X, tmp_path_factory.mktemp("iris") / "bundle", y=labels, name="iris", version="1.0.0", features=features)
    return bundle, model, X


@pytest.fixture(scope="session")
def cancer_binary(tmp_path_factory) -> tuple[Bundle, object, np.ndarray]:
    """Two-class, integer labels, StandardScaler + SVC, uncalibrated, on breast cancer."""
    X, y = load_breast_cancer(return_X_y=True)
    model = make_pipeline(StandardScaler(), SVC(C=1.0, gamma="scale")).fit(X, y)
    bundle = export_model(model, X, tmp_path_factory.mktemp("cancer") / "bundle", y=y, name="cancer", version="1.0.0")
    return bundle, model, X
