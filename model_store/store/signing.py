"""Ed25519 (RFC 8032) signatures over bundle digests, and the check against trusted keys.

What is signed is the bundle digest (the SHA-256 of the canonical manifest,
which fixes every array through its checksum), tagged so that a signature
made for a bundle can never be replayed as a signature over anything else:

    message = b"rbfgate-bundle-signature/1\\n" + digest as 64 lower-case hex ASCII characters

The signature lives in ``signature.json`` beside the manifest (not listed in
``manifest.files``, so signing does not change the digest):

    {"format": "rbfgate-signature/1", "algorithm": "Ed25519", "key_id": "...",
     "public_key": "<64 hex>", "digest": "<64 hex>", "signature": "<128 hex>", "signed_at": "..."}

A key's id is the first 16 hex characters of the SHA-256 of its 32 raw
public-key bytes. Verification uses the trusted key from the store
settings, never the public key a signature file carries.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from cryptography.exceptions import InvalidSignature
from cryptography.hazmat.primitives import serialization
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey, Ed25519PublicKey

from model_store.digest import sha256_bytes
from model_store.errors import InputError, SignatureError
from model_store.strict_json import loads_strict

__all__ = [
    "SIGNATURE_FORMAT",
    "TrustedKey",
    "check_bundle_signature",
    "key_id",
    "parse_public_key",
    "private_key_bytes",
    "public_key_of",
    "read_private_key",
    "sign_digest",
    "sign_message",
    "signing_message",
    "verify_message",
]

SIGNATURE_FORMAT = "rbfgate-signature/1"
_MESSAGE_TAG = b"rbfgate-bundle-signature/1\n"
_HEX64 = re.compile(r"[0-9a-f]{64}")
# signature.json is a flat object of a few hundred bytes; strict JSON (model_store.strict_json)
# refuses duplicate members, deep nesting and lone surrogates in it as in a manifest.
_MAX_SIGNATURE_BYTES = 64 * 1024


@dataclass(frozen=True)
class TrustedKey:
    """A public key the store accepts signatures from (from the store settings)."""

    key_id: str
    public_key: str  # 64 hex characters, the 32 raw bytes
    label: str
    added_at: str
    added_by: str

    def to_dict(self) -> dict[str, str]:
        return {
            "key_id": self.key_id,
            "public_key": self.public_key,
            "label": self.label,
            "added_at": self.added_at,
            "added_by": self.added_by,
        }


def key_id(public_raw: bytes) -> str:
    return sha256_bytes(public_raw)[:16]


def public_key_of(private_raw: bytes) -> bytes:
    """The 32-byte public key of a 32-byte Ed25519 secret key (RFC 8032 section 5.1.5)."""
    private = Ed25519PrivateKey.from_private_bytes(private_raw)
    return private.public_key().public_bytes(serialization.Encoding.Raw, serialization.PublicFormat.Raw)


def sign_message(private_raw: bytes, message: bytes) -> bytes:
    """The 64-byte Ed25519 signature of ``message`` (RFC 8032 section 5.1.6)."""
    return Ed25519PrivateKey.from_private_bytes(private_raw).sign(message)


def verify_message(public_raw: bytes, message: bytes, signature: bytes) -> bool:
    """True when ``signature`` is a valid Ed25519 signature of ``message`` under ``public_raw``."""
    try:
        Ed25519PublicKey.from_public_bytes(public_raw).verify(signature, message)
    except (InvalidSignature, ValueError):
        return False
    return True


def signing_message(digest: str) -> bytes:
    return _MESSAGE_TAG + digest.encode("ascii")


def sign_digest(private_raw: bytes, digest: str, signed_at: str) -> dict[str, Any]:
    """The ``signature.json`` document for a bundle with ``digest``."""
    public_raw = public_key_of(private_raw)
    return {
        "format": SIGNATURE_FORMAT,
        "algorithm": "Ed25519",
        "key_id": key_id(public_raw),
        "public_key": public_raw.hex(),
        "digest": digest,
        "signature": sign_message(private_raw, signing_message(digest)).hex(),
        "signed_at": signed_at,
    }


def private_key_bytes(private: Ed25519PrivateKey) -> bytes:
    return private.private_bytes(
        serialization.Encoding.Raw, serialization.PrivateFormat.Raw, serialization.NoEncryption()
    )


def read_private_key(path: Path) -> bytes:
    """The raw 32-byte secret key from a PEM (PKCS #8) file written by ``rbfgate keygen``."""
    try:
        data = Path(path).read_bytes()
    except FileNotFoundError:
        raise InputError(f"{path}: no such private key file; create one with 'rbfgate keygen --out PREFIX'") from None
    except OSError as exc:
        raise InputError(f"{path}: cannot read the private key: {exc.strerror}") from exc
    try:
        private = serialization.load_pem_private_key(data, password=None)
    except (ValueError, TypeError) as exc:
        raise InputError(
            f"{path}: not an unencrypted PEM private key ({exc}); pass the .key file written by 'rbfgate keygen'"
        ) from exc
    if not isinstance(private, Ed25519PrivateKey):
        raise InputError(f"{path}: holds a {type(private).__name__}, expected an Ed25519 private key")
    return private_key_bytes(private)


def parse_public_key(value: str) -> bytes:
    """A public key given as a PEM file path (``rbfgate keygen``'s .pub) or as 64 hex characters."""
    text = value.strip().lower()
    if _HEX64.fullmatch(text):
        return bytes.fromhex(text)
    path = Path(value)
    try:
        data = path.read_bytes()
    except OSError as exc:
        raise InputError(
            f"{value!r}: neither 64 hex characters nor a readable public key file ({exc.strerror}); "
            "pass the .pub file written by 'rbfgate keygen'"
        ) from exc
    try:
        public = serialization.load_pem_public_key(data)
    except (ValueError, TypeError) as exc:
        raise InputError(f"{path}: not a PEM public key ({exc}); pass the .pub file written by 'rbfgate keygen'") from exc
    if not isinstance(public, Ed25519PublicKey):
        raise InputError(f"{path}: holds a {type(public).__name__}, expected an Ed25519 public key")
    return public.public_bytes(serialization.Encoding.Raw, serialization.PublicFormat.Raw)


def check_bundle_signature(
    signature_bytes: bytes | None, digest: str, trusted: list[TrustedKey], source: str
) -> TrustedKey | None:
    """Enforce the signature policy; return the trusted key that signed, or None when none is required.

    With no trusted keys the store does not require signatures. Otherwise a
    missing, malformed, untrusted or invalid signature raises ``SignatureError``.
    """
    if not trusted:
        return None
    listed = ", ".join(key.key_id for key in trusted)
    if signature_bytes is None:
        raise SignatureError(
            f"{source}: unsigned bundle; this store only accepts bundles signed by a trusted key ({listed}); "
            "sign it with 'rbfgate sign BUNDLE --key PRIVATE_KEY'"
        )
    document = _parse_signature(signature_bytes, source)
    if document["digest"] != digest:
        raise SignatureError(
            f"{source}: signature.json signs digest {document['digest'][:16]}..., but the bundle's digest is "
            f"{digest[:16]}...; the signature belongs to another bundle, sign this one"
        )
    key = next((key for key in trusted if key.key_id == document["key_id"]), None)
    if key is None:
        raise SignatureError(
            f"{source}: signed by key {document['key_id']}, which this store does not trust (trusted: {listed}); "
            "sign with a trusted key or add the key with 'rbfgate trust add'"
        )
    if not verify_message(bytes.fromhex(key.public_key), signing_message(digest), document["signature"]):
        raise SignatureError(
            f"{source}: the signature by key {key.key_id} does not verify; the bundle or its signature was "
            "altered, sign the bundle again"
        )
    return key


def _parse_signature(data: bytes, source: str) -> dict[str, Any]:
    if len(data) > _MAX_SIGNATURE_BYTES:
        raise SignatureError(
            f"{source}: signature.json is {len(data)} bytes, more than a signature ever needs "
            f"({_MAX_SIGNATURE_BYTES}); sign the bundle again"
        )
    try:
        document = loads_strict(data.decode("utf-8"), max_depth=4)
        if not isinstance(document, dict) or document.get("format") != SIGNATURE_FORMAT:
            raise ValueError(f'expected "format": "{SIGNATURE_FORMAT}"')
        if document.get("algorithm") != "Ed25519":
            raise ValueError(f"algorithm {document.get('algorithm')!r}, expected 'Ed25519'")
        for field in ("key_id", "digest", "signature"):
            if not isinstance(document.get(field), str):
                raise ValueError(f"field {field!r} is missing")
        if not _HEX64.fullmatch(document["digest"]):
            raise ValueError("digest is not 64 hex characters")
        signature = bytes.fromhex(document["signature"])
        if len(signature) != 64:
            raise ValueError(f"signature is {len(signature)} bytes, expected 64")
    except (UnicodeDecodeError, ValueError) as exc:
        raise SignatureError(f"{source}: signature.json is malformed ({exc}); sign the bundle again") from exc
    return {**document, "signature": signature}
