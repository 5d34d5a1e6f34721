"""Activation and rollback: re-verified, atomic, serialised, recorded."""

from __future__ import annotations

import json

import pytest
from store_support import break_golden_vectors, flip_byte, iris_bundle, start_python, trail_lines, wait_until

from model_store.digest import canonical_json, sha256_bytes
from model_store.errors import (
    CheckFailedError,
    HistoryError,
    InputError,
    IntegrityError,
    LockTimeoutError,
    NotFoundError,
)
from model_store.store import Store
from model_store.store.locking import exclusive_lock


@pytest.fixture
def store(tmp_path, bundle_factory):
    store = Store(tmp_path / "store", create=True)
    for version, C in (("1.0.0", 1.0), ("1.1.0", 2.0), ("1.2.0", 4.0)):
        store.publish(iris_bundle(bundle_factory, version, C=C), actor="publisher")
    return store


def test_activate_moves_the_pointer_and_records_who_and_why(store):
    entry = store.activate("iris", "1.1.0", reason="canary passed", actor="alice")
    active = store.active("iris")
    assert (entry["action"], entry["version"], entry["actor"], entry["reason"]) == (
        "activate", "1.1.0", "alice", "canary passed"
    )
    assert (active.version, active.digest, active.activated_at, active.history_head) == (
        "1.1.0", entry["digest"], entry["time"], entry["hash"]
    )


def test_no_version_is_active_before_the_first_activation(store):
    assert store.active("iris") is None


def test_a_corrupted_stored_array_is_refused_and_the_active_version_kept(store):
    store.activate("iris", "1.0.0", reason="first release", actor="alice")
    flip_byte(store.bundle_dir("iris", "1.1.0") / "support_vectors.npy")
    with pytest.raises(IntegrityError, match="support_vectors.npy"):
        store.activate("iris", "1.1.0", reason="upgrade", actor="bob")
    assert store.active("iris").version == "1.0.0"
    refused = store.history("iris")[-1]
    assert (refused["action"], refused["version"], refused["actor"]) == ("refused-activate", "1.1.0", "bob")
    assert "upgrade" in refused["reason"] and "support_vectors.npy" in refused["reason"]
    assert store.verify_history("iris") == 5


def test_a_bundle_and_its_record_rewritten_consistently_refuse_every_change(store):
    """Checksums, manifest and version record all rewritten to agree: only the publish entry in the hash-chained
    history still names the original digest, so the store fails verification and refuses to change anything."""
    store.activate("iris", "1.0.0", reason="first release", actor="alice")
    version_dir = store.layout.version("iris", "1.1.0")
    manifest = break_golden_vectors(version_dir / "bundle")
    record = json.loads((version_dir / "published.json").read_text())
    record["digest"] = sha256_bytes(canonical_json(manifest))
    (version_dir / "published.json").write_text(json.dumps(record))
    trail = store.layout.history("iris").read_bytes()
    with pytest.raises(HistoryError, match="1.1.0"):
        store.verify_history("iris")
    for change in (
        lambda: store.activate("iris", "1.1.0", reason="upgrade", actor="bob"),
        lambda: store.activate("iris", "1.2.0", reason="another version", actor="bob"),
        lambda: store.prune("iris", keep=5, actor="bob"),
    ):
        with pytest.raises(HistoryError, match="entry seq 2 is publish 1.1.0"):
            change()
    assert store.active("iris").version == "1.0.0"
    assert store.layout.history("iris").read_bytes() == trail  # nothing written: the evidence stays


def test_a_stored_manifest_changed_after_publishing_refuses_changes(store):
    manifest_path = store.bundle_dir("iris", "1.1.0") / "manifest.json"
    manifest = json.loads(manifest_path.read_text())
    manifest["creator"] = "someone else"
    manifest_path.write_text(json.dumps(manifest))
    with pytest.raises(HistoryError, match="published with"):
        store.activate("iris", "1.1.0", reason="upgrade", actor="bob")
    with pytest.raises(HistoryError, match="published with"):
        store.load_verified("iris", "1.1.0")
    assert store.active("iris") is None


def test_activating_a_version_that_is_not_stored_is_not_found(store):
    with pytest.raises(NotFoundError, match="9.9.9"):
        store.activate("iris", "9.9.9", reason="typo", actor="alice")


@pytest.mark.parametrize("reason", ["", "   ", "two\nlines"])
def test_activate_needs_a_one_line_reason(store, reason):
    with pytest.raises(InputError):
        store.activate("iris", "1.0.0", reason=reason, actor="alice")
    assert store.active("iris") is None


def test_a_blank_reason_is_named_as_the_reason_field_not_as_a_command_line_flag(store):
    """The same text reaches CLI users and HTTP clients (whose field is "reason"), so it names no flag."""
    with pytest.raises(InputError) as caught:
        store.activate("iris", "1.0.0", reason="   ", actor="alice")
    assert str(caught.value).startswith("reason must not be empty")
    assert "--" not in str(caught.value)


def test_an_empty_actor_is_named_as_the_actor(store):
    with pytest.raises(InputError) as caught:
        store.activate("iris", "1.0.0", reason="canary passed", actor="  ")
    assert str(caught.value).startswith("actor must not be empty")
    assert "reason" not in str(caught.value) and "explanation" not in str(caught.value)


def test_rollback_returns_to_the_version_active_before_the_current_one(store):
    store.activate("iris", "1.0.0", reason="first", actor="alice")
    store.activate("iris", "1.2.0", reason="second", actor="alice")
    entry = store.rollback("iris", reason="error rate up", actor="bob")
    assert (entry["action"], entry["version"]) == ("rollback", "1.0.0")
    assert store.active("iris").version == "1.0.0"


def test_rolling_back_twice_goes_back_two_activations_not_forward(store):
    for version in ("1.0.0", "1.1.0", "1.2.0"):
        store.activate("iris", version, reason="release", actor="alice")
    store.rollback("iris", reason="1.2.0 bad", actor="bob")
    store.rollback("iris", reason="1.1.0 bad too", actor="bob")
    assert store.active("iris").version == "1.0.0"


def test_reactivating_the_active_version_does_not_become_a_rollback_target(store):
    store.activate("iris", "1.0.0", reason="first", actor="alice")
    store.activate("iris", "1.1.0", reason="second", actor="alice")
    store.activate("iris", "1.1.0", reason="re-verified after an incident", actor="alice")
    assert store.rollback("iris", reason="back", actor="bob")["version"] == "1.0.0"


def test_rollback_with_nothing_to_return_to_is_refused(store):
    store.activate("iris", "1.0.0", reason="first", actor="alice")
    with pytest.raises(CheckFailedError, match="only version ever made active"):
        store.rollback("iris", reason="panic", actor="bob")
    assert store.active("iris").version == "1.0.0"


def test_rollback_re_verifies_its_target(store):
    store.activate("iris", "1.0.0", reason="first", actor="alice")
    store.activate("iris", "1.1.0", reason="second", actor="alice")
    flip_byte(store.bundle_dir("iris", "1.0.0") / "dual_coef.npy")
    with pytest.raises(IntegrityError):
        store.rollback("iris", reason="error rate up", actor="bob")
    assert store.active("iris").version == "1.1.0"
    assert store.history("iris")[-1]["action"] == "refused-rollback"


def test_a_change_waits_for_the_lock_and_gives_up_after_the_timeout(store):
    impatient = Store(store.root, lock_timeout=0.2)
    with exclusive_lock(store.layout.lock, timeout=1.0):
        with pytest.raises(LockTimeoutError) as caught:
            impatient.activate("iris", "1.0.0", reason="first", actor="alice")
    assert caught.value.exit_code == 1
    assert store.active("iris") is None


_ACTIVATOR = """
import pathlib, sys, time
from model_store.store import Store
root, go, ready, version, reason, actor = sys.argv[1:]
store = Store(pathlib.Path(root), lock_timeout=60)
pathlib.Path(ready).touch()
for _ in range(3000):  # bounded wait for the common start signal
    if pathlib.Path(go).exists():
        break
    time.sleep(0.01)
store.activate("iris", version, reason=reason, actor=actor)
"""


def test_ten_concurrent_activations_are_serialised_with_nothing_lost(store, tmp_path):
    versions = ["1.0.0", "1.1.0", "1.2.0"]
    go = tmp_path / "go"
    processes = []
    for index in range(10):
        ready = tmp_path / f"ready-{index}"
        processes.append((ready, start_python(
            _ACTIVATOR, str(store.root), str(go), str(ready), versions[index % 3], f"reason {index}", f"operator-{index}"
        )))
    wait_until(lambda: all(ready.exists() for ready, _ in processes), "all ten activators to be ready")
    go.touch()
    for _, process in processes:
        _, stderr = process.communicate(timeout=120)
        assert process.returncode == 0, stderr

    lines = trail_lines(store, "iris")
    entries = [json.loads(line) for line in lines]  # every line is one whole entry: nothing interleaved
    activations = [entry for entry in entries if entry["action"] == "activate"]
    assert sorted(entry["reason"] for entry in activations) == sorted(f"reason {index}" for index in range(10))
    assert sorted(entry["actor"] for entry in activations) == sorted(f"operator-{index}" for index in range(10))
    assert [entry["seq"] for entry in entries] == list(range(1, 14))
    assert store.verify_history("iris") == 13
    assert store.active("iris").version == activations[-1]["version"]
    assert store.active("iris").history_head == entries[-1]["hash"]
