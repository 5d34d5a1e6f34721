"""SHA-256 digests (FIPS 180-4) of files and of canonical JSON.

The bundle digest is the SHA-256 of the canonical form of the manifest:
keys sorted, no insignificant whitespace, UTF-8, no NaN or Infinity. Any
reader can recompute it from the parsed manifest, whatever indentation the
file on disk uses.
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path
from typing import Any

__all__ = ["canonical_json", "sha256_bytes", "sha256_file"]

_READ_BLOCK = 1 << 20


def canonical_json(document: Any) -> bytes:
    """Serialise ``document`` to the canonical UTF-8 bytes that are hashed."""
    return json.dumps(
        document, sort_keys=True, separators=(",", ":"), ensure_ascii=False, allow_nan=False
    ).encode("utf-8")


def sha256_bytes(data: bytes) -> str:
    """Lower-case hex SHA-256 of ``data``."""
    return hashlib.sha256(data).hexdigest()


def sha256_file(path: Path) -> str:
    """Lower-case hex SHA-256 of a file, read in 1 MiB blocks."""
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        while block := handle.read(_READ_BLOCK):
            digest.update(block)
    return digest.hexdigest()
