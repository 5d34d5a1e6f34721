"""Version switches in one worker and across replicas; a failing bundle never goes live.

Reference for the numbers: scikit-learn's ``decision_function`` of the model each version
was exported from (reference.py). Waiting loops are bounded in time and assert only the
final state, never how long it took.
"""

from __future__ import annotations

import os
import time
from pathlib import Path

import numpy as np
from conftest import export_model  # tests/conftest.py
from sklearn.svm import SVC

from model_store.store import Store

from .cases import assert_problem, bearer
from .reference import assert_close, sklearn_reference


def _score(client, published, rows, headers=None):
    response = client.post("/score/iris", json={"records": published.records(rows)}, headers=headers or {})
    assert response.status_code == 200, response.text
    return response.json()


def _decisions(body, classes) -> np.ndarray:
    return np.array([[result["decision"][label] for label in classes] for result in body["results"]])


def _damage(store: Store, name: str, version: str) -> None:
    """Flip one byte of a stored array, as a disk error or a careless edit would."""
    path = store.bundle_dir(name, version) / "support_vectors.npy"
    os.chmod(path, 0o644)
    data = bytearray(path.read_bytes())
    data[-1] ^= 0xFF
    path.write_bytes(bytes(data))


def _wait_until(predicate, seconds: float = 20.0) -> bool:
    deadline = time.monotonic() + seconds
    while time.monotonic() < deadline:
        if predicate():
            return True
        time.sleep(0.05)
    return predicate()


def test_activate_answers_after_this_worker_switched(make_client, store, tokens, service_models):
    path, issued = tokens
    client = make_client(store.root, tokens_file=path)
    operate = bearer(issued["operate"])
    response = client.post("/models/iris/activate", json={"version": "2.0.0", "reason": "new C", "accept_breaking": True}, headers=operate)
    assert response.json()["served_by_this_worker"]["version"] == "2.0.0"
    v2 = service_models.iris2
    body = _score(client, v2, v2.X[::10], bearer(issued["score"]))  # no poll in between
    assert (body["version"], body["bundle_sha256"]) == ("2.0.0", v2.bundle.digest)
    assert_close(_decisions(body, v2.bundle.classes), sklearn_reference(v2.model, v2.X[::10])["decision"], "v2 decision")


def test_rollback_returns_to_the_previous_version(make_client, store, tokens, service_models):
    path, issued = tokens
    client = make_client(store.root, tokens_file=path)
    operate = bearer(issued["operate"])
    client.post("/models/iris/activate", json={"version": "2.0.0", "reason": "try", "accept_breaking": True}, headers=operate)
    response = client.post("/models/iris/rollback", json={"reason": "flips on golden vectors"}, headers=operate)
    assert response.status_code == 200, response.text
    assert response.json()["entry"]["action"] == "rollback"
    assert response.json()["served_by_this_worker"]["version"] == "1.0.0"
    v1 = service_models.iris1
    assert _score(client, v1, v1.X[:3], bearer(issued["score"]))["version"] == "1.0.0"


def test_preview_compares_candidate_with_active_on_recent_records(make_client, store, tokens, service_models):
    path, issued = tokens
    client = make_client(store.root, tokens_file=path)
    v1 = service_models.iris1
    client.post("/score/iris", json={"records": v1.records(v1.X[::5])}, headers=bearer(issued["score"]))  # 30 records
    response = client.post("/models/iris/preview", json={"version": "2.0.0"}, headers=bearer(issued["operate"]))
    assert response.status_code == 200, response.text
    body = response.json()
    assert body["recent_records"] == 30
    report = body["report"]
    assert (report["active"]["version"], report["candidate"]["version"]) == ("1.0.0", "2.0.0")
    assert sum(report["rows"]["by_source"].values()) == report["rows"]["total"] >= 30
    assert client.get("/models/iris", headers=bearer(issued["audit"])).json()["active"]["version"] == "1.0.0"


def test_other_replicas_follow_within_their_poll_interval(make_client, store, tokens, service_models):
    path, issued = tokens
    first = make_client(store.root, tokens_file=path)
    second = make_client(store.root, tokens_file=path, poll_seconds=0.1)
    score = bearer(issued["score"])
    records = {"records": service_models.iris2.records(service_models.iris2.X[:2])}
    assert second.post("/score/iris", json=records, headers=score).json()["version"] == "1.0.0"
    first.post("/models/iris/activate", json={"version": "2.0.0", "reason": "rollout", "accept_breaking": True}, headers=bearer(issued["operate"]))
    assert _wait_until(lambda: second.post("/score/iris", json=records, headers=score).json()["version"] == "2.0.0")


def test_a_bundle_damaged_after_activation_never_goes_live(make_client, store, service_models):
    client = make_client(store.root)
    registry = client.app.state.services.registry
    operator = Store(store.root)  # another process on the same store
    operator.activate("iris", "2.0.0", reason="rollout", actor="ops", accept_breaking=True)
    _damage(store, "iris", "2.0.0")
    registry.refresh_all()  # the poll that sees the new pointer
    v1 = service_models.iris1
    assert _score(client, v1, v1.X[:3])["version"] == "1.0.0"  # the old version keeps serving
    ready = client.get("/readyz")
    assert ready.status_code == 200 and ready.json()["state"] == "degraded"
    [entry] = [model for model in ready.json()["models"] if model["model"] == "iris"]
    assert (entry["serving"]["version"], entry["failure"]["version"]) == ("1.0.0", "2.0.0")
    assert entry["failure"]["error"] == "IntegrityError"
    metrics = client.get("/metrics").text
    assert 'rbfgate_load_failures_total{model="iris",version="2.0.0"} 1.0' in metrics
    assert 'rbfgate_load_failing{model="iris",version="2.0.0"} 1.0' in metrics
    operator.rollback("iris", reason="2.0.0 is damaged", actor="ops")  # back to a version that loads
    registry.refresh_all()
    assert client.get("/readyz").json()["state"] == "ready"
    assert 'rbfgate_load_failing{model="iris",version="2.0.0"} 0.0' in client.get("/metrics").text


def test_activating_a_damaged_version_is_refused_and_changes_nothing(make_client, store, tokens):
    path, issued = tokens
    client = make_client(store.root, tokens_file=path)
    _damage(store, "iris", "2.0.0")
    response = client.post("/models/iris/activate", json={"version": "2.0.0", "reason": "x", "accept_breaking": True}, headers=bearer(issued["operate"]))
    assert "support_vectors.npy" in assert_problem(response, 409)["detail"]  # IntegrityError names the file
    assert store.active("iris").version == "1.0.0"


def test_a_damaged_active_version_at_start_is_unavailable_not_wrong(make_client, store):
    _damage(store, "iris", "1.0.0")
    client = make_client(store.root)
    assert "iris" in assert_problem(client.get("/readyz"), 503)["detail"]
    record = {"sepal_length_cm": 5.1, "sepal_width_cm": 3.5, "petal_length_cm": 1.4, "petal_width_cm": 0.2}
    assert_problem(client.post("/score/iris", json={"records": [record]}), 503)
    assert client.post("/score/cancer", json={"records": [{"x0": 1.0}]}).status_code == 422  # other models serve


def test_scoring_a_damaged_pinned_version_is_409(make_client, store, service_models):
    _damage(store, "iris", "2.0.0")
    client = make_client(store.root)
    records = service_models.iris2.records(service_models.iris2.X[:1])
    assert_problem(client.post("/score/iris/versions/2.0.0", json={"records": records}), 409)


def test_a_model_with_no_active_version_is_404_with_advice(make_client, store, service_models, tmp_path):
    X = service_models.iris1.X
    y = (X[:, 2] > 2.5).astype(int)
    fresh = export_model(SVC().fit(X, y), X, tmp_path / "fresh", y=y, name="fresh", version="0.1.0")
    store.publish(Path(fresh.source), actor="test")
    client = make_client(store.root)
    problem = assert_problem(client.post("/score/fresh", json={"records": [{"x0": 5.0}]}), 404)
    assert "no active version" in problem["detail"]
    record = dict(zip(fresh.feature_names, map(float, X[0])))
    pinned = client.post("/score/fresh/versions/0.1.0", json={"records": [record]})
    assert pinned.status_code == 200 and pinned.json()["version"] == "0.1.0"
