"""Fixtures for the bundle tests: bundles exported once per module or session."""

from __future__ import annotations

import numpy as np
import pytest
from conftest import export_model  # tests/conftest.py: the shared export helper
from sklearn.calibration import CalibratedClassifierCV
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler
from sklearn.svm import SVC

from .reference import dataset


@pytest.fixture(scope="session")
def iris_raw(tmp_path_factory):
    """(bundle, model, X): three classes, no scaler, uncalibrated; support vectors are raw rows."""
    X, y = dataset("iris")
    model = SVC(C=1.0, gamma=0.5).fit(X, y)
    bundle = export_model(model, X, tmp_path_factory.mktemp("iris-raw") / "bundle", y=y, name="iris-raw", version="1")
    return bundle, model, X


@pytest.fixture(scope="session")
def cancer_standard(tmp_path_factory):
    """(bundle, model, X): two classes, StandardScaler + SVC, uncalibrated."""
    X, y = dataset("cancer")
    model = make_pipeline(StandardScaler(), SVC(C=1.0)).fit(X, y)
    bundle = export_model(model, X, tmp_path_factory.mktemp("cancer-std") / "bundle", y=y, name="cancer", version="1")
    return bundle, model, X


@pytest.fixture(scope="session")
def wine_sigmoid(tmp_path_factory):
    """(bundle, model, X): three classes, StandardScaler + SVC + sigmoid calibration."""
    X, y = dataset("wine")
    model = CalibratedClassifierCV(make_pipeline(StandardScaler(), SVC(C=2.0)), method="sigmoid", ensemble=False)
    model.fit(X, y)
    bundle = export_model(model, X, tmp_path_factory.mktemp("wine-sig") / "bundle", y=y, name="wine", version="1")
    return bundle, model, X


@pytest.fixture
def rng():
    return np.random.default_rng(20240601)
