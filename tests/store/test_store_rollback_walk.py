"""Rollback walks back step by step along the activations, and says which version it chose and why it stops.

The definition (README, model_store/store/state.py): each rollback returns to the version that was active
before the current one was activated; after a rollback, the next one continues backwards from where that one
landed and never goes forward again to a version a rollback left.
"""

from __future__ import annotations

import pytest
from store_support import iris_bundle, run_cli

from model_store.errors import CheckFailedError
from model_store.store import Store


@pytest.fixture
def store(tmp_path, bundle_factory):
    store = Store(tmp_path / "store", create=True)
    for version, C in (("1.0.0", 1.0), ("2.0.0", 2.0), ("3.0.0", 4.0)):
        store.publish(iris_bundle(bundle_factory, version, C=C), actor="publisher")
    return store


def _activate(store, *versions):
    for version in versions:
        store.activate("iris", version, reason=f"release {version}", actor="alice")


def test_a_second_rollback_after_a_round_trip_states_the_real_reason(store):
    _activate(store, "1.0.0", "2.0.0")
    assert store.rollback("iris", reason="2.0.0 flips labels", actor="bob")["version"] == "1.0.0"
    with pytest.raises(CheckFailedError) as caught:
        store.rollback("iris", reason="again", actor="bob")
    message = str(caught.value)
    assert "only version ever made active" not in message  # untrue: 2.0.0 was active too
    assert "1.0.0 was the first version activated (seq 4)" in message
    assert "rollbacks at seq 6 have undone every activation after it (of 2.0.0)" in message
    assert store.active("iris").version == "1.0.0"


def test_rollbacks_walk_back_one_activation_each(store):
    _activate(store, "1.0.0", "2.0.0", "3.0.0")
    walked = [store.rollback("iris", reason="back", actor="bob")["version"] for _ in range(2)]
    assert walked == ["2.0.0", "1.0.0"]


def test_after_a_rollback_and_a_new_activation_rollback_returns_to_where_the_rollback_landed(store):
    _activate(store, "1.0.0", "2.0.0")
    store.rollback("iris", reason="2.0.0 bad", actor="bob")   # stack: 1.0.0
    _activate(store, "3.0.0")                                  # stack: 1.0.0, 3.0.0
    assert store.rollback("iris", reason="3.0.0 bad", actor="bob")["version"] == "1.0.0"


def test_a_rollback_that_never_had_an_earlier_step_says_so(store):
    _activate(store, "1.0.0")
    with pytest.raises(CheckFailedError, match=r"1.0.0 is the only version ever made active \(at seq 4\)"):
        store.rollback("iris", reason="panic", actor="bob")


def test_the_cli_names_the_version_it_chose_and_the_activation_it_undid(store):
    _activate(store, "1.0.0", "2.0.0")
    result = run_cli("rollback", "iris", "--store", str(store.root), "--reason", "holds up", "--actor", "bob")
    assert result.returncode == 0, result.stderr
    assert result.stdout.startswith("rolled iris back from 2.0.0 to 1.0.0")
    assert "1.0.0 was active before 2.0.0 was activated at seq 5" in result.stdout
    again = run_cli("rollback", "iris", "--store", str(store.root), "--reason", "again", "--actor", "bob")
    assert again.returncode == 1 and "have undone every activation after it" in again.stderr
    assert len(again.stderr.strip().splitlines()) == 1
