"""The history trail: one JSON object per line, chained by SHA-256.

Every entry holds these core fields:

    seq        1, 2, 3, ... in file order
    time       RFC 3339 UTC, whole seconds, e.g. "2026-12-01T21:40:00Z"
    actor      who acted: the --actor given or the OS user (CLI), the token's name (HTTP)
    action     one of ACTIONS (``model_store.store.entry_kinds``)
    version    the version concerned (null for store-level actions)
    digest     that version's bundle digest, or null when unknown
    reason     the operator's reason (required for activate, rollback and the outside-domain choice), or an explanation
    prev_hash  the previous entry's ``hash``; GENESIS for the first entry
    hash       SHA-256 (FIPS 180-4) of the canonical JSON of the entry without ``hash``

and, in entries written since it was introduced, ``via`` (``cli``, ``http``
or ``python``: through what the actor acted) plus the fields of its kind
(``model_store.store.entry_kinds``), for example, only on an activation that
the operator let through although it breaks callers:

    accepted_breaking  the breaking changes accepted, one line each (``model_store.store.contract``)

Older entries have the core fields only (and possibly ``accepted_breaking``);
both verify, because a hash covers exactly the fields its entry holds, and no
old entry is ever rewritten.

Changing any byte of an entry changes its hash, and the next entry records
the old one, so an edit anywhere breaks the chain at that point. The active
pointer records the hash of the last entry, which catches a cut-off tail.
"""

from __future__ import annotations

import json
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, NamedTuple

from model_store.digest import canonical_json, sha256_bytes
from model_store.errors import HistoryError, InputError, StoreError
from model_store.store.durable import append_bytes
from model_store.store.entry_kinds import KINDS, VIAS, check_fields
from model_store.store.files import UnsafeStoreEntry, read_store_file

__all__ = [
    "ACTIONS",
    "FIELDS",
    "GENESIS",
    "VIAS",
    "HistoryLine",
    "Trail",
    "append_entries",
    "check_text",
    "entry_hash",
    "format_time",
    "make_entry",
    "read_trail",
]

GENESIS = "0" * 64
FIELDS = ("seq", "time", "actor", "action", "version", "digest", "reason", "prev_hash", "hash")
ACTIONS = tuple(KINDS)
# Entries written before ``via`` existed hold FIELDS (and possibly these) and one of these actions.
_LEGACY_ACTIONS = frozenset((*ACTIONS[:9], "outside-domain-refuse", "outside-domain-flag"))
_LEGACY_OPTIONAL = frozenset({"accepted_breaking"})
_MAX_TEXT = 1000


class Trail(NamedTuple):
    """The parsed lines, and the state of the file's end (see ``read_trail``)."""

    lines: list["HistoryLine"]
    unfinished: bool
    unterminated: bool


class HistoryLine:
    """One parsed line: its 1-based line number, the entry, and whether its hash matches its content."""

    __slots__ = ("entry", "hash_ok", "line")

    def __init__(self, line: int, entry: dict[str, Any]):
        self.line = line
        self.entry = entry
        self.hash_ok = entry_hash(entry) == entry["hash"]

    @property
    def seq(self) -> int:
        return self.entry["seq"]


def format_time(moment: datetime) -> str:
    """RFC 3339 UTC with whole seconds and the ``Z`` suffix."""
    return moment.astimezone(timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")


def entry_hash(entry: dict[str, Any]) -> str:
    """SHA-256 of the canonical JSON of ``entry`` without its ``hash`` field."""
    return sha256_bytes(canonical_json({key: value for key, value in entry.items() if key != "hash"}))


def check_text(value: str | None, *, what: str, required: bool) -> str | None:
    """Validate an actor, reason or label: one line of printable text, at most 1000 characters.

    ``what`` names the field ("reason", "actor"), not a command-line flag: the
    message reaches CLI users and HTTP clients alike.
    """
    if value is None or not str(value).strip():
        if required:
            raise InputError(f"{what} must not be empty: give one line of text, it is kept in the history for auditors")
        return None
    value = str(value).strip()
    if len(value) > _MAX_TEXT:
        raise InputError(f"{what} is {len(value)} characters long; the limit is {_MAX_TEXT}")
    if any(not character.isprintable() for character in value):
        raise InputError(f"{what} {value[:40]!r} holds a line break or control character; use one line of text")
    return value


def make_entry(
    previous: dict[str, Any] | None,
    *,
    time: str,
    actor: str,
    via: str,
    action: str,
    version: str | None,
    digest: str | None,
    reason: str | None,
    **fields: Any,
) -> dict[str, Any]:
    """The entry that follows ``previous`` (None for the first), with its hash filled in.

    ``fields`` are the fields of the action's kind (``entry_kinds.KINDS``); an optional one given as None is left out.
    """
    fields = {name: value for name, value in fields.items() if value is not None}
    problem = check_fields(action, fields)
    if problem is not None:
        raise ValueError(f"history entry {action}: {problem}")
    if via not in VIAS:
        raise ValueError(f"history entry {action}: via {via!r} is not one of {VIAS}")
    entry = {
        "seq": 1 if previous is None else previous["seq"] + 1,
        "time": time,
        "actor": actor,
        "via": via,
        "action": action,
        "version": version,
        "digest": digest,
        "reason": reason,
        **fields,
        "prev_hash": GENESIS if previous is None else previous["hash"],
    }
    entry["hash"] = entry_hash(entry)
    return entry


def append_entries(path: Path, entries: list[dict[str, Any]]) -> None:
    """Append complete lines for ``entries`` in one write."""
    data = b"".join(json.dumps(entry, sort_keys=True, ensure_ascii=False).encode("utf-8") + b"\n" for entry in entries)
    append_bytes(path, data)


def read_trail(path: Path, model: str, *, root: Path | None = None) -> Trail:
    """Parse every line of the trail.

    A last line without its newline is what a writer killed mid-append
    leaves: if it still parses as an entry it is kept (``unterminated``),
    otherwise it is set aside as ``unfinished`` for the caller to report
    (an auditor) or skip (a reader) or remove (the next writer). With
    ``root`` (the store root) the file is read without following links.
    """
    try:
        data = _read(Path(path), root)
    except FileNotFoundError:
        return Trail([], False, False)
    except UnsafeStoreEntry as exc:
        raise HistoryError(f"history of {model}: {exc}") from exc
    except OSError as exc:
        raise StoreError(f"{path}: cannot read the history: {exc.strerror}") from exc
    if data is None:
        return Trail([], False, False)
    pieces = data.split(b"\n")
    tail = pieces.pop()  # empty when the file ends with a newline
    lines = [HistoryLine(number, _parse(piece, number, path, model)) for number, piece in enumerate(pieces, 1)]
    if not tail:
        return Trail(lines, False, False)
    try:
        lines.append(HistoryLine(len(lines) + 1, _parse(tail, len(lines) + 1, path, model)))
    except HistoryError:
        return Trail(lines, True, False)
    return Trail(lines, False, True)


def _parse(raw: bytes, number: int, path: Path, model: str) -> dict[str, Any]:
    where = f"history of {model}, line {number}"
    try:
        entry = json.loads(raw.decode("utf-8"))
    except (UnicodeDecodeError, ValueError) as exc:
        raise HistoryError(
            f"{where}: not a JSON entry ({exc}); the trail {path} was edited or damaged, restore it from a backup"
        ) from exc
    if not isinstance(entry, dict) or not set(FIELDS) <= set(entry):
        found = sorted(entry) if isinstance(entry, dict) else type(entry).__name__
        raise HistoryError(
            f"{where}: expected an entry with the fields {list(FIELDS)}, found {found}; the trail was edited"
        )
    if type(entry["seq"]) is not int or entry["seq"] < 1:
        raise HistoryError(f"{where}: seq {entry['seq']!r} is not a positive integer; the trail was edited")
    for key in ("hash", "prev_hash"):
        value = entry[key]
        if not isinstance(value, str) or len(value) != 64 or any(c not in "0123456789abcdef" for c in value):
            raise HistoryError(f"{where}: {key} {value!r} is not a SHA-256 hex digest; the trail was edited")
    for key in ("time", "actor", "action", "version", "digest", "reason"):
        if entry[key] is not None and not isinstance(entry[key], str):
            raise HistoryError(f"{where}: {key} {entry[key]!r} should be text or null; the trail was edited")
    problem = _shape_problem(entry)
    if problem is not None:
        raise HistoryError(f"{where}: {problem}; the trail was edited")
    return entry


def _shape_problem(entry: dict[str, Any]) -> str | None:
    """None when ``entry`` is a legacy entry (core fields, a legacy action) or a current one (``via`` + its kind's fields)."""
    extra = {key: value for key, value in entry.items() if key not in FIELDS}
    if "via" not in extra:
        if entry["action"] not in _LEGACY_ACTIONS:
            return f"action {entry['action']!r} without \"via\": it is not an action entries without \"via\" can have"
        if not set(extra) <= _LEGACY_OPTIONAL:
            return f"fields {sorted(extra)} beyond {list(FIELDS)}, but no \"via\""
        return check_fields(str(entry["action"]), extra) if extra else None
    if extra.pop("via") not in VIAS:
        return f"via {entry['via']!r} is not one of {list(VIAS)}"
    return check_fields(str(entry["action"]), extra)


def _read(path: Path, root: Path | None) -> bytes | None:
    if root is None:
        return path.read_bytes()
    return read_store_file(root, path)
