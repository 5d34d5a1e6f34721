"""Every store read takes regular files inside the store, reached without following a symbolic link."""

from __future__ import annotations

import os
import threading

import pytest
from store_support import two_releases

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
