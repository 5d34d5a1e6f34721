"""The service follows only pointer states the verified history explains, keeps tokens fresh whatever the store
does, and answers history questions with the same document as the CLI.

Store: tests/service/http_api/conftest.py (iris 1.0.0 active, 2.0.0 published; cancer 1.0.0 active).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import threading
import warnings
from pathlib import Path

from model_store.store import Store
from service.app import create_app
from service.settings import Settings
from service.tokens import revoke_token

from .cases import assert_problem, bearer
from .test_service_switching import _wait_until  # the bounded wait of the switching tests

with warnings.catch_warnings():
    warnings.simplefilter("ignore", UserWarning)
    from fastapi.testclient import TestClient

_REPO = Path(__file__).resolve().parents[3]


def _edit_pointer_by_hand(store: Store, version: str) -> None:
    """What an intruder or a careless operator does: point active.json at another stored version."""
    pointer_path = store.layout.pointer("iris")
    pointer = json.loads(pointer_path.read_text())
    pointer.update(version=version, digest=store.load_verified("iris", version).digest)
    pointer_path.write_text(json.dumps(pointer))


def test_a_hand_edited_pointer_is_not_served_and_the_model_is_not_ready(make_client, store, service_models):
    client = make_client(store.root)
    original = store.layout.pointer("iris").read_bytes()
    _edit_pointer_by_hand(store, "2.0.0")
    client.app.state.services.registry.refresh_all()  # the poll that sees the edited pointer
    v1 = service_models.iris1
    body = client.post("/score/iris", json={"records": v1.records(v1.X[:2])}).json()
    assert body["version"] == "1.0.0"  # the last verified version keeps serving
    ready = assert_problem(client.get("/readyz"), 503)
    [entry] = [model for model in ready["models"] if model["model"] == "iris"]
    assert "active.json was edited by hand" in entry["unexplained_pointer"]
    assert "history does not explain" in client.get("/models/iris").json()["unexplained_pointer"]

    store.layout.pointer("iris").write_bytes(original)  # restored from a backup
    client.app.state.services.registry.refresh_all()
    assert client.get("/readyz").status_code == 200
    assert client.get("/models/iris").json()["unexplained_pointer"] is None


def test_a_pointer_the_history_explains_is_followed(make_client, store):
    client = make_client(store.root)
    Store(store.root).activate("iris", "2.0.0", reason="rollout", actor="ops", via="cli", accept_breaking=True)
    client.app.state.services.registry.refresh_all()
    assert client.get("/models/iris").json()["served_by_this_worker"]["version"] == "2.0.0"
    assert client.get("/readyz").json()["state"] == "ready"


class _HangingStore(Store):
    """A store whose pointer reads hang once ``hang`` is set, as a read on a stuck network filesystem does."""

    def __init__(self, root: Path) -> None:
        super().__init__(root)
        self.hang = threading.Event()
        self.release = threading.Event()

    def active(self, name):
        if self.hang.is_set():
            self.release.wait(120)  # bounded, so a failing test cannot leave the thread behind for ever
        return super().active(name)


def test_a_hung_store_read_neither_keeps_a_revoked_token_working_nor_leaves_the_worker_ready(
    store, tokens, service_models
):
    path, issued = tokens
    hanging = _HangingStore(store.root)
    settings = Settings(store_root=store.root, tokens_file=path, poll_seconds=0.1)
    client = TestClient(create_app(settings, store=hanging, environ={}, write_log=lambda event: None))
    v1 = service_models.iris1
    body = {"records": v1.records(v1.X[:1])}  # scored from memory: this request reads nothing from the store
    with client:
        score = bearer(issued["score"])
        assert client.post("/score/iris", json=body, headers=score).status_code == 200
        hanging.hang.set()
        try:
            revoke_token(path, "team-checkout")
            assert _wait_until(lambda: client.post("/score/iris", json=body, headers=score).status_code == 401)
            assert _wait_until(lambda: client.get("/readyz").status_code == 503)
            assert "store poll has been running" in client.get("/readyz").json()["store_error"]
        finally:
            hanging.release.set()
        assert _wait_until(lambda: client.get("/readyz").status_code == 200)


def test_cli_json_and_http_history_are_the_same_document(make_client, store, tokens):
    path, issued = tokens
    client = make_client(store.root, tokens_file=path)
    over_http = client.get("/models/iris/history", headers=bearer(issued["audit"])).json()
    result = subprocess.run([sys.executable, "-m", "model_store", "history", "iris", "--store", str(store.root),
                             "--verify", "--json"], capture_output=True, text=True, timeout=120, cwd=_REPO,
                            env={**os.environ, "PYTHONPATH": str(_REPO)})
    assert json.loads(result.stdout) == over_http
    assert over_http["verification"] == {"ok": True, "entries": len(over_http["entries"]), "problem": None}


def test_history_at_over_http_matches_the_cli_and_refuses_bad_times(make_client, store, tokens):
    path, issued = tokens
    client = make_client(store.root, tokens_file=path)
    audit = bearer(issued["audit"])
    moment = store.history("iris")[-1]["time"]
    answer = client.get("/models/iris/history", params={"at": moment}, headers=audit)
    assert answer.status_code == 200, answer.text
    result = subprocess.run([sys.executable, "-m", "model_store", "history", "iris", "--store", str(store.root),
                             "--at", moment, "--json"], capture_output=True, text=True, timeout=120, cwd=_REPO,
                            env={**os.environ, "PYTHONPATH": str(_REPO)})
    assert json.loads(result.stdout) == answer.json()
    assert answer.json()["version"] == "1.0.0" and answer.json()["ended"] is None
    assert "RFC 3339" in assert_problem(client.get("/models/iris/history", params={"at": "noon"}, headers=audit), 422)["detail"]
    early = client.get("/models/iris/history", params={"at": "2000-01-01T00:00:00Z"}, headers=audit)
    assert "first activation is seq" in assert_problem(early, 404)["detail"]


def test_activation_over_http_records_the_token_name_and_via_http(make_client, store, tokens):
    path, issued = tokens
    client = make_client(store.root, tokens_file=path)
    # 2.0.0 is uncalibrated (1.0.0 is not): the contract check asks for accept_breaking.
    response = client.post("/models/iris/activate", json={"version": "2.0.0", "reason": "rollout", "accept_breaking": True},
                           headers=bearer(issued["operate"]))
    entry = response.json()["entry"]
    assert (entry["actor"], entry["via"]) == ("ops-alice", "http")
    undo = client.post("/models/iris/rollback", json={"reason": "back"}, headers=bearer(issued["operate"])).json()
    assert undo["undid"] == {"version": "2.0.0", "bundle_sha256": entry["digest"], "activated_at_seq": entry["seq"]}


def test_a_symlinked_signature_is_never_shipped_in_the_bundle_download(make_client, store, tokens, tmp_path):
    path, issued = tokens
    secret = tmp_path / "secret.txt"
    secret.write_bytes(b"not part of any bundle")
    os.symlink(secret, store.bundle_dir("iris", "2.0.0") / "signature.json")
    client = make_client(store.root, tokens_file=path)
    response = client.get("/models/iris/versions/2.0.0/bundle", headers=bearer(issued["audit"]))
    assert "symbolic link" in assert_problem(response, 409)["detail"]
    assert b"not part of any bundle" not in response.content
    assert_problem(client.get("/models/iris/versions/2.0.0", headers=bearer(issued["audit"])), 409)


class _CountingStore(Store):
    """Counts full bundle verifications (each reads, hashes and self-tests every array)."""

    def __init__(self, root: Path) -> None:
        super().__init__(root)
        self.loads: list[tuple[str, str]] = []

    def load_verified(self, name, version):
        self.loads.append((name, version))
        return super().load_verified(name, version)


def test_an_api_activation_verifies_the_bundle_once_and_serves_that_copy(store, tokens):
    """The worker that activates answers after one verification (the store's), not a second load of its own."""
    path, issued = tokens
    counting = _CountingStore(store.root)
    settings = Settings(store_root=store.root, tokens_file=path, poll_seconds=3600.0)
    with TestClient(create_app(settings, store=counting, environ={}, write_log=lambda event: None)) as client:
        counting.loads.clear()
        response = client.post("/models/iris/activate", headers=bearer(issued["operate"]),
                               json={"version": "2.0.0", "reason": "rollout", "accept_breaking": True})
        assert response.json()["served_by_this_worker"]["version"] == "2.0.0"
        assert counting.loads == [("iris", "2.0.0")]
