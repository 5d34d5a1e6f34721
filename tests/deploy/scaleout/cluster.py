"""Three ``rbfgate serve`` replicas over one store behind nginx, as pytest fixtures and helpers.

Shared by the functional scale-out test (tests/deploy/test_deploy_scaleout.py) and the switch
propagation benchmark (tests/benchmarks/test_scaleout_switch.py). Reference numbers: scikit-learn's
``SVC.decision_function`` (ovr shape) and ``predict`` on iris (R. A. Fisher, 1936, shipped with
scikit-learn), tolerance 1e-9 relative to max(1, |value|) as in the README's "Exactness".
"""

from __future__ import annotations

import os
import subprocess
import sys
import time
from dataclasses import dataclass

import numpy as np
import pytest
from conftest import export_model  # tests/conftest.py: the shared export helper
from scaleout.balancer import Balancer, find_nginx
from scaleout.load import ScoringLoad
from scaleout.replicas import Replica, clean_environment, free_port, start_all
from sklearn.datasets import load_iris
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler
from sklearn.svm import SVC

from model_store.store import Store

__all__ = [
    "FEATURES",
    "ROWS",
    "SCORE_PATH",
    "Cluster",
    "activate_with_cli",
    "batch",
    "check",
    "cluster",
    "iris_versions",
    "keep_loading",
    "nginx",
    "wait_for_answers",
]

FEATURES = ["sepal_length_cm", "sepal_width_cm", "petal_length_cm", "petal_width_cm"]
SCORE_PATH = "/score/iris"
ROWS = [0, 60, 120]  # one flower of each species


@dataclass(frozen=True)
class Cluster:
    store: Store
    replicas: list[Replica]
    balancer: Balancer


@pytest.fixture(scope="module")
def nginx() -> str:
    executable = find_nginx()
    if executable is None:
        reason = "nginx is not installed (apt-get install nginx); it is the load balancer of the scale-out test"
        if os.environ.get("CI") == "true":
            pytest.fail(f"{reason}; in CI it must run (.ci/run installs it)")
        pytest.skip(reason)
    return executable


@pytest.fixture(scope="module")
def iris_versions(tmp_path_factory) -> dict[str, tuple]:
    """version -> (bundle, scikit-learn model): 2.0.0 uses another C and gamma, so its numbers differ."""
    X, y = load_iris(return_X_y=True)
    labels = np.array(["setosa", "versicolor", "virginica"])[y]
    fitted = {
        "1.0.0": make_pipeline(StandardScaler(), SVC(C=3.0)).fit(X, labels),
        "2.0.0": make_pipeline(StandardScaler(), SVC(C=0.5, gamma=0.3)).fit(X, labels),
    }
    folder = tmp_path_factory.mktemp("iris-versions")
    return {
        version: (export_model(model, X, folder / version, y=labels, name="iris", version=version, features=FEATURES), model)
        for version, model in fitted.items()
    }


@pytest.fixture(scope="module")
def batch() -> dict:
    X, _ = load_iris(return_X_y=True)
    return {"records": [dict(zip(FEATURES, map(float, X[row]))) for row in ROWS]}


@pytest.fixture(scope="module")
def check(iris_versions):
    """check(body) -> None when the results equal scikit-learn's for the version the body names."""
    X, _ = load_iris(return_X_y=True)
    expected = {}
    for version, (_, model) in iris_versions.items():
        decisions = model.decision_function(X[ROWS])
        expected[version] = [
            (label, dict(zip(map(str, model.classes_), map(float, row))))
            for label, row in zip(model.predict(X[ROWS]), decisions)
        ]

    def check_body(body: dict) -> str | None:
        want = expected.get(body.get("version"))
        if want is None:
            return f"names version {body.get('version')!r}, which was never published"
        for index, (result, (label, decision)) in enumerate(zip(body["results"], want)):
            if result.get("status") != "scored" or result.get("label") != label:
                return f"record {index}: {result} is not {label!r} as scikit-learn predicts for {body['version']}"
            for name, value in decision.items():
                if abs(result["decision"][name] - value) > 1e-9 * max(1.0, abs(value)):
                    return f"record {index}: decision[{name}] {result['decision'][name]} != {value} ({body['version']})"
        return None

    return check_body


@pytest.fixture
def cluster(nginx, iris_versions, tmp_path):
    store = Store(tmp_path / "store", create=True)
    for bundle, _ in iris_versions.values():
        store.publish(bundle.source, actor="scaleout-test")
    store.activate("iris", "1.0.0", reason="first version", actor="scaleout-test")
    replicas = [Replica(f"replica-{index}", store.root, tmp_path) for index in range(3)]
    try:
        start_all(replicas)
        with Balancer(nginx, [replica.address for replica in replicas], free_port()) as balancer:
            yield Cluster(store, replicas, balancer)
    finally:
        for replica in replicas:
            replica.stop()


def activate_with_cli(cluster: Cluster, version: str) -> float:
    """`rbfgate activate` in its own process; returns when the pointer was replaced (its file's mtime)."""
    command = [sys.executable, "-m", "model_store", "activate", "iris", version, "--reason", "scale-out test",
               "--store", str(cluster.store.root), "--actor", "scaleout-test"]
    result = subprocess.run(command, capture_output=True, text=True, env=clean_environment(), timeout=120)
    assert result.returncode == 0, result.stderr
    return cluster.store.layout.pointer("iris").stat().st_mtime


def wait_for_answers(load: ScoringLoad, count: int, since: float = 0.0, timeout: float = 20.0) -> None:
    deadline = time.monotonic() + timeout
    while len(load.answered_since(since)) < count and time.monotonic() < deadline:
        time.sleep(0.02)
    assert len(load.answered_since(since)) >= count, f"the load got fewer than {count} answers: {load.failures[:3]}"


def keep_loading(load: ScoringLoad, until: float) -> None:
    while time.time() < until:
        time.sleep(0.05)
