"""Trust changes are hash-chained history entries: a key removed by hand cannot silently end signature checks."""

from __future__ import annotations

import json

import pytest
from store_support import iris_bundle, run_cli, strip_via

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


def _as_before_the_trust_trail(store) -> None:
    """What a store made before the trust trail holds: trusted keys in the settings, no trail, no via."""
    strip_via(store, "iris")
    settings = json.loads(store.layout.settings.read_text())
    del settings["trust_head"], settings["trust_seq"]
    store.layout.settings.write_text(json.dumps(settings))
    store.layout.trust_trail.unlink()


def test_a_store_made_before_the_trust_trail_records_its_keys_at_the_next_change(signed_store, bundle_factory):
    store, _ = signed_store
    key = store.trusted_keys()[0]
    _as_before_the_trust_trail(store)
    assert store.trusted_keys() == [key]  # taken as they are until the next change
    store.activate("iris", "1.0.0", reason="re-verify", actor="bob")
    [entry] = store.trust_history()
    assert (entry["action"], entry["key_id"]) == ("trust-add", key.key_id)
    assert entry["reason"].startswith("recorded when the trust trail began")
    assert store.verify_history("iris") == 3


def test_keys_recorded_when_the_trust_trail_began_name_the_change_that_recorded_them(signed_store):
    """The entries are written by the change that starts the trail: its actor and via, not those of whoever
    added the key long before (who did, and when, stays in the reason and in the settings)."""
    store, _ = signed_store
    key = store.trusted_keys()[0]  # added by "admin" via cli
    _as_before_the_trust_trail(store)
    store.activate("iris", "1.0.0", reason="re-verify", actor="ops-bob", via="http")
    [entry] = store.trust_history()
    assert (entry["actor"], entry["via"]) == ("ops-bob", "http")
    assert f"trusted since {key.added_at}, added by admin" in entry["reason"]
    assert store.trusted_keys() == [key]  # when and by whom it was added there is kept


def test_a_trust_trail_removed_with_its_head_and_keys_is_refused_not_started_anew(signed_store, bundle_factory):
    """Deleting trust.jsonl, trust_head and the keys makes the store look older than the trail: its model
    histories (entries with via) show it is not, so signatures cannot be switched off that way."""
    store, _ = signed_store
    settings = json.loads(store.layout.settings.read_text())
    del settings["trust_head"], settings["trust_seq"]
    settings["trusted_keys"] = []
    store.layout.settings.write_text(json.dumps(settings))
    store.layout.trust_trail.unlink()
    with pytest.raises(HistoryError, match="no trust trail .* removed by hand"):
        store.publish(iris_bundle(bundle_factory, "2.0.0", C=2.0), actor="mallory")  # unsigned
    with pytest.raises(HistoryError, match="no trust trail"):
        store.verify_history("iris")
    assert not store.layout.trust_trail.exists()  # nothing was started on its behalf


def _kill_between_trail_and_settings(store, monkeypatch) -> None:
    """A change killed after it appended trust entries, before it rewrote the settings."""
    import model_store.store.trust as trust

    class Killed(BaseException):
        pass

    def killed(*args, **kwargs):
        raise Killed

    monkeypatch.setattr(trust, "write_settings", killed)
    with pytest.raises(Killed):
        store.activate("iris", "1.0.0", reason="re-verify", actor="bob")
    monkeypatch.undo()


def test_a_change_killed_while_it_started_the_trust_trail_is_completed_by_the_next(signed_store, monkeypatch):
    store, _ = signed_store
    key = store.trusted_keys()[0]
    _as_before_the_trust_trail(store)
    _kill_between_trail_and_settings(store, monkeypatch)
    assert store.trusted_keys() == [key]  # the settings still say what is trusted
    store.activate("iris", "1.0.0", reason="after the crash", actor="bob")
    actions = [(entry["action"], entry.get("key_id")) for entry in store.trust_history()]
    assert actions == [("trust-add", key.key_id), ("trust-recover", None)]
    assert store.trusted_keys() == [key] and store.verify_history("iris") == 3


@pytest.mark.parametrize("tail", [b'{"action": "trust-add", "actor": "ro', b""], ids=["unfinished", "unterminated"])
def test_the_next_trust_change_repairs_the_end_of_the_trail_before_appending(signed_store, tmp_path, tail):
    store, _ = signed_store
    path = store.layout.trust_trail
    path.write_bytes(path.read_bytes() + tail if tail else path.read_bytes().rstrip(b"\n"))
    second = generate_key_files(tmp_path / "second")
    store.add_trusted_key(parse_public_key(str(second.public_path)), label="second", actor="admin")
    assert len(store.trusted_keys()) == 2  # the trail still reads: the new entry was not glued to the cut line
    assert store.trust_history()[-1]["action"] == "trust-add"
    assert store.verify_history("iris") == 2


def test_a_reordered_trust_trail_names_the_files_to_restore(signed_store, tmp_path):
    store, _ = signed_store
    second = generate_key_files(tmp_path / "second")
    store.add_trusted_key(parse_public_key(str(second.public_path)), label="second", actor="admin")
    first, last = store.layout.trust_trail.read_bytes().splitlines()
    store.layout.trust_trail.write_bytes(last + b"\n" + first + b"\n")
    with pytest.raises(HistoryError, match="reordered; restore rbfgate-store.json and trust.jsonl") as raised:
        store.trusted_keys()
    assert "history.jsonl" not in str(raised.value)


def _remove_key_killed_before_the_settings(store, monkeypatch) -> str:
    """``trust remove`` killed after it wrote its entry to trust.jsonl, before it rewrote rbfgate-store.json:
    the first of its two files written, deterministically. Returns the key id."""
    import model_store.store.trust as trust

    class Killed(BaseException):
        pass

    def killed(*args, **kwargs):
        raise Killed

    key_id = store.trusted_keys()[0].key_id
    monkeypatch.setattr(trust, "write_settings", killed)
    with pytest.raises(Killed):
        store.remove_trusted_key(key_id, actor="mallory", via="cli")
    monkeypatch.undo()
    return key_id


def test_verify_reports_a_trust_change_written_to_the_trail_only(signed_store, monkeypatch):
    store, _ = signed_store
    key_id = _remove_key_killed_before_the_settings(store, monkeypatch)
    with pytest.raises(HistoryError) as raised:
        store.verify_history("iris")
    message = str(raised.value)
    assert f"seq 2 (trust-remove of key {key_id} by mallory via cli" in message
    assert "interrupted after it wrote its entry and before it updated the settings" in message
    assert f"which still trust: {key_id}" in message and "the next change to the store completes it" in message


def test_a_trust_change_written_to_the_trail_only_is_not_in_force_until_the_next_change_completes_it(
        signed_store, monkeypatch, bundle_factory):
    store, _ = signed_store
    key_id = _remove_key_killed_before_the_settings(store, monkeypatch)
    assert [key.key_id for key in store.trusted_keys()] == [key_id]  # readers go by the settings
    store.activate("iris", "1.0.0", reason="re-verify", actor="bob", via="cli")  # the next change
    recovered = store.trust_history()[-1]
    assert (recovered["action"], recovered["actor"], recovered["via"]) == ("trust-recover", "bob", "cli")
    assert f"applied seq 2 (trust-remove of key {key_id} by mallory via cli" in recovered["reason"]
    assert store.trusted_keys() == [] and store.verify_history("iris") == 3


def test_settings_put_back_behind_two_trust_changes_are_refused_not_completed(signed_store, tmp_path, bundle_factory):
    store, _ = signed_store
    older = store.layout.settings.read_bytes()  # a copy taken while one key was trusted
    second = generate_key_files(tmp_path / "second")
    store.add_trusted_key(parse_public_key(str(second.public_path)), label="second", actor="admin")
    store.remove_trusted_key(store.trusted_keys()[0].key_id, actor="admin")
    store.layout.settings.write_bytes(older)  # its keys still match the trail's first entry
    for attempt in (lambda: store.verify_history("iris"),
                    lambda: store.publish(iris_bundle(bundle_factory, "2.0.0", C=2.0), actor="mallory")):
        with pytest.raises(HistoryError, match="2 entries come after it .* replaced by an older copy of themselves"):
            attempt()
    assert store.layout.settings.read_bytes() == older
