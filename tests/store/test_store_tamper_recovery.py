"""Deleting the pointer or the trail is tampering: it is reported, never "recovered" by the next change.

Every model has an active pointer from before its first history entry (the genesis pointer: no active
version, head = the genesis hash, seq 0), and every stored version's ``published.json`` names the seq
of its publish entry. So a missing pointer beside a trail, or stored versions the trail does not
record, cannot be left by a crash; only the one version stored right after the trail's last entry
(its publisher was killed before it wrote the entry) is completed by the next change.
"""

from __future__ import annotations

import json
import shutil

import pytest
from store_support import iris_bundle, run_cli, trail_lines, tree_snapshot, two_releases, write_trail_lines

from model_store.errors import HistoryError, StoreError
from model_store.store import Store
from model_store.store.history import GENESIS


@pytest.fixture
def store(tmp_path, bundle_factory):
    """Four entries: publish 1.0.0, publish 1.1.0, activate 1.0.0, activate 1.1.0."""
    return two_releases(tmp_path / "store", bundle_factory)


def _cut_tail_and_pointer(store) -> None:
    """The reviewer's case A: the last two entries and active.json deleted."""
    write_trail_lines(store, "iris", trail_lines(store, "iris")[:-2])
    store.layout.pointer("iris").unlink()


def _delete_trail_and_pointer(store) -> None:
    """The reviewer's case B: history.jsonl and active.json deleted, both versions still stored."""
    store.layout.history("iris").unlink()
    store.layout.pointer("iris").unlink()


def _verify_error(store) -> str:
    with pytest.raises(HistoryError) as caught:
        store.verify_history("iris")
    return str(caught.value)


def test_a_new_model_has_its_genesis_pointer_before_its_first_entry(tmp_path, bundle_factory):
    seen = {}

    def step(name: str) -> None:
        if name == "staged":  # lock held, the version not yet stored, no entry written
            seen["pointer"] = json.loads(store.layout.pointer("iris").read_text())
            seen["trail"] = store.layout.history("iris").exists()

    store = Store(tmp_path / "store", create=True, publish_step=step)
    store.publish(iris_bundle(bundle_factory, "1.0.0"), actor="alice")
    assert seen["trail"] is False
    assert seen["pointer"] == {"version": None, "digest": None, "activated_at": None,
                               "history_head": GENESIS, "history_seq": 0}


def test_a_deleted_pointer_beside_a_trail_is_reported_as_tampering(store):
    _cut_tail_and_pointer(store)
    message = _verify_error(store)
    assert "active.json" in message and "deleted" in message
    assert "next change" not in message  # no promise that it will be repaired


def test_the_next_change_refuses_a_trail_whose_pointer_was_deleted(store):
    _cut_tail_and_pointer(store)
    before = tree_snapshot(store.root)
    with pytest.raises(HistoryError, match="active.json"):
        store.prune("iris", keep=5, actor="mallory")  # removes nothing, but used to rebuild the pointer
    assert tree_snapshot(store.root) == before  # no pointer written, no entry appended: the evidence stays


def test_case_a_stays_detected_through_the_cli(store):
    _cut_tail_and_pointer(store)
    root = str(store.root)
    assert run_cli("history", "iris", "--store", root, "--verify").returncode == 1
    prune = run_cli("prune", "iris", "--store", root, "--keep", "5", "--actor", "mallory")
    assert prune.returncode == 1 and "active.json" in prune.stderr
    assert run_cli("history", "iris", "--store", root, "--verify").returncode == 1


def test_stored_versions_without_a_trail_are_reported(store):
    _delete_trail_and_pointer(store)
    message = _verify_error(store)
    assert "1.1.0" in message and "publish seq 2" in message


def test_the_next_change_refuses_to_make_up_publish_entries_for_a_deleted_trail(store):
    _delete_trail_and_pointer(store)
    before = tree_snapshot(store.root)
    with pytest.raises(HistoryError, match="1.1.0"):
        store.activate("iris", "1.0.0", reason="after the deletion", actor="mallory")
    assert tree_snapshot(store.root) == before
    assert not store.layout.history("iris").exists()


def _copy_version(store, source: str, target: str, publish_seq: int) -> None:
    """A version directory added by hand, with a published.json naming ``publish_seq``."""
    shutil.copytree(store.layout.version("iris", source), store.layout.version("iris", target))
    record_path = store.layout.record("iris", target)
    record = json.loads(record_path.read_text())
    record.update(version=target, publish_seq=publish_seq)
    record_path.write_text(json.dumps(record))


def test_a_version_whose_publish_seq_names_another_entry_is_reported(store):
    _copy_version(store, "1.1.0", "9.9.9", publish_seq=3)  # seq 3 is the activation of 1.0.0
    message = _verify_error(store)
    assert "versions/9.9.9 holds the bundle of iris 1.1.0" in message


def test_a_version_record_with_a_rewritten_digest_is_reported(store):
    record_path = store.layout.record("iris", "1.0.0")
    record = json.loads(record_path.read_text())
    record["digest"] = "ab" * 32
    record_path.write_text(json.dumps(record))
    message = _verify_error(store)
    assert "versions/1.0.0" in message and "published with abababab" in message


def test_a_version_record_with_a_non_integer_publish_seq_is_a_clear_error(store):
    record_path = store.layout.record("iris", "1.1.0")
    record = json.loads(record_path.read_text())
    record["publish_seq"] = "2"
    record_path.write_text(json.dumps(record))
    with pytest.raises(StoreError, match="1.1.0/published.json: the version record is malformed"):
        store.verify_history("iris")


def test_only_a_version_stored_right_after_the_last_entry_is_recorded_as_interrupted(store):
    _copy_version(store, "1.1.0", "9.9.9", publish_seq=7)  # the trail ends at seq 4: seq 5 would be next
    before = tree_snapshot(store.root)
    with pytest.raises(HistoryError, match="9.9.9"):
        store.prune("iris", keep=5, actor="bob")
    assert tree_snapshot(store.root) == before


def _legacy_interrupted_first_publish(tmp_path, bundle_factory) -> Store:
    """What a store made before genesis pointers holds after its first publish was killed after the
    rename: the version (publish seq 1), no trail and no pointer."""
    store = Store(tmp_path / "legacy", create=True)
    store.publish(iris_bundle(bundle_factory, "1.0.0"), actor="killed-publisher")
    store.layout.history("iris").unlink()
    store.layout.pointer("iris").unlink()
    return store


def test_a_legacy_interrupted_first_publish_is_reported_as_interrupted(tmp_path, bundle_factory):
    store = _legacy_interrupted_first_publish(tmp_path, bundle_factory)
    message = _verify_error(store)
    assert "1.0.0" in message and "next change to this model records it" in message


def test_a_legacy_interrupted_first_publish_is_completed_by_the_next_change(tmp_path, bundle_factory):
    store = _legacy_interrupted_first_publish(tmp_path, bundle_factory)
    store.activate("iris", "1.0.0", reason="after the upgrade", actor="bob")
    actions = [(entry["action"], entry["version"], entry["actor"]) for entry in store.history("iris")]
    assert actions == [("publish", "1.0.0", "killed-publisher"), ("activate", "1.0.0", "bob")]
    assert store.history("iris")[0]["reason"].startswith("recovered:")
    assert store.verify_history("iris") == 2
