"""Rebuilding a model's active pointer from its verified history (``rbfgate repair-pointer``).

The pointer (``active.json``) is derived data: the trail's activations and
rollbacks say which version is active, and its last entry is the head the
pointer must record. When the pointer is missing, garbled, a link or a FIFO,
edited by hand, or an older copy of itself (a restore from a backup that
took the pointer from another moment than the trail), every change is
refused and the service keeps serving the last version it verified. An
operator who has checked the trail rebuilds the pointer from it:

1. under the store lock, everything a change checks is checked (the hash
   chain, every version folder against its publish entry, the trust trail)
   and a refusal writes nothing;
2. the pointer is compared with what the trail leads to; if it already agrees
   (or is one interrupted command behind, which any change completes),
   nothing is repaired;
3. otherwise a ``repair-pointer`` entry is appended (who, via, the
   operator's reason and what was found), then the pointer is written with
   the version the trail leads to and the new entry as its head.

What it never does is rebuild a pointer whose head is the hash of no entry:
the head is the only record of the trail's last entry, so such a pointer is
evidence that entries were cut from the end or rewritten (or that
``history.jsonl`` came from an older backup than ``active.json``), and
rebuilding it from the trail would destroy that evidence.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

from model_store.errors import HistoryError
from model_store.naming import check_name
from model_store.store.audit import check_active, check_chain, check_tail, head_position
from model_store.store.changes import draft_entry, who
from model_store.store.files import UnsafeStoreEntry, store_entry_kind
from model_store.store.history import GENESIS, HistoryLine, check_text, read_trail
from model_store.store.layout import StoreLayout, require_model
from model_store.store.pointer import Pointer, read_pointer
from model_store.store.publishing import clear_staging
from model_store.store.recovery import commit, recover
from model_store.store.state import activation_stack
from model_store.store.trust import recover_trust

if TYPE_CHECKING:
    from model_store.store.store import Store

__all__ = ["PointerRepair", "repair_pointer"]

_MAX_REASON = 1000  # as check_text allows for an operator's reason


@dataclass(frozen=True)
class PointerRepair:
    """What ``repair_pointer`` did: ``entry`` is the ``repair-pointer`` entry, or None when the pointer agreed."""

    model: str
    entry: dict[str, Any] | None
    found: str | None  # what was wrong with the pointer


def repair_pointer(store: "Store", name: str, *, reason: str, actor: str, via: str = "python") -> PointerRepair:
    """Rebuild ``name``'s active pointer from its verified trail; ``HistoryError`` naming why it cannot be."""
    check_name(name, what="model name")
    reason = check_text(reason, what="reason", required=True)
    actor, via = who(actor, via)
    layout = store.layout
    with store.locked():
        require_model(layout, name)
        clear_staging(layout.staging)
        recover_trust(layout, now=store.now(), actor=actor, via=via)
        lines = read_trail(layout.history(name), name, root=layout.root).lines
        check_chain(lines, name, None)  # the pointer is what is in doubt: the chain must hold without it
        found = _pointer_problem(layout, name, lines)
        if found is None:
            recover(layout, name, now=store.now(), actor=actor, via=via)  # completes an interrupted command, if any
            return PointerRepair(name, None, None)
        rebuilt = _rebuilt(lines)
        state = recover(layout, name, now=store.now(), actor=actor, via=via, rebuilt=rebuilt)
        text = f"{reason} (rebuilt from the verified trail; found: {found})"
        [entry] = commit(layout, state, [draft_entry(store, actor, via, "repair-pointer", rebuilt.version,
                                                     rebuilt.digest, text[:_MAX_REASON])])
    return PointerRepair(name, entry, found)


def _pointer_problem(layout: StoreLayout, name: str, lines: list[HistoryLine]) -> str | None:
    """What is wrong with the pointer file, None when the trail explains it; ``HistoryError`` when the pointer
    shows that the trail, not the pointer, lost something, or a directory stands in its place."""
    path = layout.pointer(name)
    try:
        if store_entry_kind(layout.root, path) == "directory":
            raise HistoryError(f"{path}: is a directory where the active pointer belongs; remove it by hand, then "
                               f"run 'rbfgate repair-pointer {name}' again")
    except UnsafeStoreEntry:
        pass  # a link, FIFO or socket: read_pointer names it, and the rename of the new pointer replaces it
    try:
        pointer = read_pointer(path, root=layout.root)
    except HistoryError as exc:
        return str(exc)
    if pointer is None:
        return f"{path} is missing" if lines else None  # no entries: the next change writes the genesis pointer
    position = head_position(lines, pointer.history_head)
    if position is None:
        # The head is the only record of the trail's last entry (and of everything up to it): a pointer whose head
        # is in no entry shows that entries were cut from the end, replaced with their hashes recomputed, or that
        # history.jsonl comes from an older backup, as much as that the pointer was edited. Rebuilding it from the
        # trail would hide the first three.
        ends = f"ends at seq {lines[-1].seq}" if lines else "is empty"
        raise HistoryError(
            f"history of {name}: the active pointer records head {pointer.history_head[:16]}... at seq "
            f"{pointer.history_seq}, the hash of no entry of the trail (which {ends}): entries were removed from the "
            "trail's end or rewritten, history.jsonl is older than active.json, or active.json was edited; it is the "
            "only evidence, so it is not rebuilt: restore history.jsonl (or both files) from a backup, or, once the "
            "trail is checked against a copy kept elsewhere, remove active.json and run "
            f"'rbfgate repair-pointer {name}'"
        )
    try:
        if position < len(lines) - 1:
            check_tail(lines, position, pointer, name)  # one interrupted command behind: not a pointer problem
        check_active(pointer, activation_stack([item.entry for item in lines[: position + 1]]), name)
    except HistoryError as exc:
        return str(exc)
    return None


def _rebuilt(lines: list[HistoryLine]) -> Pointer:
    """The pointer the trail leads to: the activation stack's top, activated at the time of the last entry that
    switched (an activation or rollback), with the trail's last entry as its head."""
    entries = [item.entry for item in lines]
    stack = activation_stack(entries)
    head, seq = (entries[-1]["hash"], entries[-1]["seq"]) if entries else (GENESIS, 0)
    if not stack:
        return Pointer(None, None, None, head, seq)
    switched = next(entry for entry in reversed(entries) if entry["action"] in ("activate", "rollback"))
    return Pointer(stack[-1].version, stack[-1].digest, switched["time"], head, seq)
