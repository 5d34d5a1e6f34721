"""rbfgate repair-pointer: the active pointer rebuilt from the verified trail, recorded with who and why, and
refused (writing nothing) while anything else fails verification or the pointer is evidence against the trail."""

from __future__ import annotations

import json
import os

import pytest
from store_support import (
    iris_bundle, killed_before_the_pointer, run_cli, trail_lines, tree_snapshot, two_releases, write_trail_lines,
)

from model_store.errors import HistoryError
from model_store.store import Store


@pytest.fixture
def store(tmp_path, bundle_factory) -> Store:
    """publish 1.0.0 and 1.1.0, activate 1.0.0, then 1.1.0 (seq 4); 1.2.0 published (seq 5)."""
    store = two_releases(tmp_path / "store", bundle_factory)
    store.publish(iris_bundle(bundle_factory, "1.2.0", C=4.0), actor="publisher")
    return store


def _refused_writing_nothing(store, match: str) -> None:
    before = tree_snapshot(store.root)
    with pytest.raises(HistoryError, match=match):
        store.repair_pointer("iris", reason="fix", actor="carol")
    assert tree_snapshot(store.root) == before


def _pointer(store) -> dict:
    return json.loads(store.layout.pointer("iris").read_text())


def test_a_deleted_pointer_is_rebuilt_from_the_trail_and_the_repair_is_recorded(store):
    expected = _pointer(store)
    store.layout.pointer("iris").unlink()
    repair = store.repair_pointer("iris", reason="restored the store, OPS-77", actor="carol", via="cli")
    entry = repair.entry
    assert (entry["seq"], entry["action"], entry["actor"], entry["via"]) == (6, "repair-pointer", "carol", "cli")
    assert (entry["version"], entry["digest"]) == ("1.1.0", expected["digest"])
    assert entry["reason"].startswith("restored the store, OPS-77 (rebuilt from the verified trail; found: ")
    assert "active.json is missing" in entry["reason"]
    pointer = _pointer(store)
    assert (pointer["version"], pointer["digest"], pointer["activated_at"]) == (
        "1.1.0", expected["digest"], expected["activated_at"])  # activated when the activation entry was written
    assert (pointer["history_head"], pointer["history_seq"]) == (entry["hash"], 6)
    assert store.verify_history("iris") == 6


def test_a_pointer_put_back_from_an_older_backup_is_rebuilt_to_what_the_trail_leads_to(store):
    older = store.layout.pointer("iris").read_bytes()  # 1.1.0 active, head at seq 5
    store.activate("iris", "1.2.0", reason="rollout", actor="alice")
    store.set_outside_action("iris", "flag", reason="pilot", actor="alice")
    store.layout.pointer("iris").write_bytes(older)  # the backup took the pointer from an earlier moment
    with pytest.raises(HistoryError, match="an older copy of itself"):
        store.activate("iris", "1.0.0", reason="anything", actor="bob")
    repair = store.repair_pointer("iris", reason="after the restore", actor="carol")
    assert "2 changes come after it" in repair.found
    assert (_pointer(store)["version"], _pointer(store)["history_seq"]) == ("1.2.0", 8)
    assert store.outside_action("iris") == "flag"  # the choice the trail records is in force again
    store.activate("iris", "1.0.0", reason="changes work again", actor="bob")


@pytest.mark.parametrize("damage", ["garbled", "link", "edited version"])
def test_a_pointer_that_is_not_what_the_trail_says_is_rebuilt(store, tmp_path, damage):
    path = store.layout.pointer("iris")
    if damage == "garbled":
        path.write_text('{"version": "1.2.0"')
    elif damage == "link":
        copy = tmp_path / "outside.json"
        copy.write_bytes(path.read_bytes())
        path.unlink()
        os.symlink(copy, path)
    else:
        path.write_text(json.dumps({**_pointer(store), "version": "1.0.0"}))
    repair = store.repair_pointer("iris", reason="fix", actor="carol")
    assert repair.entry["version"] == "1.1.0" and not path.is_symlink()
    assert store.verify_history("iris") == 6


def test_a_pointer_that_agrees_with_the_trail_is_left_alone(store):
    before = tree_snapshot(store.root)
    repair = store.repair_pointer("iris", reason="just in case", actor="carol")
    assert (repair.entry, repair.found) == (None, None)
    assert tree_snapshot(store.root) == before


def test_a_trail_cut_short_is_not_hidden_by_a_rebuilt_pointer(store):
    write_trail_lines(store, "iris", trail_lines(store, "iris")[:-1])  # the pointer's head was the cut entry
    _refused_writing_nothing(store, "hash of no entry of the trail .* it is the only evidence, so it is not rebuilt: "
                                    "restore history.jsonl")


def test_an_edited_entry_refuses_the_repair_and_writes_nothing(store):
    lines = trail_lines(store, "iris")
    entry = json.loads(lines[2])
    lines[2] = json.dumps({**entry, "reason": "nothing to see"}, sort_keys=True).encode()
    write_trail_lines(store, "iris", lines)
    store.layout.pointer("iris").unlink()
    _refused_writing_nothing(store, "entry seq 3 .* was edited")


def test_a_swapped_version_folder_refuses_the_repair_and_writes_nothing(store):
    versions = store.layout.versions("iris")
    os.rename(versions / "1.0.0", versions / "swap")
    os.rename(versions / "1.2.0", versions / "1.0.0")
    os.rename(versions / "swap", versions / "1.2.0")
    store.layout.pointer("iris").unlink()
    _refused_writing_nothing(store, "version folders were swapped")


def test_the_command_prints_what_it_rebuilt_and_history_verifies_after_it(store):
    store.layout.pointer("iris").write_text("{}")
    result = run_cli("repair-pointer", "iris", "--reason", "restored from backup", "--actor", "carol",
                     "--store", str(store.root))
    assert result.returncode == 0, result.stderr
    first, found = result.stdout.splitlines()
    assert first.startswith("rebuilt the active pointer of iris: it names version 1.1.0 (digest ")
    assert first.endswith("history entry seq 6") and found.startswith("found: ") and "not valid" in found
    history = run_cli("history", "iris", "--verify", "--store", str(store.root))
    assert history.returncode == 0 and "repair-pointer  1.1.0" in history.stdout
    assert "by carol via cli  reason: restored from backup (rebuilt" in history.stdout


def test_the_command_refuses_in_one_line_with_exit_1(store):
    write_trail_lines(store, "iris", trail_lines(store, "iris")[:-1])
    result = run_cli("repair-pointer", "iris", "--reason", "fix", "--store", str(store.root))
    assert result.returncode == 1
    [line] = result.stderr.splitlines()
    assert "it is the only evidence, so it is not rebuilt" in line


def test_a_pointer_one_interrupted_command_behind_is_completed_not_rebuilt(store, monkeypatch):
    killed_before_the_pointer(monkeypatch, lambda: store.activate("iris", "1.2.0", reason="rollout", actor="alice"))
    repair = store.repair_pointer("iris", reason="after the crash", actor="carol")
    assert repair.entry is None  # a crash state: completed as by any change, nothing to rebuild
    assert store.history("iris")[-1]["action"] == "recover" and _pointer(store)["version"] == "1.2.0"
