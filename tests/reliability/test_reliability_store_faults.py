"""SIGKILL during publish and during activate: the store stays consistent and its history verifies.

The approach of tests/store/test_store_crash.py: the command runs in a subprocess that pauses
at a chosen step (the store's publish hook, or a wrapper around the function that performs
the step), the test sends SIGKILL (no cleanup code runs, as with a crash or an OOM kill), then
checks what any reader sees and what the next change makes of it. What "consistent" means here
(README, "The version store"): every listed version is complete and verifies; the active pointer
names the old or the new version, never anything else; the lock is free; ``history --verify``
passes, or reports the interrupted command until the next change completes it with a
``recover`` entry; and no temporary file is left behind after that change.
"""

from __future__ import annotations

import os
import random
import signal
import subprocess
import sys
from pathlib import Path

import pytest
from store_support import iris_bundle, python_env, start_python, wait_until

from model_store.bundle import load_bundle
from model_store.errors import HistoryError
from model_store.store import Store
from model_store.store.durable import TEMP_PREFIX

_PAUSING_COMMAND = """
import os, pathlib, sys, time
from model_store.store import Store, recovery
root, action, argument, marker, pause_at = sys.argv[1:]

def pause(step):
    if step == pause_at:
        pathlib.Path(marker).write_text(step)
        time.sleep(600)

real_load, real_append, real_replace = Store.load_verified, recovery.append_entries, os.replace

def load_verified(self, *args, **kwargs):
    bundle = real_load(self, *args, **kwargs)
    pause("verified")
    return bundle

def append_entries(*args, **kwargs):
    pause("before the history append")
    real_append(*args, **kwargs)
    pause("after the history append")

def replace(source, target, *args, **kwargs):
    if str(target).endswith("active.json"):
        pause("pointer written, not yet renamed")
    return real_replace(source, target, *args, **kwargs)

Store.load_verified, recovery.append_entries, os.replace = load_verified, append_entries, replace
store = Store(pathlib.Path(root), publish_step=pause)
if action == "publish":
    store.publish(pathlib.Path(argument), actor="killed-publisher")
else:
    store.activate("iris", argument, reason="killed mid-way", actor="killed-operator")
"""

PUBLISH_STEPS = ["staging manifest.json", "staging dual_coef.npy", "staged", "stored",
                 "before the history append", "after the history append", "pointer written, not yet renamed"]
ACTIVATE_STEPS = ["verified", "before the history append", "after the history append",
                  "pointer written, not yet renamed"]


@pytest.fixture
def store(tmp_path, bundle_factory):
    store = Store(tmp_path / "store", create=True)
    for version, C in (("1.0.0", 1.0), ("1.1.0", 2.0)):
        store.publish(iris_bundle(bundle_factory, version, C=C), actor="alice")
    store.activate("iris", "1.0.0", reason="first release", actor="alice")
    return store


def _kill_at(store: Store, action: str, argument: str, step: str, tmp_path: Path) -> None:
    marker = tmp_path / "paused"
    process = start_python(_PAUSING_COMMAND, str(store.root), action, argument, str(marker), step)
    try:
        wait_until(lambda: marker.exists() or process.poll() is not None, f"the {action} to reach {step!r}")
        assert marker.exists(), process.communicate()[1]
    finally:
        os.kill(process.pid, signal.SIGKILL)
        process.communicate()
    assert process.returncode == -signal.SIGKILL


def _assert_readers_see_a_consistent_store(root: Path, allowed_active: set[str]) -> None:
    reader = Store(root)
    recorded = {entry["version"] for entry in reader.history("iris") if entry["action"] == "publish"}
    for info in reader.versions("iris"):
        if info.version in recorded:
            assert reader.load_verified("iris", info.version).digest == info.digest  # complete and verifying
        else:  # stored by a publisher killed before its entry: complete, but not served until recorded
            assert load_bundle(reader.layout.bundle("iris", info.version)).digest == info.digest
            with pytest.raises(HistoryError, match="next change records it"):
                reader.load_verified("iris", info.version)
    assert reader.active("iris").version in allowed_active
    assert reader.load_verified("iris", reader.active("iris").version)


def _assert_the_next_change_completes_it(root: Path) -> Store:
    later = Store(root, lock_timeout=5.0)  # the kernel released the dead command's flock at once
    later.prune("iris", keep=10, actor="bob")  # removes nothing; any change completes an interrupted one
    assert later.verify_history("iris") == len(later.history("iris"))
    leftovers = [path.name for path in later.root.rglob(f"{TEMP_PREFIX}*")]
    assert leftovers == [] and list(later.layout.staging.iterdir()) == []
    return later


@pytest.mark.parametrize("step", PUBLISH_STEPS)
def test_sigkill_during_publish(store, bundle_factory, tmp_path, step):
    bundle = iris_bundle(bundle_factory, "1.2.0", C=4.0)
    _kill_at(store, "publish", str(bundle), step, tmp_path)
    _assert_readers_see_a_consistent_store(store.root, {"1.0.0"})
    versions = [info.version for info in Store(store.root).versions("iris")]
    assert versions in (["1.0.0", "1.1.0"], ["1.0.0", "1.1.0", "1.2.0"])  # all of it or none of it

    later = _assert_the_next_change_completes_it(store.root)
    assert later.active("iris").version == "1.0.0"
    published = [entry["version"] for entry in later.history("iris") if entry["action"] == "publish"]
    assert ("1.2.0" in published) == ("1.2.0" in versions)  # a stored version always gets its entry
    assert later.publish(bundle, actor="alice").digest == later.versions("iris")[-1].digest  # publishing again works


@pytest.mark.parametrize("step", ACTIVATE_STEPS)
def test_sigkill_during_activate(store, tmp_path, step):
    _kill_at(store, "activate", "1.1.0", step, tmp_path)
    _assert_readers_see_a_consistent_store(store.root, {"1.0.0"})  # the pointer is replaced last
    entry_written = step in ("after the history append", "pointer written, not yet renamed")
    if entry_written:
        with pytest.raises(HistoryError, match="interrupted command"):
            Store(store.root).verify_history("iris")
    else:
        assert Store(store.root).verify_history("iris") == 3  # 2 publishes and 1 activation, as before

    later = _assert_the_next_change_completes_it(store.root)
    # The activation whose entry reached the trail is completed; one killed before that never happened.
    assert later.active("iris").version == ("1.1.0" if entry_written else "1.0.0")
    actions = [entry["action"] for entry in later.history("iris")]
    assert actions[3:] == (["activate", "recover"] if entry_written else [])


def test_sigkill_of_the_activate_command_at_random_moments(store):
    """The real CLI, killed at seeded random moments while it starts, checks and writes."""
    chance = random.Random(20261201)
    versions = ["1.1.0", "1.0.0"] * 3
    for version in versions:
        process = subprocess.Popen(
            [sys.executable, "-m", "model_store", "activate", "iris", version, "--store", str(store.root),
             "--reason", "killed at random"], env=python_env(), stdout=subprocess.PIPE, stderr=subprocess.PIPE,
        )
        try:
            process.wait(timeout=chance.uniform(0.2, 1.5))
        except subprocess.TimeoutExpired:
            process.kill()
        process.communicate()
        _assert_readers_see_a_consistent_store(store.root, {"1.0.0", "1.1.0"})
    later = _assert_the_next_change_completes_it(store.root)
    assert later.active("iris").version in {"1.0.0", "1.1.0"}
