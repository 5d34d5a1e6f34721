"""A pointer put back to an older copy, garbled, replaced by a link or deleted is never followed: the last verified
version keeps serving, /readyz is 503 and /models/{model} says why. Metadata never shows one version's manifest
under another version's name.

Store: tests/service/http_api/conftest.py (iris 1.0.0 active, 2.0.0 published; cancer 1.0.0 active).
"""

from __future__ import annotations

import os
import shutil

import pytest

from model_store.store import Store

from .cases import assert_problem
from .conftest import build_store
from .server import ServeProcess
from .test_service_switching import _wait_until  # the bounded wait of the switching tests


def _serving(client) -> str:
    return client.get("/models/iris").json()["served_by_this_worker"]["version"]


def _unexplained(client) -> str:
    ready = assert_problem(client.get("/readyz"), 503)
    [entry] = [model for model in ready["models"] if model["model"] == "iris"]
    assert entry["unexplained_pointer"] and "iris" in ready["detail"]
    summary = client.get("/models/iris")
    assert summary.status_code == 200  # the model page still answers, saying why
    assert summary.json()["unexplained_pointer"] == entry["unexplained_pointer"]
    return entry["unexplained_pointer"]


def test_a_pointer_put_back_to_an_older_copy_is_not_followed(make_client, store):
    client = make_client(store.root)
    older = store.layout.pointer("iris").read_bytes()  # a copy taken while 1.0.0 was active
    Store(store.root).activate("iris", "2.0.0", reason="rollout", actor="ops", via="cli", accept_breaking=True)
    client.app.state.services.registry.refresh_all()
    assert _serving(client) == "2.0.0"

    store.layout.pointer("iris").write_bytes(older)  # every field of it once was true
    client.app.state.services.registry.refresh_all()
    assert _serving(client) == "2.0.0"  # not back to 1.0.0
    assert "an older copy of active.json was put back by hand" in _unexplained(client)


@pytest.mark.parametrize("damage", ["garbled", "link", "deleted"])
def test_a_pointer_that_is_not_a_pointer_file_is_not_followed(make_client, store, tmp_path, damage):
    client = make_client(store.root)
    path = store.layout.pointer("iris")
    copy = tmp_path / "active-copy.json"
    copy.write_bytes(path.read_bytes())
    path.unlink()
    if damage == "garbled":
        path.write_text('{"version": "2.0.0"')
    elif damage == "link":
        os.symlink(copy, path)  # the same content, from outside the store
    client.app.state.services.registry.refresh_all()
    assert _serving(client) == "1.0.0"
    expected = {"garbled": "not valid", "link": "symbolic link", "deleted": "is missing"}[damage]
    assert expected in _unexplained(client)

    if path.is_symlink() or path.exists():
        path.unlink()
    path.write_bytes(copy.read_bytes())  # restored from a backup
    client.app.state.services.registry.refresh_all()
    assert client.get("/readyz").status_code == 200


def test_metadata_of_a_swapped_version_folder_is_refused_not_shown_under_the_wrong_name(make_client, store):
    client = make_client(store.root)
    versions = store.layout.versions("iris")
    os.rename(versions / "1.0.0", versions / "swap")
    os.rename(versions / "2.0.0", versions / "1.0.0")
    os.rename(versions / "swap", versions / "2.0.0")
    for path in ("/models/iris/versions/2.0.0", "/models/iris/versions/2.0.0/openapi.json"):
        problem = assert_problem(client.get(path), 409)
        assert "versions/2.0.0 holds the record of iris 1.0.0" in problem["detail"]


def test_a_stray_directory_among_the_models_stops_neither_listing_nor_following(make_client, store):
    client = make_client(store.root)
    (store.layout.models / "iris~").mkdir()  # an editor's backup, or a copy made by hand
    Store(store.root).activate("iris", "2.0.0", reason="rollout", actor="ops", via="cli", accept_breaking=True)
    client.app.state.services.registry.refresh_all()
    assert _serving(client) == "2.0.0"
    assert [model["model"] for model in client.get("/models").json()["models"]] == ["cancer", "iris"]
    assert client.get("/readyz").json()["store_error"] is None


def _put_back(path, data: bytes) -> None:
    """Put ``data`` in place of ``path`` in one rename, so that a worker polling meanwhile reads the old file or
    the new one, never a half-written one (which it would report as garbled, not as an older copy)."""
    temporary = path.with_name(".put-back")
    temporary.write_bytes(data)
    os.replace(temporary, path)


def test_a_real_server_with_two_workers_keeps_serving_when_an_older_pointer_is_put_back(tmp_path, service_models):
    store = build_store(tmp_path / "store", service_models)
    older = store.layout.pointer("iris").read_bytes()
    record = {"records": service_models.iris1.records(service_models.iris1.X[:1])}
    with ServeProcess(tmp_path, "--store", store.root, "--workers", "2", "--poll-interval", "0.2") as server:
        with server.client() as client:
            def all_answer(check, times: int = 12) -> bool:  # requests land on either worker
                return all(check(client) for _ in range(times))

            Store(store.root).activate("iris", "2.0.0", reason="rollout", actor="ops", via="cli",
                                       accept_breaking=True)
            assert _wait_until(lambda: all_answer(lambda c: c.post("/score/iris", json=record).json()["version"]
                                                  == "2.0.0"), 60)
            _put_back(store.layout.pointer("iris"), older)
            assert _wait_until(lambda: all_answer(lambda c: c.get("/readyz").status_code == 503), 60)
            assert all_answer(lambda c: c.post("/score/iris", json=record).json()["version"] == "2.0.0")
            [iris] = [m for m in client.get("/readyz").json()["models"] if m["model"] == "iris"]
            assert "older copy of active.json" in iris["unexplained_pointer"]
    assert any('"pointer_unexplained"' in line for line in server.log_lines())


def test_a_fifo_in_place_of_the_store_lock_is_reported_by_the_poll_while_scoring_goes_on(make_client, store,
                                                                                         service_models):
    client = make_client(store.root)
    store.layout.lock.unlink(missing_ok=True)
    os.mkfifo(store.layout.lock)  # opening it for reading would wait for a writer
    client.app.state.services.registry.refresh_all()
    ready = client.get("/readyz")
    assert ready.status_code == 200 and ready.json()["state"] == "degraded"
    assert f"{store.layout.lock}: the store lock is not a regular file but a FIFO" in ready.json()["store_error"]
    record = {"records": service_models.iris1.records(service_models.iris1.X[:1])}
    assert client.post("/score/iris", json=record).status_code == 200


def test_a_pointer_rebuilt_with_repair_pointer_is_followed_again(make_client, store):
    client = make_client(store.root)
    store.layout.pointer("iris").write_text('{"version": "2.0.0"')
    client.app.state.services.registry.refresh_all()
    assert "not valid" in _unexplained(client)
    Store(store.root).repair_pointer("iris", reason="restored from backup", actor="ops", via="cli")
    client.app.state.services.registry.refresh_all()
    assert client.get("/readyz").status_code == 200
    assert _serving(client) == "1.0.0" and client.get("/models/iris").json()["unexplained_pointer"] is None


def _swap_version_folders(store, first: str, second: str) -> None:
    versions = store.layout.versions("iris")
    os.rename(versions / first, versions / "swap")
    os.rename(versions / second, versions / first)
    os.rename(versions / "swap", versions / second)


def _folder_mismatch(client) -> str:
    ready = assert_problem(client.get("/readyz"), 503)
    [entry] = [model for model in ready["models"] if model["model"] == "iris"]
    assert entry["folder_mismatch"] and "iris" in ready["detail"] and "folder_mismatch" in ready["detail"]
    summary = client.get("/models/iris")
    assert summary.status_code == 200 and summary.json()["folder_mismatch"] == entry["folder_mismatch"]
    return entry["folder_mismatch"]


def test_a_real_server_keeps_serving_the_verified_bundle_when_the_live_folder_is_swapped(tmp_path, service_models):
    store = build_store(tmp_path / "store", service_models)
    record = {"records": service_models.iris1.records(service_models.iris1.X[:3])}
    with ServeProcess(tmp_path, "--store", store.root, "--poll-interval", "0.2") as server:
        with server.client() as client:
            before = client.post("/score/iris", json=record).json()
            _swap_version_folders(store, "1.0.0", "2.0.0")  # versions/1.0.0 now holds 2.0.0's valid bundle
            assert _wait_until(lambda: client.get("/readyz").status_code == 503, 60)
            reason = _folder_mismatch(client)
            assert "the folder of 1.0.0, the active version" in reason and "holds the record of iris 2.0.0" in reason
            assert "serving the bundle of 1.0.0" in reason
            during = client.post("/score/iris", json=record)
            assert during.status_code == 200 and during.json() == before  # 1.0.0's numbers, not 2.0.0's
            _swap_version_folders(store, "1.0.0", "2.0.0")  # restored
            assert _wait_until(lambda: client.get("/readyz").status_code == 200, 60)
            assert client.get("/models/iris").json()["folder_mismatch"] is None
    assert any('"folder_mismatch"' in line for line in server.log_lines())


def test_a_version_whose_folder_fails_its_binding_when_loaded_is_never_served(make_client, store, service_models):
    client = make_client(store.root)
    Store(store.root).activate("iris", "2.0.0", reason="rollout", actor="ops", via="cli", accept_breaking=True)
    bundle = store.layout.bundle("iris", "2.0.0")
    shutil.rmtree(bundle)
    shutil.copytree(store.layout.bundle("iris", "1.0.0"), bundle)  # 1.0.0's bundle under 2.0.0's name
    client.app.state.services.registry.refresh_all()
    assert _serving(client) == "1.0.0"  # the last verified bundle
    reason = _folder_mismatch(client)
    assert "the folder of 2.0.0, the active version" in reason and "holds the bundle of iris 1.0.0" in reason


def test_a_worker_started_on_a_swapped_live_folder_serves_nothing_and_says_why(make_client, store):
    _swap_version_folders(store, "1.0.0", "2.0.0")
    client = make_client(store.root)
    assert client.get("/models/iris").json()["served_by_this_worker"] is None
    assert "no verified bundle of it is loaded in this worker" in _folder_mismatch(client)
