"""Every store read takes regular files inside the store, reached without following a symbolic link."""

from __future__ import annotations

import os
import socket
import stat
import threading

import pytest
from store_support import iris_bundle, run_cli, two_releases

from model_store.errors import CheckFailedError, HistoryError, RbfgateError, StoreError


@pytest.fixture
def store(tmp_path, bundle_factory):
    return two_releases(tmp_path / "store", bundle_factory)


def _outside(tmp_path, data: bytes = b'{"format": "rbfgate-signature/1"}') -> str:
    path = tmp_path / "outside.json"
    path.write_bytes(data)
    return str(path)


def test_a_symlinked_signature_is_refused_by_every_load(store, tmp_path):
    os.symlink(_outside(tmp_path), store.bundle_dir("iris", "1.0.0") / "signature.json")
    reads = (lambda: store.load_verified("iris", "1.0.0"), lambda: store.verified_members("iris", "1.0.0"),
             lambda: store.signature("iris", "1.0.0"), lambda: store.verify_history("iris"))
    for read in reads:
        with pytest.raises(CheckFailedError, match="signature.json: is a symbolic link"):
            read()


def test_a_symlinked_version_folder_is_refused(store, tmp_path):
    versions = store.layout.versions("iris")
    os.rename(versions / "1.0.0", tmp_path / "elsewhere")
    os.symlink(tmp_path / "elsewhere", versions / "1.0.0")
    with pytest.raises(HistoryError, match="symbolic link"):
        store.verify_history("iris")
    with pytest.raises(StoreError):
        store.load_verified("iris", "1.0.0")


@pytest.mark.parametrize("which", ["pointer", "history"])
def test_a_symlinked_pointer_or_trail_is_refused(store, tmp_path, which):
    path = store.layout.pointer("iris") if which == "pointer" else store.layout.history("iris")
    copy = tmp_path / f"copy-{which}"
    copy.write_bytes(path.read_bytes())
    path.unlink()
    os.symlink(copy, path)
    with pytest.raises(RbfgateError, match="symbolic link"):
        store.verify_history("iris") if which == "history" else store.active("iris")


def test_a_fifo_in_place_of_an_array_is_refused_at_once_instead_of_hanging(store):
    array = store.bundle_dir("iris", "1.0.0") / "dual_coef.npy"
    array.unlink()
    os.mkfifo(array)
    outcome = {}

    def load():
        try:
            store.load_verified("iris", "1.0.0")
        except CheckFailedError as exc:
            outcome["error"] = str(exc)

    reader = threading.Thread(target=load, daemon=True)
    reader.start()
    reader.join(60)  # a bound for a broken build, which would block in open() forever
    assert not reader.is_alive(), "load_verified blocked on a FIFO"
    assert "dual_coef.npy: is a FIFO (named pipe)" in outcome["error"]


def _bounded(call):
    """Run ``call`` on a thread; return what it raised (None when it returned), failing if it blocks."""
    outcome = {}

    def run():
        try:
            call()
            outcome["error"] = None
        except RbfgateError as exc:
            outcome["error"] = exc

    reader = threading.Thread(target=run, daemon=True)
    reader.start()
    reader.join(60)  # a bound for a broken build, which would block in open() forever
    assert not reader.is_alive(), "blocked on a FIFO"
    return outcome["error"]


def test_a_linked_staging_directory_is_refused_and_what_it_points_to_is_left_alone(store, tmp_path, bundle_factory):
    elsewhere = tmp_path / "precious"
    (elsewhere / "sub").mkdir(parents=True)
    (elsewhere / "notes.txt").write_text("not the store's")
    store.layout.staging.rmdir()
    os.symlink(elsewhere, store.layout.staging)  # every change empties staging/ first
    with pytest.raises(StoreError, match="staging: is a symbolic link"):
        store.activate("iris", "1.0.0", reason="again", actor="bob")
    with pytest.raises(StoreError, match="staging: is a symbolic link"):
        store.publish(iris_bundle(bundle_factory, "2.0.0", C=2.0), actor="bob")
    assert sorted(path.name for path in elsewhere.iterdir()) == ["notes.txt", "sub"]
    assert store.active("iris").version == "1.1.0"


def test_a_fifo_in_place_of_the_lock_is_refused_at_once_instead_of_hanging(store):
    store.layout.lock.unlink()
    os.mkfifo(store.layout.lock)
    for call in (lambda: store.verify_history("iris"), lambda: store.activate("iris", "1.0.0", reason="x", actor="b")):
        error = _bounded(call)
        assert isinstance(error, StoreError) and "lock is not a regular file" in str(error)


def test_a_linked_lock_is_refused_and_creates_nothing_where_it_points(store, tmp_path):
    target = tmp_path / "not-the-store" / "lock"
    target.parent.mkdir()
    store.layout.lock.unlink()
    os.symlink(target, store.layout.lock)
    with pytest.raises(StoreError, match="lock is a symbolic link"):
        store.activate("iris", "1.0.0", reason="again", actor="bob")
    with pytest.raises(StoreError, match="lock is a symbolic link"):
        store.verify_history("iris")
    assert not target.exists()


def _replace_work_entry(path, kind: str, tmp_path, monkeypatch) -> None:
    """Put a ``kind`` where the store's own ``staging/`` or ``lock`` belongs (as someone with write access could)."""
    if path.is_dir():
        path.rmdir()  # staging/ is empty between changes
    else:
        path.unlink(missing_ok=True)
    if kind == "link":
        target = tmp_path / f"elsewhere-{path.name}"
        target.mkdir() if path.name == "staging" else target.write_text("")
        os.symlink(target, path)
    elif kind == "fifo":
        os.mkfifo(path)
    elif kind == "device":
        os.mknod(path, stat.S_IFCHR | 0o600, os.makedev(1, 3))  # 1:3 is /dev/null (Linux Documentation/devices.txt)
    elif kind == "socket":
        monkeypatch.chdir(path.parent)  # a relative name: a socket path is limited to 108 bytes (unix(7))
        with socket.socket(socket.AF_UNIX) as listener:
            listener.bind(path.name)  # the socket file stays after close
    elif kind == "file":
        path.write_text("")
    else:
        path.mkdir()


_WORK_ENTRY_CASES = [("staging", kind) for kind in ("link", "fifo", "device", "socket", "file")] + [
    ("lock", kind) for kind in ("link", "fifo", "device", "socket", "directory")]
_FOUND = {"link": "symbolic link", "fifo": "FIFO (named pipe)", "device": "character device", "socket": "socket",
          "file": "regular file", "directory": "directory"}


@pytest.mark.parametrize(("which", "kind"), _WORK_ENTRY_CASES, ids=[f"{w}-{k}" for w, k in _WORK_ENTRY_CASES])
def test_verify_names_anything_in_place_of_the_stores_own_staging_or_lock(store, tmp_path, monkeypatch, which, kind):
    path = getattr(store.layout, which)
    _replace_work_entry(path, kind, tmp_path, monkeypatch)
    error = _bounded(lambda: store.verify_history("iris"))  # a FIFO must not make verify wait for a writer
    assert isinstance(error, StoreError)
    message = str(error)
    assert f"{path}: " in message and _FOUND[kind] in message and "remove it" in message
    assert "\n" not in message


@pytest.mark.parametrize("command", [["versions", "iris"], ["history", "iris"], ["history", "iris", "--verify"]])
def test_every_store_command_names_a_linked_staging_directory_in_one_line(store, tmp_path, command):
    (tmp_path / "elsewhere").mkdir()
    store.layout.staging.rmdir()
    os.symlink(tmp_path / "elsewhere", store.layout.staging)
    result = run_cli(*command, "--store", str(store.root))
    assert result.returncode == 2  # the store itself is unusable (StoreError), not a history that fails to verify
    [line] = result.stderr.splitlines()
    assert f"{store.layout.staging}: is a symbolic link" in line and "remove it" in line
