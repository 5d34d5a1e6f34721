"""Writing history with the pointer, and completing changes a crash interrupted.

Every change appends its entries in one write, then replaces the active
pointer (new head, and the new active version for activate and rollback).
A writer killed between those steps, or between storing a version and
writing its publish entry, leaves a state that the next writer (holding the
lock, before it changes anything) completes and records as a ``recover``
entry, so the trail says what happened. A crash never leaves more than one
stored version without its publish entry: the one whose ``publish_seq`` is
the trail's last seq + 1, and only that one gets a "recovered" entry.

What no crash leaves is tampering, never "recovered": a broken hash chain,
a trail shorter than the pointer says, a pointer missing beside a trail
(a model has its genesis pointer before its first entry), or a stored
version the trail does not record. The change is refused with
``HistoryError`` and nothing is written, so that the evidence stays as it is.

A store made before genesis pointers existed has models without one; the
next change gives them theirs. Such a model with neither pointer nor trail
but one stored version with ``publish_seq`` 1 is taken for what it was
then: a first publish killed before it wrote its entry (the same state
after deleting both files is indistinguishable from it).
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any

from model_store.store.audit import check_active, check_chain, check_head, check_tail, check_versions, head_position
from model_store.store.durable import TEMP_PREFIX
from model_store.store.history import HistoryLine, append_entries, make_entry, read_trail, repair_end
from model_store.store.layout import StoreLayout
from model_store.store.pointer import GENESIS_POINTER, Pointer, read_pointer, write_pointer
from model_store.store.folders import read_stored_versions
from model_store.store.publishing import discard_version
from model_store.store.state import ModelState

__all__ = ["commit", "recover"]


def commit(
    layout: StoreLayout,
    state: ModelState,
    drafts: list[dict[str, Any]],
    *,
    activate: tuple[str, str] | None = None,
) -> list[dict[str, Any]]:
    """Append ``drafts`` (make_entry keyword arguments) to the trail, then move the pointer's head.

    ``activate=(version, digest)`` also makes that version active, as of the last new entry's time.
    """
    previous = state.last_entry
    entries = []
    for draft in drafts:
        previous = make_entry(previous, **draft)
        entries.append(previous)
    append_entries(layout.history(state.name), entries)
    state.lines.extend(HistoryLine(len(state.lines) + index + 1, entry) for index, entry in enumerate(entries))
    last = entries[-1]
    if activate is not None:
        pointer = Pointer(activate[0], activate[1], last["time"], last["hash"], last["seq"])
    else:
        pointer = state.pointer.moved_head(last["hash"], last["seq"])
    write_pointer(layout.pointer(state.name), pointer)
    state.pointer = pointer
    return entries


def recover(layout: StoreLayout, name: str, *, now: str, actor: str, via: str,
            rebuilt: Pointer | None = None) -> ModelState:
    """Load the model's state for a change, completing any interrupted change first (lock held).

    Every check ``Store.verify_history`` makes runs before anything is written
    (only the states a crash leaves are completed instead of refused), so a
    tampered model is left as it was found and no change is made while it
    fails verification. ``rebuilt`` (``pointer_repair``) stands for the pointer
    file, which is not read: the pointer the verified trail leads to.
    """
    history_path = layout.history(name)
    trail = read_trail(history_path, name, root=layout.root)
    lines = trail.lines
    pointer = rebuilt if rebuilt is not None else read_pointer(layout.pointer(name), root=layout.root)
    check_chain(lines, name, pointer.history_head if pointer else None)
    if pointer is None:
        check_head(lines, None, name)  # raises when the trail has entries: its pointer was deleted
    # A new model (or one from a store older than genesis pointers) gets its genesis pointer now,
    # before its first entry, so that from then on a missing pointer always means tampering.
    state = ModelState(name, lines, pointer or GENESIS_POINTER)
    position = head_position(lines, state.pointer.history_head)
    if position is None:
        check_head(lines, state.pointer, name)  # raises: the trail is shorter than the pointer says
    if position == len(lines) - 1:
        check_active(state.pointer, state.stack(), name)  # no interrupted change explains a mismatch
    else:
        check_tail(lines, position, state.pointer, name)  # more than one command's entries: not a crash
    stored = read_stored_versions(layout, name)
    interrupted = check_versions(stored, lines, name, auditing=False)
    records = [item.record for item in stored]
    _remove_temporaries(layout.model(name))
    if pointer is None:
        write_pointer(layout.pointer(name), state.pointer)
    repaired = repair_end(history_path, trail)
    notes = [repaired] if repaired else []
    if position < len(lines) - 1:
        notes.append(
            f"entries seq {lines[position + 1].seq} to {lines[-1].seq} were written by an interrupted command "
            "before it updated the active pointer"
        )
    drafts = []
    if interrupted is not None:
        drafts.append(
            _draft(now, interrupted.published_by, interrupted.published_via or via, "publish", interrupted.version,
                   interrupted.digest,
                   f"recovered: stored at {interrupted.published_at}, but the publisher was interrupted "
                   "before it wrote this entry")
        )
    for record in records:
        event = state.last_event(record.version)
        if record is not interrupted and event is not None and event["action"] == "prune":
            discard_version(layout.version(name, record.version), layout.staging)
            notes.append(f"finished removing pruned version {record.version}")
    if notes:
        drafts.append(_draft(now, actor, via, "recover", None, None,
                             "completed an interrupted change: " + "; ".join(notes)))
    if drafts:
        stack = state.stack()
        target = stack[-1][:2] if stack else None
        current = (state.pointer.version, state.pointer.digest)
        commit(layout, state, drafts, activate=target if target and target != current else None)
    return state


def _remove_temporaries(directory: Path) -> None:
    """Delete the temporaries of atomic writes killed before their rename (lock held: no live writer owns one)."""
    for entry in os.listdir(directory):
        path = directory / entry
        if entry.startswith(TEMP_PREFIX) and path.is_file() and not path.is_symlink():
            path.unlink()


def _draft(time: str, actor: str, via: str, action: str, version: str | None, digest: str | None,
           reason: str) -> dict[str, Any]:
    return {"time": time, "actor": actor, "via": via, "action": action, "version": version, "digest": digest,
            "reason": reason}
