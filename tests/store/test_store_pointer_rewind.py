"""Pointer states the trail does not explain: an older copy of active.json put back, a garbled one, and the
entries after the pointer's head (what one interrupted command leaves, and nothing more)."""

from __future__ import annotations

import pytest
from store_support import iris_bundle, killed_before_the_pointer, run_cli, tree_snapshot, two_releases

from model_store.errors import HistoryError
from model_store.store import Store


@pytest.fixture
def store(tmp_path, bundle_factory) -> Store:
    """Four entries (publish 1.0.0 and 1.1.0, activate 1.0.0, then 1.1.0), plus 1.2.0 published."""
    store = two_releases(tmp_path / "store", bundle_factory)
    store.publish(iris_bundle(bundle_factory, "1.2.0", C=4.0), actor="publisher")
    return store


def test_a_pointer_put_back_two_changes_is_an_older_copy_and_every_change_is_refused(store):
    older = store.layout.pointer("iris").read_bytes()  # 1.1.0 active, head at seq 5
    store.activate("iris", "1.2.0", reason="rollout", actor="alice")
    store.rollback("iris", reason="back", actor="alice")
    store.layout.pointer("iris").write_bytes(older)
    before = tree_snapshot(store.root)
    with pytest.raises(HistoryError, match="2 changes come after it .*an older copy of itself"):
        store.verify_history("iris")
    with pytest.raises(HistoryError, match="an older copy of itself"):
        store.explained_active("iris")  # what a service just started would follow
    with pytest.raises(HistoryError, match="an older copy of itself"):
        store.activate("iris", "1.0.0", reason="anything", actor="bob")  # not "recovered" as a crash
    assert tree_snapshot(store.root) == before


def test_a_pointer_one_change_behind_is_followed_only_by_a_reader_that_never_saw_it_move_on(store):
    older = store.layout.pointer("iris").read_bytes()
    store.activate("iris", "1.2.0", reason="rollout", actor="alice")
    seen = store.explained_active("iris")
    store.layout.pointer("iris").write_bytes(older)
    # Byte for byte what an activation killed after its entry and before the pointer leaves: 1.1.0 is active.
    assert store.explained_active("iris").version == "1.1.0"
    with pytest.raises(HistoryError, match="went back to seq 5 .* after it had recorded seq 6"):
        store.explained_active("iris", followed_seq=seen.history_seq)


def test_a_garbled_pointer_fails_verification_like_any_other_edit(store):
    store.layout.pointer("iris").write_text('{"version": "1.2.0"')
    result = run_cli("history", "iris", "--store", str(store.root), "--verify")
    assert result.returncode == 1  # a failed verification, not a usage error (2)
    assert "verification failed" in result.stderr and "active pointer is not valid" in result.stderr


def test_an_outside_domain_choice_is_in_force_only_once_the_pointer_records_it(store, monkeypatch):
    killed_before_the_pointer(monkeypatch, lambda: store.set_outside_action("iris", "flag", reason="reviewed",
                                                                            actor="dana"))
    assert store.history("iris")[-1]["action"] == "outside-domain-flag"
    assert store.outside_action("iris") == "refuse"  # what a worker started now applies, like one running
    store.activate("iris", "1.1.0", reason="re-verify", actor="bob")  # the next change completes it
    assert store.outside_action("iris") == "flag"
