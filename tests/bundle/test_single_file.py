"""The single-file (tar) form of a bundle: round trip, determinism and unsafe entries.

Reference for the entry types: POSIX.1-2001 pax / ustar typeflags as written by Python's
tarfile module (regular file, directory, symbolic link, hard link, character device, FIFO).
The tar files with dangerous entries are built here with tarfile; a bundle reader must
refuse them with UnsafeArchiveError naming the entry, and must write nothing to disk.
"""

from __future__ import annotations

import gzip
import io
import json
import os
import shutil
import tarfile

import numpy as np
import pytest

from model_store import BundleFormatError, IntegrityError, UnsafeArchiveError, load_bundle
from model_store import archive as archive_module
from model_store.archive import pack_directory, read_archive

from .reference import probe_rows

ARRAYS = ("domain_alpha.npy", "domain_support_vectors.npy", "domain_whitening.npy", "dual_coef.npy",
          "reference_quantiles.npy", "support_vectors.npy")


@pytest.fixture
def packed(wine_sigmoid, tmp_path):
    """(bundle, tar path) of the calibrated wine bundle."""
    bundle, _, _ = wine_sigmoid
    path = tmp_path / "wine.tar"
    pack_directory(bundle.source, path)
    return bundle, path


def test_packed_bundle_loads_with_the_same_digest_and_scores(packed, wine_sigmoid):
    bundle, path = packed
    _, _, X = wine_sigmoid
    unpacked = load_bundle(path)
    assert unpacked.digest == bundle.digest
    unpacked.self_test()
    rows = probe_rows(X)
    ours, theirs = unpacked.score(rows), bundle.score(rows)
    # Same arrays, same code, same batch: bitwise the same.
    assert np.array_equal(ours.decision, theirs.decision)
    assert np.array_equal(ours.probabilities, theirs.probabilities)
    assert ours.labels.tolist() == theirs.labels.tolist()
    assert np.array_equal(ours.nearest_distance, theirs.nearest_distance)


def test_packing_twice_gives_identical_bytes(wine_sigmoid, tmp_path):
    bundle, _, _ = wine_sigmoid
    pack_directory(bundle.source, tmp_path / "first.tar")
    pack_directory(bundle.source, tmp_path / "second.tar")
    assert (tmp_path / "first.tar").read_bytes() == (tmp_path / "second.tar").read_bytes()


def test_packing_ignores_file_times_and_modes(wine_sigmoid, tmp_path):
    bundle, _, _ = wine_sigmoid
    copy = tmp_path / "copy"
    shutil.copytree(bundle.source, copy)
    for entry in copy.iterdir():
        os.utime(entry, (1_000_000_000, 1_000_000_000))
        entry.chmod(0o600)
    pack_directory(bundle.source, tmp_path / "original.tar")
    pack_directory(copy, tmp_path / "copy.tar")
    assert (tmp_path / "original.tar").read_bytes() == (tmp_path / "copy.tar").read_bytes()


def test_packing_to_a_stream_gives_the_same_bytes_as_to_a_file(packed):
    bundle, path = packed
    stream = io.BytesIO()
    pack_directory(bundle.source, stream)
    assert stream.getvalue() == path.read_bytes()


def test_archive_holds_the_manifest_then_the_listed_files_as_plain_entries(packed):
    _, path = packed
    with tarfile.open(path) as tar:
        members = tar.getmembers()
    assert [member.name for member in members] == ["manifest.json", *ARRAYS]
    assert all(member.isreg() and member.mode == 0o644 and member.mtime == 0 for member in members)
    assert all(member.uid == 0 and member.gid == 0 and member.uname == "" for member in members)


def test_signature_beside_the_manifest_is_packed_and_accepted(wine_sigmoid, tmp_path):
    bundle, _, _ = wine_sigmoid
    copy = tmp_path / "signed"
    shutil.copytree(bundle.source, copy)
    (copy / "signature.json").write_text('{"note": "placeholder"}', encoding="utf-8")
    pack_directory(copy, tmp_path / "signed.tar")
    assert sorted(read_archive(tmp_path / "signed.tar")) == sorted(["manifest.json", "signature.json", *ARRAYS])
    assert load_bundle(tmp_path / "signed.tar").digest == bundle.digest


# -- dangerous archives --------------------------------------------------------------------------------


def _regular(name: str, data: bytes) -> tuple[tarfile.TarInfo, bytes]:
    info = tarfile.TarInfo(name)
    info.size = len(data)
    return info, data


def _special(name: str, kind: bytes, **fields) -> tuple[tarfile.TarInfo, None]:
    info = tarfile.TarInfo(name)
    info.type = kind
    for key, value in fields.items():
        setattr(info, key, value)
    return info, None


EVIL = {
    "dot-dot": lambda: _regular("../escape.npy", b"x"),
    "dot-dot-deep": lambda: _regular("a/../../escape.npy", b"x"),
    "absolute": lambda: _regular("/tmp/rbfgate-evil.npy", b"x"),
    "backslash": lambda: _regular("..\\escape.npy", b"x"),
    "symlink": lambda: _special("link.npy", tarfile.SYMTYPE, linkname="/etc/passwd"),
    "hard-link": lambda: _special("hard.npy", tarfile.LNKTYPE, linkname="manifest.json"),
    "char-device": lambda: _special("null.npy", tarfile.CHRTYPE, devmajor=1, devminor=3),
    "block-device": lambda: _special("disk.npy", tarfile.BLKTYPE, devmajor=8, devminor=0),
    "fifo": lambda: _special("pipe.npy", tarfile.FIFOTYPE),
    "directory": lambda: _special("folder", tarfile.DIRTYPE),
    "nested": lambda: _regular("nested/dual_coef.npy", b"x"),
    "duplicate": lambda: _regular("dual_coef.npy", b"not the real array"),
    "unlisted": lambda: _regular("extra.txt", b"hello"),
}


def _write_tar(path, entries):
    with tarfile.open(path, "w", format=tarfile.PAX_FORMAT) as tar:
        for info, data in entries:
            tar.addfile(info, None if data is None else io.BytesIO(data))


def _bundle_entries(bundle):
    return [_regular(name, open(os.path.join(bundle.source, name), "rb").read()) for name in ("manifest.json", *ARRAYS)]


@pytest.mark.parametrize("case", EVIL)
def test_dangerous_entry_is_refused_naming_it(wine_sigmoid, tmp_path, case):
    bundle, _, _ = wine_sigmoid
    evil_info, evil_data = EVIL[case]()
    workdir = tmp_path / "work"
    workdir.mkdir()
    path = workdir / "evil.tar"
    _write_tar(path, [*_bundle_entries(bundle), (evil_info, evil_data)])
    with pytest.raises(UnsafeArchiveError) as caught:
        load_bundle(path)
    assert repr(evil_info.name) in str(caught.value)
    # Reading never extracts: nothing appeared beside the archive or above it.
    assert sorted(p.name for p in workdir.iterdir()) == ["evil.tar"]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["work"]


def test_symlink_in_place_of_a_listed_file_is_refused(wine_sigmoid, tmp_path):
    bundle, _, _ = wine_sigmoid
    entries = [entry for entry in _bundle_entries(bundle) if entry[0].name != "dual_coef.npy"]
    entries.append(_special("dual_coef.npy", tarfile.SYMTYPE, linkname="/etc/passwd"))
    _write_tar(tmp_path / "evil.tar", entries)
    with pytest.raises(UnsafeArchiveError, match="'dual_coef.npy' is a link"):
        load_bundle(tmp_path / "evil.tar")


def test_too_many_entries_are_refused(wine_sigmoid, tmp_path):
    bundle, _, _ = wine_sigmoid
    extra = [_regular(f"extra-{index}.npy", b"x") for index in range(70)]
    _write_tar(tmp_path / "many.tar", [*_bundle_entries(bundle), *extra])
    with pytest.raises(UnsafeArchiveError, match="more than"):
        load_bundle(tmp_path / "many.tar")


def test_entry_over_the_size_limit_is_refused_naming_it(packed, monkeypatch):
    _, path = packed
    monkeypatch.setattr(archive_module, "MAX_MEMBER_BYTES", 1000)  # the manifest is larger than this
    with pytest.raises(UnsafeArchiveError, match="'manifest.json' is .* bytes, over the 1000 limit"):
        load_bundle(path)


def test_file_that_is_not_a_tar_is_refused(tmp_path):
    path = tmp_path / "bundle.tar"
    path.write_bytes(b"this is not a tar archive" * 40)
    with pytest.raises(BundleFormatError, match="not a bundle archive"):
        load_bundle(path)


def test_compressed_tar_is_refused(packed, tmp_path):
    _, path = packed
    compressed = tmp_path / "bundle.tar.gz"
    compressed.write_bytes(gzip.compress(path.read_bytes()))
    with pytest.raises(BundleFormatError, match="uncompressed tar expected"):
        load_bundle(compressed)


def test_archive_without_a_manifest_is_refused(wine_sigmoid, tmp_path):
    bundle, _, _ = wine_sigmoid
    _write_tar(tmp_path / "headless.tar", _bundle_entries(bundle)[1:])
    with pytest.raises(BundleFormatError, match="no manifest.json"):
        load_bundle(tmp_path / "headless.tar")


def test_archive_missing_a_listed_file_fails_naming_it(wine_sigmoid, tmp_path):
    bundle, _, _ = wine_sigmoid
    entries = [entry for entry in _bundle_entries(bundle) if entry[0].name != "support_vectors.npy"]
    _write_tar(tmp_path / "short.tar", entries)
    with pytest.raises(IntegrityError, match="support_vectors.npy is listed in the manifest but missing"):
        load_bundle(tmp_path / "short.tar")


@pytest.mark.parametrize("name", ARRAYS)
def test_flipped_byte_inside_an_archived_array_fails_naming_it(wine_sigmoid, tmp_path, name):
    bundle, _, _ = wine_sigmoid
    entries = []
    for info, data in _bundle_entries(bundle):
        if info.name == name:
            data = data[:-1] + bytes([data[-1] ^ 0x01])
        entries.append((info, data))
    _write_tar(tmp_path / "damaged.tar", entries)
    with pytest.raises(IntegrityError, match=name):
        load_bundle(tmp_path / "damaged.tar")


# -- packing never reads outside the bundle or leaves half an archive ------------------------------------


def test_packing_refuses_a_manifest_listing_a_path_outside_the_bundle(wine_sigmoid, tmp_path):
    bundle, _, _ = wine_sigmoid
    (tmp_path / "secret.npy").write_bytes(b"not for the archive")
    copy = tmp_path / "copy"
    shutil.copytree(bundle.source, copy)
    manifest = copy / "manifest.json"
    document = json.loads(manifest.read_text(encoding="utf-8"))
    document["files"]["../secret.npy"] = document["files"]["dual_coef.npy"]
    manifest.write_text(json.dumps(document), encoding="utf-8")
    with pytest.raises(UnsafeArchiveError, match="'../secret.npy', which is not a plain file name"):
        pack_directory(copy, tmp_path / "out.tar")
    assert not (tmp_path / "out.tar").exists()


def test_failed_packing_leaves_no_archive_behind(wine_sigmoid, tmp_path):
    bundle, _, _ = wine_sigmoid
    copy = tmp_path / "copy"
    shutil.copytree(bundle.source, copy)
    (copy / "support_vectors.npy").unlink()  # listed, so packing fails half-way
    with pytest.raises(BundleFormatError, match="support_vectors.npy: cannot read it to pack"):
        pack_directory(copy, tmp_path / "out.tar")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["copy"]


def test_packing_a_directory_without_a_manifest_is_refused(tmp_path):
    (tmp_path / "empty").mkdir()
    with pytest.raises(BundleFormatError, match="no readable manifest.json"):
        pack_directory(tmp_path / "empty", tmp_path / "out.tar")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["empty"]
