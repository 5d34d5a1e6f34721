"""Verifying a history trail and naming the first bad entry.

The walk goes through the lines in file order, expecting seq 1, 2, 3, ...
each linking to the hash of the one before. At the first line that breaks
this, the diagnosis uses two facts: an entry whose own hash does not match
its content was edited; and an authentic entry is *referenced*, either by
the next entry's ``prev_hash`` or by the active pointer's head, so an entry
nobody references was inserted (or replaced, when it took an existing
entry's place). A sequence number that jumps ahead marks a deletion when
the skipped number never appears, or a reordering when it appears later.
Finally the pointer's head must be the last entry's hash, else the trail
was truncated (the head is not in it) or has entries after the head; and
every stored version's ``published.json`` must name (``publish_seq``) the
publish entry of that version and digest, else entries were deleted (the
whole trail, say, with the pointer) or a version was added by hand.
"""

from __future__ import annotations

from model_store.errors import HistoryError
from model_store.store.history import GENESIS, HistoryLine
from model_store.store.pointer import Pointer
from model_store.store.folders import StoredVersion, binding_problem
from model_store.store.publishing import VersionRecord
from model_store.store.state import Step, stored_versions

__all__ = ["check_active", "check_chain", "check_head", "check_tail", "check_versions", "head_position"]

_RESTORE = "restore history.jsonl from a backup and investigate who changed it"
_POINTER_RESTORE = ("restore active.json from a backup so that it matches the trail, or rebuild it from the verified "
                    "trail with 'rbfgate repair-pointer {model} --reason TEXT', and investigate who changed it")


def check_chain(lines: list[HistoryLine], model: str, head: str | None, *, restore: str = _RESTORE) -> None:
    """Raise ``HistoryError`` naming the first entry where the hash chain breaks; ``restore`` says what to do."""
    referenced = {item.entry["prev_hash"] for item in lines}
    if head is not None:
        referenced.add(head)
    expected_seq, expected_prev = 1, GENESIS
    for index, item in enumerate(lines):
        if not item.hash_ok:
            if item.seq == expected_seq:
                found = f"entry seq {item.seq} (line {item.line}) was edited: its content no longer matches its hash"
            else:
                found = (
                    f"line {item.line} holds an entry claiming seq {item.seq} where seq {expected_seq} belongs, and "
                    "its content does not match its hash: it was inserted (or edited)"
                )
            raise HistoryError(f"history of {model}: {found}; {restore}")
        if item.seq == expected_seq and item.entry["prev_hash"] == expected_prev:
            expected_seq, expected_prev = item.seq + 1, item.entry["hash"]
            continue
        raise HistoryError(f"history of {model}: {_diagnose(lines, index, expected_seq, referenced, head)}; {restore}")


def _diagnose(lines: list[HistoryLine], index: int, expected_seq: int, referenced: set[str], head: str | None) -> str:
    item = lines[index]
    if index > 0:
        before = lines[index - 1]
        if before.entry["hash"] not in referenced:
            if item.entry["prev_hash"] == before.entry["prev_hash"]:
                return (
                    f"entry seq {before.seq} (line {before.line}) was inserted: no later entry links to it, "
                    f"and entry seq {item.seq} (line {item.line}) links to the same predecessor"
                )
            if item.seq == expected_seq:
                return (
                    f"entry seq {before.seq} (line {before.line}) was replaced: its content was changed and its "
                    f"hash recomputed, and entry seq {item.seq} records a different hash for it"
                )
    is_last = index == len(lines) - 1
    if item.entry["hash"] not in referenced and (not is_last or head is not None):
        return f"entry seq {item.seq} (line {item.line}) was inserted: no later entry and no active pointer links to it"
    if item.seq > expected_seq:
        later = next((other for other in lines[index + 1 :] if other.seq == expected_seq), None)
        if later is not None:
            return (
                f"entry seq {item.seq} (line {item.line}) is out of order: entry seq {expected_seq} comes after it "
                f"at line {later.line}; the entries were reordered"
            )
        return (
            f"entry seq {expected_seq} is missing: line {item.line} holds seq {item.seq} where seq {expected_seq} "
            "belongs; the entry was deleted"
        )
    if item.seq < expected_seq:
        first = next((other for other in lines[:index] if other.seq == item.seq), None)
        if first is not None:
            return (
                f"entry seq {item.seq} appears again at line {item.line} (first at line {first.line}); "
                "an entry was copied or inserted"
            )
        return f"entry seq {item.seq} (line {item.line}) is out of order: seq {expected_seq} belongs there"
    return (
        f"entry seq {item.seq} (line {item.line}) does not link to entry seq {item.seq - 1}: its prev_hash is "
        f"{item.entry['prev_hash'][:16]}..., an entry before it was changed"
    )


def head_position(lines: list[HistoryLine], head: str) -> int | None:
    """Index of the entry whose hash is ``head`` (-1 for GENESIS, an empty trail), or None."""
    if head == GENESIS:
        return -1
    for index, item in enumerate(lines):
        if item.entry["hash"] == head:
            return index
    return None


def check_head(lines: list[HistoryLine], pointer: Pointer | None, model: str) -> None:
    """Raise ``HistoryError`` unless the pointer's head is the trail's last entry."""
    if pointer is None:
        if lines:
            raise HistoryError(
                f"history of {model}: the trail has {len(lines)} entries but active.json, which records its "
                "last hash, is missing; a model has its pointer before its first entry, so it was deleted; "
                f"restore active.json from a backup or rebuild it with 'rbfgate repair-pointer {model} --reason "
                "TEXT', and investigate who deleted it"
            )
        return
    last = lines[-1].entry["hash"] if lines else GENESIS
    if pointer.history_head == last:
        return
    position = head_position(lines, pointer.history_head)
    if position is None:
        ends = f"ends at seq {lines[-1].seq}" if lines else "is empty"
        raise HistoryError(
            f"history of {model}: the trail {ends}, but the active pointer records its last entry as seq "
            f"{pointer.history_seq} (hash {pointer.history_head[:16]}...); entries were removed from the end "
            f"(truncated) or the trail was rewritten; {_RESTORE}"
        )
    check_tail(lines, position, pointer, model)
    first_extra = lines[position + 1]
    raise HistoryError(
        f"history of {model}: entries from seq {first_extra.seq} (line {first_extra.line}) on come after the last "
        f"entry recorded in the active pointer (seq {pointer.history_seq}); they were appended by hand or left by "
        "an interrupted command (the next change to this model completes it)"
    )


def check_tail(lines: list[HistoryLine], position: int, pointer: Pointer, model: str) -> None:
    """Raise ``HistoryError`` unless the entries after the pointer's head (``lines[position + 1:]``) are what one
    interrupted command leaves.

    A command appends all its entries in one write and then moves the pointer,
    and the next change completes it first, so the entries a pointer does not
    yet record are those of one change (one entry, or the ``prune`` entries of
    one prune), followed by ``recover`` entries of recoveries killed in turn.
    More is a pointer put back to an older copy of itself.
    """
    changes = [item for item in lines[position + 1:] if item.entry["action"] != "recover"]
    if len(changes) <= 1 or all(item.entry["action"] == "prune" for item in changes):
        return
    listed = ", ".join(f"seq {item.seq} {item.entry['action']} {item.entry['version'] or ''}".rstrip()
                       for item in changes[:4]) + (", ..." if len(changes) > 4 else "")
    raise HistoryError(
        f"history of {model}: the active pointer records seq {pointer.history_seq} as the last entry, but {len(changes)} "
        f"changes come after it ({listed}); an interrupted command leaves at most one, so active.json was replaced by "
        f"an older copy of itself; {_POINTER_RESTORE.format(model=model)}"
    )


def check_active(pointer: Pointer | None, stack: list[Step], model: str) -> None:
    """Raise ``HistoryError`` unless the pointer names the version the trail's activations lead to."""
    expected = stack[-1][:2] if stack else (None, None)
    found = (pointer.version, pointer.digest) if pointer is not None else (None, None)
    if found != expected:
        raise HistoryError(
            f"history of {model}: the active pointer names version {found[0]} (digest {str(found[1])[:16]}...), "
            f"but the trail's activations and rollbacks lead to {expected[0]} (digest {str(expected[1])[:16]}...); "
            f"active.json was edited by hand: {_POINTER_RESTORE.format(model=model)}"
        )


def check_versions(
    stored: list[StoredVersion], lines: list[HistoryLine], model: str, *, auditing: bool
) -> VersionRecord | None:
    """Raise ``HistoryError`` unless every version folder is bound to its publish entry, and every version the
    trail says is stored has its folder.

    Each folder must agree with itself (``folders.binding_problem``: folder
    name, record and manifest) and its record's ``publish_seq`` must name the
    publish entry of that version with that digest. One version may lack its
    entry because its publisher was killed after storing it: the one whose
    ``publish_seq`` is the trail's last seq + 1. An auditor (``auditing=True``)
    gets that reported; a change about to write gets it back to record it.
    Any other version without its entry means entries were deleted or a
    version was added by hand; a version whose last publish/prune entry is a
    publish but whose folder is gone was deleted by hand.
    """
    entries = {item.seq: item.entry for item in lines}
    after_last = (lines[-1].seq if lines else 0) + 1
    interrupted = None
    for item in sorted(stored, key=lambda item: (item.record.publish_seq if item.record else 0, item.folder)):
        problem = binding_problem(model, item)
        if problem is not None:
            raise problem
        record = item.record
        entry = entries.get(record.publish_seq)
        if entry is not None and (entry["action"], entry["version"], entry["digest"]) == (
            "publish", record.version, record.digest
        ):
            continue
        if entry is None and record.publish_seq == after_last and interrupted is None:
            interrupted = record
            continue
        if entry is None:
            ends = f"ends at seq {after_last - 1}" if lines else "is empty"
            found = f"the trail has no entry seq {record.publish_seq} (it {ends})"
        else:
            found = (
                f"entry seq {record.publish_seq} is {entry['action']} {entry['version'] or '-'} "
                f"(digest {str(entry['digest'])[:16]}...)"
            )
        raise HistoryError(
            f"history of {model}: version {record.version} is stored (digest {record.digest[:16]}...) and its "
            f"published.json names publish seq {record.publish_seq}, but {found}; entries were deleted, or the "
            f"version was added or its record rewritten by hand; {_RESTORE}"
        )
    folders = {item.folder for item in stored}
    for version, entry in stored_versions([item.entry for item in lines]).items():
        if version not in folders:
            raise HistoryError(
                f"history of {model}: version {version} was published at seq {entry['seq']} (digest "
                f"{str(entry['digest'])[:16]}...) and never pruned, but its folder versions/{version} is missing; "
                "it was deleted by hand (prune records every removal); restore the folder from a backup"
            )
    if interrupted is not None and auditing:
        raise HistoryError(
            f"history of {model}: version {interrupted.version} was stored at {interrupted.published_at} by "
            f"{interrupted.published_by} after the trail's last entry, but has no publish entry: its publisher "
            "was killed before it wrote the entry (the next change to this model records it)"
        )
    return interrupted
