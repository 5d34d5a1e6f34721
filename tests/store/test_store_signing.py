"""Ed25519 signatures (RFC 8032) over bundle digests, and the signed-store policy."""

from __future__ import annotations

import json
import stat

import pytest
from store_support import iris_bundle

from model_store.archive import pack_directory, read_archive
from model_store.bundle import load_bundle
from model_store.errors import InputError, SignatureError
from model_store.store import Store
from model_store.store.signer import generate_key_files, sign_bundle
from model_store.store.signing import (
    parse_public_key,
    public_key_of,
    read_private_key,
    sign_message,
    signing_message,
    verify_message,
)

# RFC 8032, "Edwards-Curve Digital Signature Algorithm (EdDSA)", section 7.1 "Test Vectors for
# Ed25519": TEST 1 (the empty message) and TEST 2 (the one-byte message 0x72), as printed there.
RFC8032_TEST_1 = {
    "secret": "9d61b19deffd5a60ba844af492ec2cc44449c5697b326919703bac031cae7f60",
    "public": "d75a980182b10ab7d54bfed3c964073a0ee172f3daa62325af021a68f707511a",
    "message": "",
    "signature": "e5564300c360ac729086e2cc806e828a84877f1eb8e5d974d873e065224901555fb8821590a33bacc61e39701cf9b46bd25bf5f0595bbe24655141438e7a100b",
}
RFC8032_TEST_2 = {
    "secret": "4ccd089b28ff96da9db6c346ec114e0f5b8a319f35aba624da8cf6ed4fb8a6fb",
    "public": "3d4017c3e843895a92b70aa74d1b7ebc9c982ccf2ec4968cc0cd55f12af4660c",
    "message": "72",
    "signature": "92a009a9f0d4cab8720e820b5f642540a2b27b5416503f8fb3762223ebdb69da085ac1e43e15996e458f3613d0f11d8c387b2eaeb4302aeeb00d291612bb0c00",
}


@pytest.mark.parametrize("vector", [RFC8032_TEST_1, RFC8032_TEST_2], ids=["TEST 1", "TEST 2"])
def test_public_key_and_signature_match_rfc8032(vector):
    secret = bytes.fromhex(vector["secret"])
    message = bytes.fromhex(vector["message"])
    assert public_key_of(secret).hex() == vector["public"]
    assert sign_message(secret, message).hex() == vector["signature"]


@pytest.mark.parametrize("vector", [RFC8032_TEST_1, RFC8032_TEST_2], ids=["TEST 1", "TEST 2"])
def test_rfc8032_signature_verifies_and_a_flipped_bit_does_not(vector):
    public = bytes.fromhex(vector["public"])
    message = bytes.fromhex(vector["message"])
    signature = bytearray.fromhex(vector["signature"])
    assert verify_message(public, message, bytes(signature))
    signature[0] ^= 0x01
    assert not verify_message(public, message, bytes(signature))


def test_the_signed_message_is_the_tagged_digest():
    digest = "ab" * 32
    assert signing_message(digest) == b"rbfgate-bundle-signature/1\n" + digest.encode("ascii")


def test_keygen_writes_a_private_key_only_its_owner_can_read(tmp_path):
    keys = generate_key_files(tmp_path / "ops")
    assert stat.S_IMODE(keys.private_path.stat().st_mode) == 0o600
    secret = read_private_key(keys.private_path)
    assert parse_public_key(str(keys.public_path)) == public_key_of(secret)


def test_keygen_never_overwrites_a_key(tmp_path):
    keys = generate_key_files(tmp_path / "ops")
    before = keys.private_path.read_bytes()
    with pytest.raises(InputError, match="already exists"):
        generate_key_files(tmp_path / "ops")
    assert keys.private_path.read_bytes() == before


def test_signing_leaves_the_bundle_digest_unchanged(bundle_factory, tmp_path):
    source = iris_bundle(bundle_factory, "1.0.0")
    digest = load_bundle(source).digest
    keys = generate_key_files(tmp_path / "ops")
    document = sign_bundle(source, keys.private_path, "2026-12-01T21:40:00Z")
    assert document["digest"] == digest == load_bundle(source).digest
    assert json.loads((source / "signature.json").read_text()) == document


def test_signing_the_single_file_form_adds_the_signature_inside(bundle_factory, tmp_path):
    source = iris_bundle(bundle_factory, "1.0.0")
    archive = tmp_path / "iris.tar"
    pack_directory(source, archive)
    keys = generate_key_files(tmp_path / "ops")
    document = sign_bundle(archive, keys.private_path, "2026-12-01T21:40:00Z")
    assert json.loads(read_archive(archive)["signature.json"]) == document


@pytest.fixture
def signed_store(tmp_path):
    """A store that trusts one key; returns (store, private key path)."""
    store = Store(tmp_path / "store", create=True)
    keys = generate_key_files(tmp_path / "ops")
    store.add_trusted_key(parse_public_key(str(keys.public_path)), label="ops team", actor="admin")
    return store, keys.private_path


def test_a_store_without_trusted_keys_accepts_unsigned_bundles(tmp_path, bundle_factory):
    store = Store(tmp_path / "store", create=True)
    assert store.trusted_keys() == []
    store.publish(iris_bundle(bundle_factory, "1.0.0"), actor="alice")
    store.activate("iris", "1.0.0", reason="first", actor="alice")
    assert store.active("iris").version == "1.0.0"
    assert [info.version for info in store.versions("iris")] == ["1.0.0"]
    assert [entry["action"] for entry in store.history("iris")][-2:] == ["publish", "activate"]


def test_a_signed_store_accepts_a_bundle_signed_by_a_trusted_key(signed_store, bundle_factory):
    store, key = signed_store
    source = iris_bundle(bundle_factory, "1.0.0")
    sign_bundle(source, key, "2026-12-01T21:40:00Z")
    store.publish(source, actor="alice")
    store.activate("iris", "1.0.0", reason="first", actor="alice")
    assert store.active("iris").version == "1.0.0"


def test_a_signed_store_refuses_an_unsigned_bundle(signed_store, bundle_factory):
    store, _ = signed_store
    with pytest.raises(SignatureError, match="unsigned"):
        store.publish(iris_bundle(bundle_factory, "1.0.0"), actor="alice")
    assert store.versions("iris") == []
    assert store.history("iris")[-1]["action"] == "refused-publish"


def test_a_signed_store_refuses_a_tampered_signature(signed_store, bundle_factory):
    store, key = signed_store
    source = iris_bundle(bundle_factory, "1.0.0")
    document = sign_bundle(source, key, "2026-12-01T21:40:00Z")
    signature = bytearray.fromhex(document["signature"])
    signature[10] ^= 0x01
    (source / "signature.json").write_text(json.dumps({**document, "signature": signature.hex()}))
    with pytest.raises(SignatureError, match="does not verify"):
        store.publish(source, actor="alice")


def test_a_signed_store_refuses_a_key_it_does_not_trust(signed_store, bundle_factory, tmp_path):
    store, _ = signed_store
    source = iris_bundle(bundle_factory, "1.0.0")
    stranger = generate_key_files(tmp_path / "stranger")
    sign_bundle(source, stranger.private_path, "2026-12-01T21:40:00Z")
    with pytest.raises(SignatureError, match="does not trust"):
        store.publish(source, actor="alice")


def test_a_signature_copied_from_another_bundle_is_refused(signed_store, bundle_factory):
    store, key = signed_store
    signed = iris_bundle(bundle_factory, "1.0.0", C=1.0)
    sign_bundle(signed, key, "2026-12-01T21:40:00Z")
    other = iris_bundle(bundle_factory, "1.1.0", C=2.0)
    (other / "signature.json").write_bytes((signed / "signature.json").read_bytes())
    with pytest.raises(SignatureError, match="another bundle"):
        store.publish(other, actor="alice")


def test_activation_refuses_a_stored_version_that_is_not_signed(tmp_path, bundle_factory):
    store = Store(tmp_path / "store", create=True)
    store.publish(iris_bundle(bundle_factory, "1.0.0"), actor="alice")  # before signatures were required
    keys = generate_key_files(tmp_path / "ops")
    store.add_trusted_key(parse_public_key(str(keys.public_path)), label="ops", actor="admin")
    with pytest.raises(SignatureError, match="unsigned"):
        store.activate("iris", "1.0.0", reason="first", actor="alice")
    assert store.active("iris") is None
    assert store.history("iris")[-1]["action"] == "refused-activate"


def test_republishing_a_signed_copy_adds_the_signature_to_the_stored_version(tmp_path, bundle_factory):
    store = Store(tmp_path / "store", create=True)
    source = iris_bundle(bundle_factory, "1.0.0")
    store.publish(source, actor="alice")
    keys = generate_key_files(tmp_path / "ops")
    store.add_trusted_key(parse_public_key(str(keys.public_path)), label="ops", actor="admin")
    sign_bundle(source, keys.private_path, "2026-12-01T21:40:00Z")
    assert store.publish(source, actor="alice").already_present
    assert store.history("iris")[-1]["action"] == "add-signature"
    store.activate("iris", "1.0.0", reason="first", actor="alice")


def test_trusted_keys_can_be_listed_and_removed(signed_store):
    store, _ = signed_store
    [key] = store.trusted_keys()
    assert (key.label, key.added_by) == ("ops team", "admin")
    store.remove_trusted_key(key.key_id, actor="admin")
    assert store.trusted_keys() == []
