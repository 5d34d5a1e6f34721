"""deploy/publish-bundle.sh, the one-shot job of compose.yaml and kubernetes/publish-job.yaml.

Run here with /bin/sh against a store in a temporary directory, as the tools image runs it.
What it must do is the store's own contract (README, "The version store"): publish, then activate
with a reason; the history records each change once, so running the job again (a Job retried
by Kubernetes, `docker compose up` a second time) must add nothing.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from conftest import export_model  # tests/conftest.py: the shared export helper
from scaleout.deploy_files import DEPLOY
from sklearn.datasets import load_iris
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler
from sklearn.svm import SVC

from model_store.store import Store

SCRIPT = DEPLOY / "publish-bundle.sh"


def run_job(store_root: Path, **variables: str) -> subprocess.CompletedProcess:
    environment = {key: value for key, value in os.environ.items() if not key.startswith("RBFGATE_")}
    # the rbfgate and python3 of this interpreter first, as in the image
    environment["PATH"] = os.pathsep.join([str(Path(sys.executable).parent), environment.get("PATH", "")])
    environment.update({"RBFGATE_STORE": str(store_root), **variables})
    return subprocess.run(["sh", str(SCRIPT)], capture_output=True, text=True, env=environment, timeout=300)


@pytest.fixture(scope="module")
def iris_bundle(tmp_path_factory) -> Path:
    X, y = load_iris(return_X_y=True)  # R. A. Fisher, 1936, shipped with scikit-learn
    labels = np.array(["setosa", "versicolor", "virginica"])[y]
    model = make_pipeline(StandardScaler(), SVC()).fit(X, labels)
    bundle = export_model(model, X, tmp_path_factory.mktemp("job") / "iris-3.1.0", y=labels, name="iris", version="3.1.0")
    return Path(bundle.source)


def actions(store_root: Path, name: str) -> list[tuple[str, str, str]]:
    return [(entry["action"], entry["version"], entry["actor"]) for entry in Store(store_root).history(name)]


def test_the_job_publishes_and_activates_the_bundle_it_is_given(tmp_path, iris_bundle):
    result = run_job(tmp_path / "store", RBFGATE_BUNDLE=str(iris_bundle), RBFGATE_ACTIVATE_REASON="ci release",
                     RBFGATE_ACTOR="ci")
    assert result.returncode == 0, result.stderr
    assert Store(tmp_path / "store").active("iris").version == "3.1.0"
    assert actions(tmp_path / "store", "iris") == [("publish", "3.1.0", "ci"), ("activate", "3.1.0", "ci")]


def test_running_the_job_again_changes_nothing(tmp_path, iris_bundle):
    variables = {"RBFGATE_BUNDLE": str(iris_bundle), "RBFGATE_ACTIVATE_REASON": "ci release"}
    assert run_job(tmp_path / "store", **variables).returncode == 0
    again = run_job(tmp_path / "store", **variables)
    assert again.returncode == 0, again.stderr
    assert len(Store(tmp_path / "store").history("iris")) == 2 and "already the active version" in again.stdout


def test_the_job_refuses_to_start_without_a_reason_for_the_history(tmp_path, iris_bundle):
    result = run_job(tmp_path / "store", RBFGATE_BUNDLE=str(iris_bundle))
    assert result.returncode != 0 and "RBFGATE_ACTIVATE_REASON" in result.stderr
    assert not (tmp_path / "store").exists()


def test_a_bundle_that_fails_verification_is_neither_published_nor_activated(tmp_path, iris_bundle):
    damaged = tmp_path / "damaged"
    damaged.mkdir()
    for path in iris_bundle.iterdir():
        (damaged / path.name).write_bytes(path.read_bytes())
    vectors = damaged / "support_vectors.npy"
    vectors.write_bytes(vectors.read_bytes()[:-8] + bytes(8))  # the manifest's SHA-256 no longer matches
    result = run_job(tmp_path / "store", RBFGATE_BUNDLE=str(damaged), RBFGATE_ACTIVATE_REASON="ci release")
    assert result.returncode == 1 and "support_vectors.npy" in result.stderr
    assert not (tmp_path / "store").exists()


def test_the_demo_job_publishes_the_quick_start_bundle_once(tmp_path):
    first = run_job(tmp_path / "store", RBFGATE_ACTIVATE_REASON="compose quick start")
    assert first.returncode == 0, first.stderr
    second = run_job(tmp_path / "store", RBFGATE_ACTIVATE_REASON="compose quick start")
    assert second.returncode == 0, second.stderr
    assert Store(tmp_path / "store").active("pallet-checks").version == "1.0.0"
    assert [action for action, _, _ in actions(tmp_path / "store", "pallet-checks")] == ["publish", "activate"]
