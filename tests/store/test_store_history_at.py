"""What was live at a given time: the version, the entry that made it live, the entry that ended it.

Times are RFC 3339 date-times (section 5.6); an offset of +01:00 is one hour ahead of UTC (section 4.2),
so 15:00:00+01:00 and 14:00:00Z are the same moment.
"""

from __future__ import annotations

import json
from datetime import datetime, timedelta, timezone

import pytest
from store_support import iris_bundle, run_cli, trail_lines, write_trail_lines

from model_store.store import Store

_START = datetime(2026, 11, 30, 12, 0, 0, tzinfo=timezone.utc)


@pytest.fixture
def store(tmp_path, bundle_factory):
    """publish 1.0.0 and 1.1.0 at 12:00, activate 1.0.0 at 13:00, 1.1.0 at 15:00, roll back at 16:00."""
    now = {"moment": _START}
    store = Store(tmp_path / "store", create=True, clock=lambda: now["moment"])
    for version, C in (("1.0.0", 1.0), ("1.1.0", 2.0)):
        store.publish(iris_bundle(bundle_factory, version, C=C), actor="publisher")
    now["moment"] = _START + timedelta(hours=1)
    store.activate("iris", "1.0.0", reason="first release", actor="alice")
    now["moment"] = _START + timedelta(hours=3)
    store.activate("iris", "1.1.0", reason="more recall", actor="alice")
    now["moment"] = _START + timedelta(hours=4)
    store.rollback("iris", reason="holds up", actor="bob")
    return store


def _at(store, text: str) -> dict:
    result = run_cli("history", "iris", "--store", str(store.root), "--at", text, "--json")
    assert result.returncode == 0, result.stderr
    return json.loads(result.stdout)


def test_the_version_live_between_two_activations_and_the_entries_around_it(store):
    answer = _at(store, "2026-11-30T14:00:00Z")
    assert (answer["version"], answer["at"]) == ("1.0.0", "2026-11-30T14:00:00Z")
    made, ended = answer["made_live"], answer["ended"]
    assert (made["action"], made["time"], made["actor"], made["via"], made["reason"]) == (
        "activate", "2026-11-30T13:00:00Z", "alice", "python", "first release")
    assert (ended["action"], ended["version"], ended["time"]) == ("activate", "1.1.0", "2026-11-30T15:00:00Z")


def test_an_offset_names_the_same_moment_as_utc(store):
    assert _at(store, "2026-11-30T15:00:00+01:00") == {**_at(store, "2026-11-30T14:00:00Z")}


def test_an_entry_counts_from_its_own_second(store):
    assert _at(store, "2026-11-30T15:00:00Z")["version"] == "1.1.0"
    assert _at(store, "2026-11-30T14:59:59.999Z")["version"] == "1.0.0"


def test_after_the_rollback_the_version_is_live_by_the_rollback_and_not_ended(store):
    answer = _at(store, "2026-12-01T00:00:00Z")
    assert (answer["version"], answer["made_live"]["action"], answer["ended"]) == ("1.0.0", "rollback", None)


def test_the_text_form_says_who_made_it_live_and_that_it_is_still_live(store):
    result = run_cli("history", "iris", "--store", str(store.root), "--at", "2026-12-01T00:00:00Z")
    lines = result.stdout.splitlines()
    assert lines[0].startswith("iris at 2026-12-01T00:00:00Z: version 1.0.0")
    assert "rollback" in lines[1] and "by bob via python" in lines[1] and "reason: holds up" in lines[1]
    assert lines[2].endswith("(still live)")


@pytest.mark.parametrize("text", ["2026-11-30 14:00", "2026-11-30T14:00:00", "2026-13-01T00:00:00Z", "yesterday"])
def test_a_malformed_time_is_one_line_naming_the_format(store, text):
    result = run_cli("history", "iris", "--store", str(store.root), "--at", text)
    assert result.returncode == 2 and len(result.stderr.strip().splitlines()) == 1
    assert "RFC 3339" in result.stderr or "not a valid date-time" in result.stderr
    assert "Traceback" not in result.stderr


def test_a_time_before_the_first_activation_names_it(store):
    result = run_cli("history", "iris", "--store", str(store.root), "--at", "2026-11-30T12:30:00Z")
    assert result.returncode == 2
    assert "no version of iris was live at 2026-11-30T12:30:00Z" in result.stderr
    assert "first activation is seq 3 (1.0.0) at 2026-11-30T13:00:00Z" in result.stderr


def test_an_unverifiable_history_gives_no_answer(store):
    lines = trail_lines(store, "iris")
    entry = json.loads(lines[3])
    entry["actor"] = "mallory"
    lines[3] = json.dumps(entry, sort_keys=True).encode()
    write_trail_lines(store, "iris", lines)
    result = run_cli("history", "iris", "--store", str(store.root), "--at", "2026-11-30T14:00:00Z")
    assert result.returncode == 1
    assert "cannot say what was live: the history does not verify" in result.stderr and "seq 4" in result.stderr
