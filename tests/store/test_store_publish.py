"""Publishing: verified, atomic, immutable; a bundle directory or its single-file form."""

from __future__ import annotations

import json
import re

import pytest
from store_support import RFC3339_UTC, break_golden_vectors, flip_byte, iris_bundle, trail_lines, tree_snapshot

from model_store.archive import pack_directory
from model_store.digest import canonical_json, sha256_bytes
from model_store.errors import GoldenMismatchError, IntegrityError, NotFoundError, StoreError, VersionConflictError
from model_store.store import Store


@pytest.fixture
def store(tmp_path):
    return Store(tmp_path / "store", create=True)


def test_published_version_is_a_byte_copy_of_the_bundle(store, bundle_factory):
    source = iris_bundle(bundle_factory, "1.0.0")
    outcome = store.publish(source, actor="alice")
    stored = store.bundle_dir("iris", "1.0.0")
    assert (outcome.name, outcome.version, outcome.already_present) == ("iris", "1.0.0", False)
    assert tree_snapshot(stored) == tree_snapshot(source)


def test_publish_accepts_the_single_file_form(store, bundle_factory, tmp_path):
    source = iris_bundle(bundle_factory, "1.0.0")
    archive = tmp_path / "iris-1.0.0.tar"
    pack_directory(source, archive)
    store.publish(archive, actor="alice")
    assert tree_snapshot(store.bundle_dir("iris", "1.0.0")) == tree_snapshot(source)


def test_publish_records_an_entry_and_version_metadata(store, bundle_factory):
    source = iris_bundle(bundle_factory, "1.0.0")
    outcome = store.publish(source, actor="alice")
    [entry] = store.history("iris")
    [info] = store.versions("iris")
    manifest = json.loads((source / "manifest.json").read_text())
    assert (entry["action"], entry["version"], entry["digest"], entry["actor"]) == (
        "publish", "1.0.0", outcome.digest, "alice"
    )
    assert info.created == manifest["created"]
    assert info.digest == outcome.digest and not info.active
    assert re.fullmatch(RFC3339_UTC, info.published_at)


def test_same_name_version_and_digest_is_a_no_op(store, bundle_factory):
    source = iris_bundle(bundle_factory, "1.0.0")
    store.publish(source, actor="alice")
    before = tree_snapshot(store.root)
    outcome = store.publish(source, actor="bob")
    assert outcome.already_present
    assert tree_snapshot(store.root) == before  # not even a history entry


def test_same_version_with_other_digest_is_refused_and_the_stored_one_kept(store, bundle_factory):
    store.publish(iris_bundle(bundle_factory, "1.0.0", C=1.0), actor="alice")
    stored_before = tree_snapshot(store.layout.version("iris", "1.0.0"))
    with pytest.raises(VersionConflictError, match="already published"):
        store.publish(iris_bundle(bundle_factory, "1.0.0", C=5.0), actor="mallory")
    assert tree_snapshot(store.layout.version("iris", "1.0.0")) == stored_before
    last = store.history("iris")[-1]
    assert (last["action"], last["actor"]) == ("refused-publish", "mallory")
    assert store.verify_history("iris") == 2


def test_a_pruned_version_name_is_never_reused_for_other_content(store, bundle_factory):
    for version in ("1.0.0", "1.1.0", "1.2.0"):
        store.publish(iris_bundle(bundle_factory, version, C=1.0 + len(version)), actor="alice")
    store.activate("iris", "1.2.0", reason="latest", actor="alice")
    assert store.prune("iris", keep=1, actor="alice") == ["1.0.0", "1.1.0"]
    with pytest.raises(VersionConflictError, match="pruned"):
        store.publish(iris_bundle(bundle_factory, "1.0.0", C=9.0), actor="alice")


def test_republishing_a_pruned_version_with_its_original_digest_restores_it(store, bundle_factory):
    first = iris_bundle(bundle_factory, "1.0.0", C=1.0)
    store.publish(first, actor="alice")
    store.publish(iris_bundle(bundle_factory, "1.1.0", C=2.0), actor="alice")
    store.activate("iris", "1.1.0", reason="latest", actor="alice")
    store.prune("iris", keep=0, actor="alice")
    outcome = store.publish(first, actor="alice")
    assert not outcome.already_present
    assert [info.version for info in store.versions("iris")] == ["1.1.0", "1.0.0"]  # publish order


def test_a_damaged_bundle_is_refused_before_the_store_is_touched(store, bundle_factory):
    source = iris_bundle(bundle_factory, "1.0.0")
    flip_byte(source / "dual_coef.npy")
    before = tree_snapshot(store.root)
    with pytest.raises(IntegrityError, match="dual_coef.npy"):
        store.publish(source, actor="alice")
    assert tree_snapshot(store.root) == before


def test_a_damaged_bundle_of_a_stored_model_is_refused_and_recorded(store, bundle_factory):
    store.publish(iris_bundle(bundle_factory, "1.0.0", C=1.0), actor="alice")
    source = iris_bundle(bundle_factory, "1.1.0", C=2.0)
    flip_byte(source / "dual_coef.npy")
    with pytest.raises(IntegrityError, match="dual_coef.npy"):
        store.publish(source, actor="mallory")
    last = store.history("iris")[-1]
    assert (last["action"], last["version"], last["actor"]) == ("refused-publish", "1.1.0", "mallory")
    assert "dual_coef.npy" in last["reason"]
    assert [info.version for info in store.versions("iris")] == ["1.0.0"]
    assert store.verify_history("iris") == 2


def test_a_bundle_failing_its_golden_vectors_for_a_stored_model_is_refused_and_recorded(store, bundle_factory):
    store.publish(iris_bundle(bundle_factory, "1.0.0", C=1.0), actor="alice")
    source = iris_bundle(bundle_factory, "1.1.0", C=2.0)
    manifest = break_golden_vectors(source)
    with pytest.raises(GoldenMismatchError):
        store.publish(source, actor="mallory")
    last = store.history("iris")[-1]
    assert (last["action"], last["version"], last["actor"]) == ("refused-publish", "1.1.0", "mallory")
    # the digest the bundle claims: SHA-256 (FIPS 180-4) of its canonical manifest
    assert last["digest"] == sha256_bytes(canonical_json(manifest))
    assert store.verify_history("iris") == 2


def test_a_failing_bundle_of_a_new_model_leaves_no_model_behind(store, bundle_factory):
    source = iris_bundle(bundle_factory, "1.0.0")
    break_golden_vectors(source)
    with pytest.raises(GoldenMismatchError):
        store.publish(source, actor="alice")
    assert not store.layout.model("iris").exists()


def test_publishing_a_missing_path_is_not_found(store, tmp_path):
    with pytest.raises(NotFoundError):
        store.publish(tmp_path / "nothing-here", actor="alice")


def test_versions_are_listed_in_publish_order_with_the_active_one_marked(store, bundle_factory):
    for version, C in (("2.0.0", 1.0), ("1.5.0", 2.0), ("10.0.0", 3.0)):
        store.publish(iris_bundle(bundle_factory, version, C=C), actor="alice")
    store.activate("iris", "1.5.0", reason="canary passed", actor="alice")
    listed = [(info.version, info.active) for info in store.versions("iris")]
    assert listed == [("2.0.0", False), ("1.5.0", True), ("10.0.0", False)]
    assert store.models() == ["iris"]


def test_an_unknown_model_is_not_found(store):
    with pytest.raises(NotFoundError, match="no model 'wine'"):
        store.versions("wine")


def test_opening_a_missing_directory_is_a_store_error(tmp_path):
    with pytest.raises(StoreError, match="does not exist"):
        Store(tmp_path / "absent")


def test_opening_a_directory_with_foreign_files_is_a_store_error(tmp_path):
    (tmp_path / "notes.txt").write_text("not a store")
    with pytest.raises(StoreError, match="not an rbfgate store"):
        Store(tmp_path, create=True)


def test_opening_foreign_settings_is_a_store_error(tmp_path):
    (tmp_path / "rbfgate-store.json").write_text('{"kind": "something-else"}')
    with pytest.raises(StoreError, match="not rbfgate store settings"):
        Store(tmp_path)


def test_the_history_trail_is_one_json_object_per_line(store, bundle_factory):
    store.publish(iris_bundle(bundle_factory, "1.0.0"), actor="alice")
    store.activate("iris", "1.0.0", reason="first", actor="alice")
    lines = trail_lines(store, "iris")
    assert [json.loads(line)["seq"] for line in lines] == [1, 2]
