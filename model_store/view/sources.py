"""Where a model card comes from: a version in the store, or a bundle file on disk.

    store_card(store, "pallet-checks", "1.0.0")   # the served card: the store's checks and trust
    file_card(Path("bundle.tar"))                # rbfgate card: the bundle's own checks

Both load the bundle through the same checks the service and the CLI use (checksums, digest,
golden self-test; in the store also the published digest and the signature policy), so a card
is only ever made for a bundle that passes them.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

from model_store.archive import is_archive, read_archive
from model_store.bundle import load_bundle
from model_store.errors import SignatureError
from model_store.manifest import SIGNATURE_FILE
from model_store.store.signing import check_bundle_signature, key_id, signing_message, verify_message
from model_store.view.card import bundle_card, golden_facts

__all__ = ["file_card", "store_card"]


def store_card(store, model: str, version: str) -> dict[str, Any]:
    """The card of a published version; ``store`` is a ``model_store.store.Store``."""
    bundle = store.load_verified(model, version)  # checksums, digest, golden self-test, signature policy
    info = next(item for item in store.versions(model) if item.version == version)
    signature = store.signature(model, version)
    trusted = store.trusted_keys()
    identity = {
        "origin": {"kind": "store", "published_at": info.published_at, "active": info.active},
        "signature": _store_signature(signature, bundle.digest, trusted, f"{model} {version} in the store"),
        "self_test": golden_facts(bundle),
    }
    return bundle_card(bundle, identity)


def file_card(path: Path) -> dict[str, Any]:
    """The card of a bundle directory or archive, self-tested here."""
    bundle = load_bundle(path)
    bundle.self_test()  # GoldenMismatchError: no card for a bundle that does not reproduce its model
    if is_archive(Path(path)):
        signature = read_archive(Path(path)).get(SIGNATURE_FILE)
    else:
        file = Path(path) / SIGNATURE_FILE
        signature = file.read_bytes() if file.is_file() else None
    identity = {
        "origin": {"kind": "file", "name": Path(path).name},
        "signature": _file_signature(signature, bundle.digest),
        "self_test": golden_facts(bundle),
    }
    return bundle_card(bundle, identity)


def _store_signature(signature: bytes | None, digest: str, trusted, source: str) -> dict[str, Any]:
    key = check_bundle_signature(signature, digest, trusted, source)  # load_verified already enforced it
    if key is not None:
        fields = _fields(signature)
        return {"signed": True, "key_id": key.key_id, "signer": key.label, "signed_at": fields.get("signed_at"),
                "checked": "verified against the store's trusted key"}
    if signature is None:
        return {"signed": False, "checked": "unsigned; this store does not require signatures"}
    fields = _fields(signature)
    return {"signed": True, "key_id": fields.get("key_id"), "signer": None, "signed_at": fields.get("signed_at"),
            "checked": "not checked: this store trusts no keys, so it does not require signatures"}


def _file_signature(signature: bytes | None, digest: str) -> dict[str, Any]:
    """Outside a store no key is trusted: say whether the signature verifies with the public key it
    carries, and leave trusting that key to the store it is published into."""
    if signature is None:
        return {"signed": False, "checked": "unsigned"}
    fields = _fields(signature)
    try:
        public = bytes.fromhex(str(fields.get("public_key", "")))
        value = bytes.fromhex(str(fields.get("signature", "")))
        consistent = (
            len(public) == 32 and fields.get("digest") == digest and fields.get("key_id") == key_id(public)
            and verify_message(public, signing_message(digest), value)
        )
    except (ValueError, SignatureError):
        consistent = False
    checked = ("verifies with the public key it carries; whether that key is trusted is decided by the store it "
               "is published into" if consistent else "does NOT verify for this bundle's digest")
    return {"signed": True, "key_id": fields.get("key_id"), "signer": None, "signed_at": fields.get("signed_at"),
            "checked": checked}


def _fields(signature: bytes) -> dict[str, Any]:
    try:
        document = json.loads(signature.decode("utf-8"))
    except (UnicodeDecodeError, ValueError):
        return {}
    return document if isinstance(document, dict) else {}
