"""Fixtures for the service tests: a store with published bundles, tokens, in-process apps.

Models (datasets shipped with scikit-learn, see tests/conftest.py):
- iris 1.0.0: the session fixture ``iris_calibrated`` (three classes, string labels, sigmoid calibration);
- iris 2.0.0: the same features, StandardScaler + SVC(C=0.5, gamma=0.3), uncalibrated, so a switch
  visibly changes the numbers;
- cancer 1.0.0: the session fixture ``cancer_binary`` (two classes, integer labels, uncalibrated).
"""

from __future__ import annotations

import warnings
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pytest
from conftest import export_model  # tests/conftest.py: the shared export helper
from sklearn.datasets import load_iris
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler
from sklearn.svm import SVC

from model_store import Bundle
from model_store.store import Store
from service.app import create_app
from service.settings import Settings
from service.tokens import add_token

with warnings.catch_warnings():
    # Starlette asks for the httpx2 fork; the installed httpx works the same for these tests.
    warnings.simplefilter("ignore", UserWarning)
    from fastapi.testclient import TestClient

IRIS_FEATURES = ["sepal_length_cm", "sepal_width_cm", "petal_length_cm", "petal_width_cm"]
ROLE_NAMES = {"score": "team-checkout", "operate": "ops-alice", "audit": "auditor-bob"}


@dataclass(frozen=True)
class Published:
    """A bundle as published, with the scikit-learn model it was exported from and its reference rows."""

    bundle: Bundle
    model: object
    X: np.ndarray

    @property
    def name(self) -> str:
        return self.bundle.name

    @property
    def version(self) -> str:
        return self.bundle.version

    def records(self, rows: np.ndarray) -> list[dict[str, float]]:
        return [dict(zip(self.bundle.feature_names, map(float, row))) for row in rows]


@dataclass(frozen=True)
class ServiceModels:
    iris1: Published
    iris2: Published
    cancer1: Published


@pytest.fixture(scope="session")
def service_models(iris_calibrated, cancer_binary, tmp_path_factory) -> ServiceModels:
    X, y = load_iris(return_X_y=True)
    labels = np.array(["setosa", "versicolor", "virginica"])[y]
    model = make_pipeline(StandardScaler(), SVC(C=0.5, gamma=0.3)).fit(X, labels)
    bundle = export_model(
        model, X, tmp_path_factory.mktemp("iris2") / "bundle", y=labels, name="iris", version="2.0.0", features=IRIS_FEATURES
    )
    return ServiceModels(Published(*iris_calibrated), Published(bundle, model, X), Published(*cancer_binary))


def build_store(root: Path, models: ServiceModels) -> Store:
    """A new store with all three bundles published; iris 1.0.0 and cancer 1.0.0 active."""
    store = Store(root, create=True)
    for published in (models.iris1, models.iris2, models.cancer1):
        store.publish(Path(published.bundle.source), actor="test-setup")
    store.activate("iris", "1.0.0", reason="first release", actor="test-setup")
    store.activate("cancer", "1.0.0", reason="first release", actor="test-setup")
    return store


@pytest.fixture
def store(tmp_path, service_models) -> Store:
    """A fresh store per test, for tests that change it."""
    return build_store(tmp_path / "store", service_models)


@pytest.fixture(scope="session")
def shared_store(tmp_path_factory, service_models) -> Store:
    """One store for tests that only read and score."""
    return build_store(tmp_path_factory.mktemp("shared") / "store", service_models)


@pytest.fixture
def tokens(tmp_path) -> tuple[Path, dict[str, str]]:
    """A tokens file with one token per role; returns (path, {role: token})."""
    path = tmp_path / "tokens.json"
    issued = {role: add_token(path, name, role)[0] for role, name in ROLE_NAMES.items()}
    return path, issued


@pytest.fixture
def make_client() -> Iterator[Callable[..., TestClient]]:
    """``make_client(store_root, tokens_file=None, logs=None, **settings)``: a started in-process app.

    Polling is slow by default (one hour) so tests decide when the registry follows
    the store; pass ``poll_seconds`` to test polling itself. Unexpected exceptions
    are re-raised by the TestClient, so a test fails if any input reaches the 500 handler.
    """
    clients: list[TestClient] = []

    def make(store_root: Path, *, tokens_file: Path | None = None, logs: list | None = None, **overrides) -> TestClient:
        overrides.setdefault("poll_seconds", 3600.0)
        settings = Settings(store_root=Path(store_root), tokens_file=tokens_file, **overrides)
        sink = logs.append if logs is not None else (lambda event: None)
        client = TestClient(create_app(settings, environ={}, write_log=sink), raise_server_exceptions=True)
        client.__enter__()
        clients.append(client)
        return client

    yield make
    for client in clients:
        client.__exit__(None, None, None)


@pytest.fixture(scope="session")
def shared_client(shared_store) -> Iterator[TestClient]:
    """One started app over ``shared_store``, for tests that only read and score."""
    settings = Settings(store_root=shared_store.root, poll_seconds=3600.0)
    app = create_app(settings, environ={}, write_log=lambda event: None)
    with TestClient(app, raise_server_exceptions=True) as client:
        yield client
