"""The history trail: format, hash chain, and every kind of tampering named at its first bad entry."""

from __future__ import annotations

import hashlib
import json
import re
from datetime import datetime, timezone

import pytest
from store_support import RFC3339_UTC, encode, iris_bundle, rehash, trail_lines, two_releases, write_trail_lines

from model_store.errors import HistoryError
from model_store.store import Store
from model_store.store.history import GENESIS


@pytest.fixture
def store(tmp_path, bundle_factory):
    """Six entries: publish x2, activate, activate, rollback, activate."""
    store = two_releases(tmp_path / "store", bundle_factory)
    store.rollback("iris", reason="latency", actor="bob")
    store.activate("iris", "1.1.0", reason="latency fixed", actor="alice")
    assert store.verify_history("iris") == 6
    return store


def test_entries_have_exactly_the_documented_fields(store):
    fields = {"seq", "time", "actor", "via", "action", "version", "digest", "reason", "prev_hash", "hash"}
    assert all(set(entry) == fields for entry in store.history("iris"))


def test_times_are_rfc3339_utc(tmp_path, bundle_factory):
    moment = datetime(2026, 12, 1, 21, 40, 0, tzinfo=timezone.utc)
    store = Store(tmp_path / "clocked", create=True, clock=lambda: moment)
    store.publish(iris_bundle(bundle_factory, "1.0.0"), actor="alice")
    [entry] = store.history("iris")
    assert entry["time"] == "2026-12-01T21:40:00Z"  # RFC 3339 section 5.6, "Z" for UTC
    assert re.fullmatch(RFC3339_UTC, entry["time"])


def test_each_hash_is_sha256_of_the_canonical_entry_and_links_to_the_previous(store):
    previous = GENESIS
    for entry in store.history("iris"):
        body = {key: value for key, value in entry.items() if key != "hash"}
        canonical = json.dumps(body, sort_keys=True, separators=(",", ":"), ensure_ascii=False).encode()
        assert entry["hash"] == hashlib.sha256(canonical).hexdigest()  # FIPS 180-4 via hashlib
        assert entry["prev_hash"] == previous
        previous = entry["hash"]


def test_the_pointer_records_the_last_entry(store):
    last = store.history("iris")[-1]
    assert store.active("iris").history_head == last["hash"]


def _verify_error(store) -> str:
    with pytest.raises(HistoryError) as caught:
        store.verify_history("iris")
    return str(caught.value)


def test_an_edited_entry_is_named(store):
    lines = trail_lines(store, "iris")
    entry = json.loads(lines[2])
    entry["reason"] = "nothing to see here"
    lines[2] = encode(entry)
    write_trail_lines(store, "iris", lines)
    assert "entry seq 3 (line 3) was edited" in _verify_error(store)


def test_an_edited_entry_with_a_recomputed_hash_is_named(store):
    lines = trail_lines(store, "iris")
    entry = json.loads(lines[2])
    entry["actor"] = "mallory"
    lines[2] = encode(rehash(entry))
    write_trail_lines(store, "iris", lines)
    assert "entry seq 3 (line 3) was replaced" in _verify_error(store)


def test_a_deleted_entry_is_named(store):
    lines = trail_lines(store, "iris")
    del lines[3]
    write_trail_lines(store, "iris", lines)
    assert "entry seq 4 is missing" in _verify_error(store)


def test_a_deleted_first_entry_is_named(store):
    write_trail_lines(store, "iris", trail_lines(store, "iris")[1:])
    assert "entry seq 1 is missing" in _verify_error(store)


def test_an_inserted_entry_with_a_valid_hash_is_named(store):
    lines = trail_lines(store, "iris")
    after = json.loads(lines[2])
    forged = rehash({**after, "seq": 4, "action": "activate", "version": "1.1.0", "reason": "forged",
                     "prev_hash": after["hash"]})
    lines.insert(3, encode(forged))
    write_trail_lines(store, "iris", lines)
    assert "entry seq 4 (line 4) was inserted" in _verify_error(store)


def test_an_inserted_entry_without_a_valid_hash_is_named(store):
    lines = trail_lines(store, "iris")
    forged = {**json.loads(lines[1]), "reason": "inserted by hand"}
    lines.insert(2, encode(forged))
    write_trail_lines(store, "iris", lines)
    message = _verify_error(store)
    assert "line 3" in message and "inserted" in message


def test_reordered_entries_are_named(store):
    lines = trail_lines(store, "iris")
    lines[2], lines[3] = lines[3], lines[2]
    write_trail_lines(store, "iris", lines)
    assert "entry seq 4 (line 3) is out of order" in _verify_error(store)


@pytest.mark.parametrize("kept", [5, 3, 0])
def test_a_truncated_trail_is_caught_by_the_pointer(store, kept):
    write_trail_lines(store, "iris", trail_lines(store, "iris")[:kept])
    message = _verify_error(store)
    assert "truncated" in message and "seq 6" in message


def test_a_hand_edited_pointer_is_caught(store):
    pointer_path = store.layout.pointer("iris")
    pointer = json.loads(pointer_path.read_text())
    first = store.history("iris")[0]
    pointer.update(version=first["version"], digest=first["digest"])
    pointer_path.write_text(json.dumps(pointer))
    assert "active.json was edited" in _verify_error(store)


def test_a_line_that_is_not_an_entry_is_named(store):
    lines = trail_lines(store, "iris")
    lines[4] = b"not json at all"
    write_trail_lines(store, "iris", lines)
    assert "line 5" in _verify_error(store)


def test_changes_are_refused_while_the_trail_fails_verification(store):
    lines = trail_lines(store, "iris")
    del lines[1]
    write_trail_lines(store, "iris", lines)
    tampered = store.layout.history("iris").read_bytes()
    with pytest.raises(HistoryError, match="missing"):
        store.activate("iris", "1.0.0", reason="emergency", actor="alice")
    assert store.layout.history("iris").read_bytes() == tampered  # the evidence is left as it is
    assert store.active("iris").version == "1.1.0"
