"""Writing history with the pointer, and completing changes a crash interrupted.

Every change appends its entries in one write, then replaces the active
pointer (new head, and the new active version for activate and rollback).
A writer killed between those steps, or between storing a version and
writing its publish entry, leaves a state that the next writer (holding the
lock, before it changes anything) completes and records as a ``recover``
entry, so the trail says what happened. A trail whose hash chain is broken,
or that is shorter than the pointer says, is never "recovered": the change
is refused with ``HistoryError`` so that the evidence stays as it is.
"""

from __future__ import annotations

import os
from typing import Any

from model_store.store.audit import check_active, check_chain, check_head, head_position
from model_store.store.durable import atomic_write
from model_store.store.history import GENESIS, HistoryLine, append_entries, make_entry, read_trail
from model_store.store.layout import StoreLayout
from model_store.store.pointer import Pointer, read_pointer, write_pointer
from model_store.store.publishing import discard_version, read_record
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
    elif state.pointer is not None:
        pointer = state.pointer.moved_head(last["hash"], last["seq"])
    else:
        pointer = Pointer(None, None, None, last["hash"], last["seq"])
    write_pointer(layout.pointer(state.name), pointer)
    state.pointer = pointer
    return entries


def recover(layout: StoreLayout, name: str, *, now: str, actor: str) -> ModelState:
    """Load the model's state for a change, completing any interrupted change first (lock held)."""
    history_path = layout.history(name)
    trail = read_trail(history_path, name)
    lines, dropped = trail.lines, trail.unfinished
    pointer = read_pointer(layout.pointer(name))
    check_chain(lines, name, pointer.history_head if pointer else None)
    position = head_position(lines, pointer.history_head if pointer else GENESIS)
    if position is None:
        check_head(lines, pointer, name)  # raises: the trail is shorter than the pointer says
    if dropped:  # cut off the unfinished line
        data = history_path.read_bytes()
        atomic_write(history_path, data[: data.rfind(b"\n") + 1])
    elif trail.unterminated:  # a complete last entry that lost its line end: restore it before appending
        atomic_write(history_path, history_path.read_bytes() + b"\n")
    state = ModelState(name, lines, pointer)
    if position == len(lines) - 1:
        check_active(pointer, state.stack(), name)  # no interrupted change explains a mismatch
    notes = []
    if dropped:
        notes.append("removed an incomplete last line left by an interrupted write")
    if position < len(lines) - 1:
        notes.append(
            f"entries seq {lines[position + 1].seq} to {lines[-1].seq} were written by an interrupted command "
            "before it updated the active pointer"
        )
    drafts = []
    for version in _stored_versions(layout, name):
        event = state.last_event(version)
        if event is None:
            record = read_record(layout.record(name, version))
            drafts.append(
                _draft(now, record.published_by, "publish", version, record.digest,
                       f"recovered: stored at {record.published_at}, but the publisher was interrupted "
                       "before it wrote this entry")
            )
        elif event["action"] == "prune":
            discard_version(layout.version(name, version), layout.staging)
            notes.append(f"finished removing pruned version {version}")
    if notes:
        drafts.append(_draft(now, actor, "recover", None, None, "completed an interrupted change: " + "; ".join(notes)))
    if drafts:
        stack = state.stack()
        target = stack[-1] if stack else None
        current = (pointer.version, pointer.digest) if pointer else (None, None)
        commit(layout, state, drafts, activate=target if target and target != current else None)
    return state


def _stored_versions(layout: StoreLayout, name: str) -> list[str]:
    try:
        return sorted(entry for entry in os.listdir(layout.versions(name)) if not entry.startswith("."))
    except FileNotFoundError:
        return []


def _draft(time: str, actor: str, action: str, version: str | None, digest: str | None, reason: str) -> dict[str, Any]:
    return {"time": time, "actor": actor, "action": action, "version": version, "digest": digest, "reason": reason}
