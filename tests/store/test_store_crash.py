"""A publisher or writer killed at any moment leaves a consistent store, and the next change completes it.

The publisher runs in a subprocess whose publish hook pauses at a chosen step; the test then sends
SIGKILL (no cleanup code runs, as with a crash or an OOM kill) and inspects the store.
"""

from __future__ import annotations

import os
import signal
from pathlib import Path

import pytest
from store_support import iris_bundle, start_python, trail_lines, wait_until

from model_store.bundle import load_bundle
from model_store.errors import HistoryError, NotFoundError
from model_store.store import Store
from model_store.store.history import append_entries, make_entry

_PAUSING_PUBLISHER = """
import pathlib, sys, time
from model_store.store import Store
root, bundle, marker, pause_at = sys.argv[1:]
def step(name):
    if name == pause_at:
        pathlib.Path(marker).write_text(name)
        time.sleep(600)
Store(pathlib.Path(root), publish_step=step).publish(pathlib.Path(bundle), actor="killed-publisher")
"""


@pytest.fixture
def store(tmp_path, bundle_factory):
    store = Store(tmp_path / "store", create=True)
    store.publish(iris_bundle(bundle_factory, "1.0.0", C=1.0), actor="alice")
    store.activate("iris", "1.0.0", reason="first release", actor="alice")
    return store


def _kill_publisher_at(store: Store, bundle: Path, step: str, tmp_path: Path) -> None:
    marker = tmp_path / f"paused-{step.replace(' ', '-')}"
    process = start_python(_PAUSING_PUBLISHER, str(store.root), str(bundle), str(marker), step)
    try:
        wait_until(lambda: marker.exists() or process.poll() is not None, f"the publisher to reach {step!r}")
        assert marker.exists(), process.communicate()[1]
    finally:
        os.kill(process.pid, signal.SIGKILL)
        process.communicate()
    assert process.returncode == -signal.SIGKILL


def test_sigkill_mid_copy_leaves_no_version_and_a_verifying_history(store, bundle_factory, tmp_path):
    _kill_publisher_at(store, iris_bundle(bundle_factory, "1.1.0", C=2.0), "staging support_vectors.npy", tmp_path)
    staged = list(store.layout.staging.iterdir())
    assert len(staged) == 1 and (staged[0] / "bundle" / "manifest.json").exists()  # killed mid-copy indeed
    assert [info.version for info in store.versions("iris")] == ["1.0.0"]
    with pytest.raises(NotFoundError):
        store.bundle_dir("iris", "1.1.0")
    assert store.active("iris").version == "1.0.0"
    assert store.verify_history("iris") == 2


def test_the_killed_publishers_lock_is_released_and_its_leftovers_removed(store, bundle_factory, tmp_path):
    bundle = iris_bundle(bundle_factory, "1.1.0", C=2.0)
    _kill_publisher_at(store, bundle, "staging support_vectors.npy", tmp_path)
    # A short timeout: the kernel dropped the dead publisher's flock, so the lock is free at once.
    retry = Store(store.root, lock_timeout=5.0)
    outcome = retry.publish(bundle, actor="alice")
    assert not outcome.already_present
    assert list(store.layout.staging.iterdir()) == []
    assert retry.load_verified("iris", "1.1.0").digest == outcome.digest
    assert retry.verify_history("iris") == 3


def test_a_reader_never_sees_the_half_written_version_while_it_is_being_copied(store, bundle_factory, tmp_path):
    marker = tmp_path / "paused"
    bundle = iris_bundle(bundle_factory, "1.1.0", C=2.0)
    process = start_python(_PAUSING_PUBLISHER, str(store.root), str(bundle), str(marker), "staged")
    try:
        wait_until(lambda: marker.exists() or process.poll() is not None, "the publisher to finish staging")
        reader = Store(store.root)
        assert [info.version for info in reader.versions("iris")] == ["1.0.0"]
        for info in reader.versions("iris"):
            reader.load_verified("iris", info.version)
        assert reader.history("iris")[-1]["action"] == "activate"
    finally:
        os.kill(process.pid, signal.SIGKILL)
        process.communicate()


def test_killed_after_the_rename_the_version_is_complete_and_the_next_change_records_it(store, bundle_factory, tmp_path):
    bundle = iris_bundle(bundle_factory, "1.1.0", C=2.0)
    _kill_publisher_at(store, bundle, "stored", tmp_path)
    assert [info.version for info in store.versions("iris")] == ["1.0.0", "1.1.0"]
    load_bundle(store.layout.bundle("iris", "1.1.0")).self_test()  # complete and verifying ...
    with pytest.raises(HistoryError, match="next change records it"):
        store.load_verified("iris", "1.1.0")  # ... but not served before the history records it
    assert [entry["action"] for entry in store.history("iris")] == ["publish", "activate"]

    store.activate("iris", "1.1.0", reason="after the crash", actor="bob")
    actions = [(entry["action"], entry["version"], entry["actor"]) for entry in store.history("iris")]
    assert actions[2:] == [("publish", "1.1.0", "killed-publisher"), ("activate", "1.1.0", "bob")]
    assert store.history("iris")[2]["reason"].startswith("recovered:")
    assert store.verify_history("iris") == 4


def test_a_first_publish_killed_after_the_rename_is_recorded_by_the_next_change(tmp_path, bundle_factory):
    root = tmp_path / "new-store"
    Store(root, create=True)
    bundle = iris_bundle(bundle_factory, "1.0.0")
    _kill_publisher_at(Store(root), bundle, "stored", tmp_path)  # a new model: only its genesis pointer so far
    store = Store(root)
    assert store.publish(bundle, actor="alice").already_present
    [entry] = store.history("iris")
    assert (entry["action"], entry["actor"]) == ("publish", "killed-publisher")
    assert entry["reason"].startswith("recovered:")
    assert store.verify_history("iris") == 1


def test_entries_written_before_the_pointer_update_are_reported_then_completed(store):
    # What a writer killed between appending its entry and replacing the pointer leaves behind.
    last = store.history("iris")[-1]
    orphan = make_entry(last, time=last["time"], actor="killed", via="cli", action="activate", version="1.0.0",
                        digest=last["digest"], reason="interrupted")
    append_entries(store.layout.history("iris"), [orphan])
    with pytest.raises(HistoryError, match="interrupted command"):
        store.verify_history("iris")

    store.prune("iris", keep=5, actor="bob")  # any change completes the interrupted one first
    last = store.history("iris")[-1]
    assert (last["action"], last["actor"]) == ("recover", "bob")
    assert "seq 3" in last["reason"]
    assert store.verify_history("iris") == 4


def test_an_unfinished_last_line_is_dropped_by_the_next_change(store):
    path = store.layout.history("iris")
    path.write_bytes(path.read_bytes() + b'{"seq": 3, "time": "2026-')  # killed mid-append
    with pytest.raises(HistoryError, match="line 3"):
        store.verify_history("iris")
    assert len(store.history("iris")) == 2  # readers skip it

    store.activate("iris", "1.0.0", reason="re-check", actor="bob")
    assert [entry["action"] for entry in store.history("iris")][2:] == ["recover", "activate"]
    assert all(line.startswith(b"{") and line.endswith(b"}") for line in trail_lines(store, "iris"))
    assert store.verify_history("iris") == 4
