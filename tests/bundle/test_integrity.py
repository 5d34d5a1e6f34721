"""SHA-256, the bundle digest, and what happens when a bundle's bytes change.

References: FIPS 180-4 (Secure Hash Standard) for the algorithm; the SHA-256 examples of
FIPS 180-2 (2002), Appendix B: B.1 "abc" (one block), B.2 the 448-bit two-block message and
B.3 one million repetitions of "a" (FIPS 180-4 moved these examples to NIST's separate
"Examples with Intermediate Values" document, same values). The canonical manifest form is the project's own definition
(model_store.digest): keys sorted, separators "," and ":", UTF-8, no NaN.

Decided behaviour for an edited manifest (it has no checksum of its own; its SHA-256 is
the bundle digest): any change to its content changes the digest, which is what a store
or a signature pins; a change to a number the scorer uses fails the golden self-test;
a change to a file checksum fails loading naming that file; a change that breaks the
format fails loading with BundleFormatError. No edit may raise anything but an
RbfgateError.
"""

from __future__ import annotations

import hashlib
import json
import shutil

import numpy as np
import pytest

from model_store import (
    BundleFormatError,
    GoldenMismatchError,
    IntegrityError,
    RbfgateError,
    load_bundle,
)
from model_store.digest import canonical_json, sha256_bytes, sha256_file

ARRAYS = ("support_vectors.npy", "dual_coef.npy", "reference_quantiles.npy")


def test_sha256_of_abc_is_the_fips_180_4_test_vector():
    # FIPS 180-2 Appendix B.1: SHA-256("abc").
    assert sha256_bytes(b"abc") == "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"


def test_sha256_of_the_two_block_message_is_the_nist_test_vector():
    # FIPS 180-2 Appendix B.2: the 448-bit message (padding spills into a second block).
    message = b"abcdbcdecdefdefgefghfghighijhijkijkljklmklmnlmnomnopnopq"
    assert sha256_bytes(message) == "248d6a61d20638b8e5c026930c3e6039a33ce45964ff2167f6ecedd419db06c1"


def test_sha256_file_matches_the_test_vectors(tmp_path):
    small = tmp_path / "abc"
    small.write_bytes(b"abc")
    assert sha256_file(small) == "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
    million = tmp_path / "million-a"
    million.write_bytes(b"a" * 1_000_000)
    # FIPS 180-2 Appendix B.3: one million repetitions of "a".
    assert sha256_file(million) == "cdc76e5c9914fb9281a1c7e284d73e67f1809a48a497200e046d39ccc7112cd0"


def test_sha256_file_reads_in_blocks_without_changing_the_digest(tmp_path):
    # 3.5 MiB crosses the 1 MiB read blocks; reference: hashlib over the whole bytes at once.
    data = np.random.default_rng(5).integers(0, 256, size=3_670_016, dtype=np.uint8).tobytes()
    path = tmp_path / "blob"
    path.write_bytes(data)
    assert sha256_file(path) == hashlib.sha256(data).hexdigest()


def test_canonical_json_sorts_keys_drops_whitespace_and_refuses_nan():
    assert canonical_json({"b": [1, 2.5], "a": "é"}) == '{"a":"é","b":[1,2.5]}'.encode("utf-8")
    with pytest.raises(ValueError):
        canonical_json({"x": float("nan")})


def _copy(bundle, tmp_path, name="copy"):
    target = tmp_path / name
    shutil.copytree(bundle.source, target)
    return target


def _canonical_digest(document) -> str:
    # The definition, written out independently of model_store.digest.
    text = json.dumps(document, sort_keys=True, separators=(",", ":"), ensure_ascii=False, allow_nan=False)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def test_bundle_digest_is_sha256_of_the_canonical_manifest(iris_raw):
    bundle, _, _ = iris_raw
    with open(f"{bundle.source}/manifest.json", encoding="utf-8") as handle:
        document = json.load(handle)
    assert bundle.digest == _canonical_digest(document)


@pytest.mark.parametrize("indent", [None, 1, 4, "\t"])
def test_bundle_digest_does_not_depend_on_indentation_or_key_order(iris_raw, tmp_path, indent):
    bundle, _, _ = iris_raw
    copy = _copy(bundle, tmp_path)
    document = json.loads((copy / "manifest.json").read_text(encoding="utf-8"))
    reordered = dict(reversed(list(document.items())))
    (copy / "manifest.json").write_text(json.dumps(reordered, indent=indent, ensure_ascii=False), encoding="utf-8")
    reloaded = load_bundle(copy)
    assert reloaded.digest == bundle.digest
    reloaded.self_test()


def _flip(path, position):
    data = bytearray(path.read_bytes())
    position = position if position >= 0 else len(data) + position
    data[position] ^= 0x01
    path.write_bytes(bytes(data))


@pytest.mark.parametrize("position", [0, 20, 128, -1], ids=["magic", "header", "first-data", "last-byte"])
@pytest.mark.parametrize("name", ARRAYS)
def test_flipped_byte_in_an_array_file_fails_loading_naming_the_file(iris_raw, tmp_path, name, position):
    bundle, _, _ = iris_raw
    copy = _copy(bundle, tmp_path)
    _flip(copy / name, position)
    with pytest.raises(IntegrityError, match=name):
        load_bundle(copy)


@pytest.mark.parametrize("name", ARRAYS)
def test_deleted_array_file_fails_loading_naming_the_file(iris_raw, tmp_path, name):
    bundle, _, _ = iris_raw
    copy = _copy(bundle, tmp_path)
    (copy / name).unlink()
    with pytest.raises(IntegrityError, match=f"{name} is listed in the manifest but missing"):
        load_bundle(copy)


def test_deleted_manifest_fails_loading_naming_the_manifest(iris_raw, tmp_path):
    bundle, _, _ = iris_raw
    copy = _copy(bundle, tmp_path)
    (copy / "manifest.json").unlink()
    with pytest.raises(BundleFormatError, match="manifest.json"):
        load_bundle(copy)


def _edit_manifest(copy, edit):
    path = copy / "manifest.json"
    document = json.loads(path.read_text(encoding="utf-8"))
    edit(document)
    path.write_text(json.dumps(document, indent=2), encoding="utf-8")


def _set_gamma(document, gamma):
    document["kernel"]["gamma"] = gamma
    document["kernel"]["sigma"] = 1.0 / np.sqrt(2.0 * gamma)  # keep the pair consistent


MODEL_EDITS = {
    "intercept": lambda d: d["classifier"]["intercepts"].__setitem__(0, d["classifier"]["intercepts"][0] + 0.01),
    "gamma": lambda d: _set_gamma(d, d["kernel"]["gamma"] * 1.01),
    "scaler-center": lambda d: d["scaler"]["center"].__setitem__(1, d["scaler"]["center"][1] + 0.05),
    "scaler-scale": lambda d: d["scaler"]["scale"].__setitem__(0, d["scaler"]["scale"][0] * 1.1),
    "golden-decision": lambda d: d["golden"]["decisions"].__setitem__(3, d["golden"]["decisions"][3] + 1e-6),
    "golden-label": lambda d: d["golden"]["labels"].__setitem__(0, 1 - d["golden"]["labels"][0]),
}


@pytest.mark.parametrize("edit", MODEL_EDITS)
def test_edited_model_number_fails_the_self_test_and_changes_the_digest(cancer_standard, tmp_path, edit):
    bundle, _, _ = cancer_standard
    copy = _copy(bundle, tmp_path)
    _edit_manifest(copy, MODEL_EDITS[edit])
    edited = load_bundle(copy)  # still a well-formed bundle ...
    assert edited.digest != bundle.digest
    with pytest.raises(GoldenMismatchError, match="golden vector"):  # ... that no longer reproduces scikit-learn
        edited.self_test()


@pytest.mark.parametrize("name", ARRAYS)
def test_edited_file_checksum_in_the_manifest_fails_loading_naming_the_file(iris_raw, tmp_path, name):
    bundle, _, _ = iris_raw
    copy = _copy(bundle, tmp_path)

    def edit(document):
        digest = document["files"][name]["sha256"]
        document["files"][name]["sha256"] = ("0" if digest[0] != "0" else "1") + digest[1:]

    _edit_manifest(copy, edit)
    with pytest.raises(IntegrityError, match=name):
        load_bundle(copy)


def test_edited_metadata_changes_only_the_digest(iris_raw, tmp_path):
    # Metadata the scorer does not use (here: creator) cannot fail the self-test; the
    # digest, which a store or signature pins, is what reveals the edit.
    bundle, _, _ = iris_raw
    copy = _copy(bundle, tmp_path)
    _edit_manifest(copy, lambda document: document.__setitem__("creator", document["creator"] + "-edited"))
    edited = load_bundle(copy)
    edited.self_test()
    assert edited.digest != bundle.digest


def test_any_flipped_byte_in_the_manifest_fails_cleanly_or_changes_the_digest(iris_raw, tmp_path):
    # Sampled single-bit flips over the whole manifest: each must give an RbfgateError
    # (format, integrity or golden mismatch), or a document with a different meaning and
    # so a different digest. A flip that leaves the parsed document the same (say, the
    # 17th digit of a float that rounds to the same double) keeps the digest, rightly.
    bundle, _, _ = iris_raw
    copy = _copy(bundle, tmp_path)
    path = copy / "manifest.json"
    original = path.read_bytes()
    original_document = json.loads(original)
    positions = np.random.default_rng(2).choice(len(original), size=400, replace=False)
    outcomes = {"refused": 0, "digest changed": 0, "same document": 0}
    for position in positions:
        data = bytearray(original)
        data[position] ^= 0x01
        path.write_bytes(bytes(data))
        try:
            edited = load_bundle(copy)
            edited.self_test()
        except RbfgateError:
            outcomes["refused"] += 1
            continue
        if edited.document == original_document:
            assert edited.digest == bundle.digest
            outcomes["same document"] += 1
        else:
            assert edited.digest != bundle.digest, f"byte {position}: content changed but the digest did not"
            outcomes["digest changed"] += 1
    assert outcomes["refused"] > 200  # most flips break the JSON, a checksum or a golden number
