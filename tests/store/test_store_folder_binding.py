"""Version folders are bound to what the history recorded; a store that fails verification refuses every change.

Swapping, copying, adding or deleting version folders by hand is detected by ``history --verify``, by every
load and by every change, with or without signatures required.
"""

from __future__ import annotations

import os
import shutil

import pytest
from store_support import iris_bundle, run_cli, tree_snapshot

from model_store.errors import HistoryError
from model_store.store import Store
from model_store.store.signer import generate_key_files, sign_bundle
from model_store.store.signing import parse_public_key


def _store(root, bundle_factory, *, signed: bool, tmp_path) -> Store:
    """1.2.0 and 1.3.0 published (signed by a trusted key when ``signed``), 1.2.0 active."""
    store = Store(root, create=True)
    bundles = {version: iris_bundle(bundle_factory, version, C=C) for version, C in (("1.2.0", 1.0), ("1.3.0", 8.0))}
    if signed:
        keys = generate_key_files(tmp_path / "ops")
        store.add_trusted_key(parse_public_key(str(keys.public_path)), label="ops", actor="admin")
        for path in bundles.values():
            sign_bundle(path, keys.private_path, "2026-12-01T00:00:00Z")
    for path in bundles.values():
        store.publish(path, actor="publisher")
    store.activate("iris", "1.2.0", reason="first", actor="alice")
    return store


@pytest.fixture(params=[False, True], ids=["unsigned", "signatures-required"])
def store(request, tmp_path, bundle_factory) -> Store:
    return _store(tmp_path / "store", bundle_factory, signed=request.param, tmp_path=tmp_path)


def _swap(store) -> None:
    versions = store.layout.versions("iris")
    os.rename(versions / "1.2.0", versions / "swap")
    os.rename(versions / "1.3.0", versions / "1.2.0")
    os.rename(versions / "swap", versions / "1.3.0")


def _refused_everywhere(store, match: str) -> None:
    before = tree_snapshot(store.root)
    with pytest.raises(HistoryError, match=match):
        store.verify_history("iris")
    with pytest.raises(HistoryError, match=match):
        store.activate("iris", "1.3.0", reason="upgrade", actor="bob")
    assert tree_snapshot(store.root) == before  # refused before anything was written
    assert store.active("iris").version == "1.2.0"


def test_swapped_version_folders_are_detected(store):
    _swap(store)
    _refused_everywhere(store, "versions/1.3.0 holds the record of iris 1.2.0")
    with pytest.raises(HistoryError, match="versions/1.3.0 holds the record of iris 1.2.0"):
        store.load_verified("iris", "1.3.0")  # never 1.2.0's bundle under the name 1.3.0


def test_a_folder_copied_over_another_is_detected(store):
    target = store.layout.version("iris", "1.3.0")
    shutil.rmtree(target)
    shutil.copytree(store.layout.version("iris", "1.2.0"), target)
    _refused_everywhere(store, "versions/1.3.0 holds the record of iris 1.2.0")


def test_a_folder_added_by_hand_is_detected(store):
    shutil.copytree(store.layout.version("iris", "1.3.0"), store.layout.version("iris", "1.4.0"))
    _refused_everywhere(store, "versions/1.4.0 holds the record of iris 1.3.0")


@pytest.mark.parametrize("version", ["1.3.0", "1.2.0"], ids=["inactive", "active"])
def test_a_deleted_version_fails_verification(store, version):
    shutil.rmtree(store.layout.version("iris", version))
    _refused_everywhere(store, f"version {version} was published at seq .* never pruned, but its folder")


def test_a_pruned_version_is_not_reported_as_deleted(store):
    store.activate("iris", "1.3.0", reason="upgrade", actor="alice")
    assert store.prune("iris", keep=0, actor="alice") == []  # active and rollback target are kept
    store.activate("iris", "1.2.0", reason="back", actor="alice")
    store.activate("iris", "1.3.0", reason="again", actor="alice")
    assert store.verify_history("iris") >= 1


def test_activate_exits_1_while_history_verify_exits_1(tmp_path, bundle_factory):
    store = _store(tmp_path / "store", bundle_factory, signed=False, tmp_path=tmp_path)
    _swap(store)
    root = str(store.root)
    assert run_cli("history", "iris", "--store", root, "--verify").returncode == 1
    result = run_cli("activate", "iris", "1.3.0", "--store", root, "--reason", "upgrade")
    assert result.returncode == 1 and "versions/1.3.0 holds the record of iris 1.2.0" in result.stderr
