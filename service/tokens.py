"""The tokens file: who may call the service, stored as SHA-256 digests only.

    {"format": "rbfgate-tokens/1",
     "tokens": [{"name": "ci-deployer", "role": "operate", "sha256": "<64 hex>", "created": "<RFC 3339>"}]}

A token is 256 random bits from ``secrets`` (urlsafe base64 with a
``rbfgate_`` prefix so secret scanners can spot a leaked one). Only its
SHA-256 (FIPS 180-4) is written, so a copy of the file lets no one call the
service. Changes are written to a temporary file and renamed into place under
an exclusive lock, so the file is never half-written and two concurrent
``token add`` commands cannot lose each other's entry.
"""

from __future__ import annotations

import fcntl
import hashlib
import json
import os
import secrets
import stat
import tempfile
from collections.abc import Callable
from contextlib import contextmanager
from datetime import datetime, timezone
from pathlib import Path
from typing import Literal

from pydantic import BaseModel, ConfigDict, Field, ValidationError

from model_store.errors import InputError, NotFoundError
from model_store.naming import check_name

__all__ = ["ROLES", "TOKENS_FORMAT", "TokenEntry", "add_token", "read_tokens", "revoke_token", "token_digest"]

TOKENS_FORMAT = "rbfgate-tokens/1"
ROLES = ("audit", "operate", "score")
_TOKEN_PREFIX = "rbfgate_"  # nosec B105 - a public marker for secret scanners, not a secret


class TokenEntry(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)

    name: str
    role: Literal["audit", "operate", "score"]
    sha256: str = Field(pattern=r"^[0-9a-f]{64}$")
    created: str


class _TokensDocument(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)

    format: Literal["rbfgate-tokens/1"]
    tokens: list[TokenEntry]


def token_digest(token: str) -> str:
    """Lower-case hex SHA-256 of the token's UTF-8 bytes: what the file stores."""
    return hashlib.sha256(token.encode("utf-8")).hexdigest()


def read_tokens(path: Path) -> list[TokenEntry]:
    """The entries of ``path``; ``InputError`` naming the file and the problem if it is unusable."""
    path = Path(path)
    try:
        # O_NONBLOCK: opening a FIFO would otherwise wait for a writer, and serve would hang at start.
        descriptor = os.open(path, os.O_RDONLY | os.O_NONBLOCK)
    except FileNotFoundError:
        raise InputError(
            f"tokens file {path}: does not exist; create it with `rbfgate token add NAME --role ROLE --tokens {path}`"
        ) from None
    except OSError as exc:
        raise InputError(f"tokens file {path}: cannot be read ({exc.strerror}); check its permissions") from exc
    if not stat.S_ISREG(os.fstat(descriptor).st_mode):
        os.close(descriptor)
        raise InputError(f"tokens file {path}: not a regular file; pass the file `rbfgate token add` writes")
    with os.fdopen(descriptor, "rb") as handle:
        try:
            text = handle.read().decode("utf-8")
        except (OSError, UnicodeDecodeError) as exc:
            raise InputError(f"tokens file {path}: cannot be read ({exc}); check its permissions") from exc
    try:
        document = _TokensDocument.model_validate_json(text)
    except ValidationError as exc:
        first = exc.errors()[0]
        where = ".".join(str(part) for part in first["loc"]) or "(top level)"
        raise InputError(
            f"tokens file {path}: {where}: {first['msg']}; it must be a {TOKENS_FORMAT} file written by `rbfgate token add`"
        ) from None
    names = [entry.name for entry in document.tokens]
    duplicates = sorted({name for name in names if names.count(name) > 1})
    if duplicates:
        raise InputError(f"tokens file {path}: the name {duplicates[0]!r} appears twice; revoke one of them")
    return list(document.tokens)


def add_token(
    path: Path,
    name: str,
    role: str,
    *,
    clock: Callable[[], datetime] | None = None,
    random_text: Callable[[int], str] = secrets.token_urlsafe,
) -> tuple[str, TokenEntry]:
    """Create a token for ``name`` with ``role``; return it (shown once) and its stored entry."""
    check_name(name, what="token name")
    if role not in ROLES:
        raise InputError(f"role {role!r} is not one of {', '.join(ROLES)}")
    token = _TOKEN_PREFIX + random_text(32)
    created = (clock or _now)().astimezone(timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")
    entry = TokenEntry(name=name, role=role, sha256=token_digest(token), created=created)
    with _locked(Path(path)):
        entries = read_tokens(path) if Path(path).exists() else []
        if any(existing.name == name for existing in entries):
            raise InputError(f"tokens file {path}: a token named {name!r} exists; revoke it first or pick another name")
        _write(Path(path), [*entries, entry])
    return token, entry


def revoke_token(path: Path, name: str) -> TokenEntry:
    """Remove the token named ``name``; return the removed entry."""
    with _locked(Path(path)):
        entries = read_tokens(path)
        kept = [entry for entry in entries if entry.name != name]
        if len(kept) == len(entries):
            known = ", ".join(entry.name for entry in entries) or "none"
            raise NotFoundError(f"tokens file {path}: no token named {name!r} (names: {known})")
        _write(Path(path), kept)
    return next(entry for entry in entries if entry.name == name)


def _now() -> datetime:
    return datetime.now(timezone.utc)


@contextmanager
def _locked(path: Path):
    path.parent.mkdir(parents=True, exist_ok=True)
    try:
        handle = open(path.with_name(path.name + ".lock"), "a")
    except OSError as exc:
        raise InputError(f"tokens file {path}: cannot lock ({exc}); check the directory's permissions") from exc
    with handle:
        fcntl.flock(handle, fcntl.LOCK_EX)
        yield


def _write(path: Path, entries: list[TokenEntry]) -> None:
    document = {"format": TOKENS_FORMAT, "tokens": [entry.model_dump() for entry in entries]}
    descriptor, staging = tempfile.mkstemp(prefix=f".{path.name}.", dir=path.parent)
    try:
        os.fchmod(descriptor, 0o600)
        with os.fdopen(descriptor, "w", encoding="utf-8") as handle:
            json.dump(document, handle, indent=2)
            handle.write("\n")
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(staging, path)
    except BaseException:
        Path(staging).unlink(missing_ok=True)
        raise
