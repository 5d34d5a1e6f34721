"""Trust changes are hash-chained history entries: a key removed by hand cannot silently end signature checks."""

from __future__ import annotations

import json

import pytest
from store_support import iris_bundle, run_cli

from model_store.errors import HistoryError
from model_store.store import Store
from model_store.store.signer import generate_key_files, sign_bundle
from model_store.store.signing import parse_public_key


@pytest.fixture
def signed_store(tmp_path, bundle_factory):
    """A store trusting one key, with a signed 1.0.0 published and active; returns (store, key files)."""
    store = Store(tmp_path / "store", create=True)
    keys = generate_key_files(tmp_path / "ops")
    store.add_trusted_key(parse_public_key(str(keys.public_path)), label="ops team", actor="admin", via="cli")
    bundle = iris_bundle(bundle_factory, "1.0.0")
    sign_bundle(bundle, keys.private_path, "2026-12-01T00:00:00Z")
    store.publish(bundle, actor="publisher")
    store.activate("iris", "1.0.0", reason="first", actor="alice")
    return store, keys


def test_adding_and_removing_a_key_are_recorded_with_who_and_through_what(signed_store):
    store, keys = signed_store
    key_id = store.trusted_keys()[0].key_id
    store.remove_trusted_key(key_id, actor="mallory", via="cli")
    entries = store.trust_history()
    assert [(entry["action"], entry["key_id"], entry["actor"], entry["via"]) for entry in entries] == [
        ("trust-add", key_id, "admin", "cli"), ("trust-remove", key_id, "mallory", "cli")]
    assert "signatures are no longer required" in entries[-1]["reason"]


def test_the_trust_history_command_shows_the_removal(signed_store):
    store, _ = signed_store
    key_id = store.trusted_keys()[0].key_id
    assert run_cli("trust", "remove", key_id, "--store", str(store.root), "--actor", "mallory").returncode == 0
    result = run_cli("trust", "history", "--store", str(store.root))
    last = result.stdout.splitlines()[-1]
    assert "trust-remove" in last and f"key {key_id}" in last and "by mallory via cli" in last


def _remove_key_by_hand(store) -> None:
    settings = json.loads(store.layout.settings.read_text())
    settings["trusted_keys"] = []
    store.layout.settings.write_text(json.dumps(settings))


def test_a_key_removed_from_the_settings_by_hand_refuses_unsigned_publishes(signed_store, bundle_factory):
    store, _ = signed_store
    _remove_key_by_hand(store)
    with pytest.raises(HistoryError, match="no longer trusts .*which no trust-remove entry removed"):
        store.publish(iris_bundle(bundle_factory, "2.0.0", C=2.0), actor="mallory")
    assert [info.version for info in store.versions("iris")] == ["1.0.0"]
    with pytest.raises(HistoryError, match="rbfgate-store.json was edited by hand"):
        store.verify_history("iris")


def test_a_trust_trail_cut_off_with_its_settings_is_reported(signed_store):
    store, _ = signed_store
    _remove_key_by_hand(store)
    store.layout.trust_trail.write_bytes(b"")
    with pytest.raises(HistoryError, match="trust"):
        store.trusted_keys()


def test_a_store_made_before_the_trust_trail_records_its_keys_at_the_next_change(signed_store, bundle_factory):
    store, _ = signed_store
    key = store.trusted_keys()[0]
    settings = json.loads(store.layout.settings.read_text())
    del settings["trust_head"], settings["trust_seq"]
    store.layout.settings.write_text(json.dumps(settings))
    store.layout.trust_trail.unlink()
    assert store.trusted_keys() == [key]  # taken as they are until the next change
    store.activate("iris", "1.0.0", reason="re-verify", actor="bob")
    [entry] = store.trust_history()
    assert (entry["action"], entry["key_id"]) == ("trust-add", key.key_id)
    assert entry["reason"].startswith("recorded when the trust trail began")
    assert store.verify_history("iris") == 3
