"""Retention: prune keeps the newest versions, the active one and the rollback target, and records removals."""

from __future__ import annotations

import pytest
from store_support import iris_bundle

from model_store.errors import CheckFailedError, InputError
from model_store.store import Store

VERSIONS = ["1.0.0", "1.1.0", "1.2.0", "1.3.0", "1.4.0"]


@pytest.fixture
def store(tmp_path, bundle_factory):
    store = Store(tmp_path / "store", create=True)
    for index, version in enumerate(VERSIONS):
        store.publish(iris_bundle(bundle_factory, version, C=1.0 + index), actor="publisher")
    return store


def _stored(store) -> list[str]:
    return [info.version for info in store.versions("iris")]


def test_prune_keeps_the_newest_versions(store):
    removed = store.prune("iris", keep=2, actor="ops")
    assert removed == ["1.0.0", "1.1.0", "1.2.0"]
    assert _stored(store) == ["1.3.0", "1.4.0"]


def test_prune_never_removes_the_active_version_or_the_rollback_target(store):
    store.activate("iris", "1.0.0", reason="first", actor="alice")
    store.activate("iris", "1.1.0", reason="second", actor="alice")
    removed = store.prune("iris", keep=1, actor="ops")
    assert removed == ["1.2.0", "1.3.0"]
    assert _stored(store) == ["1.0.0", "1.1.0", "1.4.0"]
    assert store.rollback("iris", reason="still possible", actor="bob")["version"] == "1.0.0"


def test_prune_keep_zero_keeps_only_the_protected_versions(store):
    store.activate("iris", "1.2.0", reason="first", actor="alice")
    store.prune("iris", keep=0, actor="ops")
    assert _stored(store) == ["1.2.0"]


def test_prune_records_each_removal_with_its_digest(store):
    digests = {info.version: info.digest for info in store.versions("iris")}
    removed = store.prune("iris", keep=3, actor="ops")
    entries = [entry for entry in store.history("iris") if entry["action"] == "prune"]
    assert [(entry["version"], entry["digest"], entry["actor"]) for entry in entries] == [
        (version, digests[version], "ops") for version in removed
    ]
    assert "--keep 3" in entries[0]["reason"]
    assert store.verify_history("iris") == len(VERSIONS) + len(removed)


def test_prune_with_nothing_to_remove_changes_nothing(store):
    before = store.history("iris")
    assert store.prune("iris", keep=10, actor="ops") == []
    assert store.history("iris") == before


def test_prune_refuses_a_negative_count(store):
    with pytest.raises(InputError, match="--keep"):
        store.prune("iris", keep=-1, actor="ops")


def test_rollback_to_a_version_pruned_deeper_in_the_stack_is_refused(store):
    for version in ("1.0.0", "1.1.0", "1.2.0"):
        store.activate("iris", version, reason="release", actor="alice")
    store.prune("iris", keep=0, actor="ops")  # removes 1.0.0: it is two activations back
    store.rollback("iris", reason="1.2.0 bad", actor="bob")
    with pytest.raises(CheckFailedError, match="pruned"):
        store.rollback("iris", reason="1.1.0 bad too", actor="bob")
    assert store.active("iris").version == "1.1.0"
    assert store.history("iris")[-1]["action"] == "refused-rollback"
