"""Key files and signing bundles on disk: ``rbfgate keygen`` and ``rbfgate sign``.

``keygen --out PREFIX`` writes ``PREFIX.key`` (PKCS #8 PEM, mode 0600, never
overwritten) and ``PREFIX.pub`` (SubjectPublicKeyInfo PEM), both readable by
OpenSSL. ``sign`` verifies the bundle (checksums and golden self-test)
before vouching for it, then adds ``signature.json``: inside a bundle
directory, or by rewriting the single-file form atomically.
"""

from __future__ import annotations

import json
import os
import shutil
import tempfile
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from cryptography.hazmat.primitives import serialization
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey

from model_store.archive import is_archive, pack_directory, read_archive
from model_store.bundle import load_bundle
from model_store.errors import InputError
from model_store.manifest import SIGNATURE_FILE
from model_store.store.durable import atomic_write, temporary_name
from model_store.store.signing import key_id, private_key_bytes, public_key_of, read_private_key, sign_digest

__all__ = ["KeyFiles", "generate_key_files", "sign_bundle"]


@dataclass(frozen=True)
class KeyFiles:
    private_path: Path
    public_path: Path
    key_id: str


def generate_key_files(prefix: Path) -> KeyFiles:
    """Create a new Ed25519 key pair as ``PREFIX.key`` and ``PREFIX.pub``; refuse to overwrite either."""
    prefix = Path(prefix)
    private_path = prefix.with_name(prefix.name + ".key")
    public_path = prefix.with_name(prefix.name + ".pub")
    for path in (private_path, public_path):
        if path.exists():
            raise InputError(f"{path}: already exists; keys are never overwritten, choose another --out prefix")
    if not prefix.parent.is_dir():
        raise InputError(f"{prefix.parent}: no such directory for --out; create it first")
    private = Ed25519PrivateKey.generate()
    private_pem = private.private_bytes(
        serialization.Encoding.PEM, serialization.PrivateFormat.PKCS8, serialization.NoEncryption()
    )
    public_pem = private.public_key().public_bytes(
        serialization.Encoding.PEM, serialization.PublicFormat.SubjectPublicKeyInfo
    )
    try:
        descriptor = os.open(private_path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
        with os.fdopen(descriptor, "wb") as handle:
            handle.write(private_pem)
            handle.flush()
            os.fsync(handle.fileno())
        with open(public_path, "xb") as handle:
            handle.write(public_pem)
    except FileExistsError as exc:
        raise InputError(f"{exc.filename}: already exists; choose another --out prefix") from exc
    except OSError as exc:
        raise InputError(f"{exc.filename}: cannot write the key file: {exc.strerror}") from exc
    return KeyFiles(private_path, public_path, key_id(public_key_of(private_key_bytes(private))))


def sign_bundle(bundle_path: Path, key_path: Path, signed_at: str) -> dict[str, Any]:
    """Verify the bundle, then write its signature beside the manifest; return the signature document."""
    private_raw = read_private_key(key_path)
    bundle = load_bundle(bundle_path)
    bundle.self_test()
    document = sign_digest(private_raw, bundle.digest, signed_at)
    data = (json.dumps(document, indent=2, sort_keys=True) + "\n").encode("utf-8")
    bundle_path = Path(bundle_path)
    try:
        if is_archive(bundle_path):
            _rewrite_archive(bundle_path, data)
        else:
            atomic_write(bundle_path / SIGNATURE_FILE, data)
    except OSError as exc:
        raise InputError(f"{bundle_path}: cannot write the signature: {exc.strerror}") from exc
    return document


def _rewrite_archive(path: Path, signature: bytes) -> None:
    """Pack the archive's members plus the new signature into a temporary tar, then rename it over."""
    contents = read_archive(path)
    contents[SIGNATURE_FILE] = signature
    unpacked = Path(tempfile.mkdtemp(prefix=".rbfgate-sign-"))
    temporary = path.with_name(temporary_name(path.name))
    try:
        for name, data in contents.items():
            (unpacked / name).write_bytes(data)
        with open(temporary, "xb") as handle:
            pack_directory(unpacked, handle)
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(temporary, path)
    finally:
        temporary.unlink(missing_ok=True)
        shutil.rmtree(unpacked, ignore_errors=True)
