"""The trust trail: every change to the trusted keys is a hash-chained history entry.

The keys a store accepts signatures from decide whether unsigned bundles may
be published and activated, so changing them is recorded like an activation:
``STORE/trust.jsonl`` holds ``trust-add`` and ``trust-remove`` entries (same
format and chain as a model's history, see ``model_store.store.history``), and
the settings file records the trail's last hash and seq (``trust_head``,
``trust_seq``), as a model's pointer does. ``trusted_keys`` in the settings
must be exactly what the trail's entries lead to: a key removed from the
settings by hand (which would silently stop requiring signatures), a key
added by hand, a cut-off or edited trail are reported as ``HistoryError``,
and every reader that needs the keys (publish, activation, every load) is
refused until the settings and the trail are restored.

A trust change appends its entry to ``trust.jsonl`` first and rewrites the
settings second. A change killed in between leaves one entry (and perhaps
``trust-recover`` entries of recoveries killed in turn) after the head the
settings record. That change is not in force: readers go by the settings,
which still say what was trusted before it. ``check_trust_settled`` reports it
to auditors (``history --verify``), and the next change to the store completes
it, rolling forward, as the entry is the record of what the operator asked
for (``trust-recover`` says so). More than one change after the head is not
what a crash leaves: the settings were put back to an older copy by hand, and
every change is refused.

A store made before the trail existed has keys and no ``trust_head``: its keys
are taken as they are until the next change to the store, which records them
as ``trust-add`` entries ("recorded when the trust trail began") first, with
that change's actor and via (who added each key, and when, is in the reason). A
change killed while doing so leaves some of those entries and settings still
without ``trust_head``; the next change completes it (``trust-recover``).
Settings without ``trust_head`` in a store whose model histories hold entries
written since the trail exists (they carry ``via``) lost their trail by hand:
that would end signature checks unseen, so it is refused, not started anew.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from model_store.errors import HistoryError, StoreError
from model_store.store.audit import check_chain, head_position
from model_store.store.history import GENESIS, HistoryLine, Trail, append_entries, make_entry, read_trail, repair_end
from model_store.store.layout import StoreLayout, model_names, read_settings, write_settings
from model_store.store.signing import TrustedKey

__all__ = [
    "TRUST_TRAIL", "change_trust", "check_trail_kept", "check_trust_settled", "recover_trust", "trust_entries",
    "verified_keys",
]

TRUST_TRAIL = "trust trail"  # how messages name it
_RESTORE = "restore rbfgate-store.json and trust.jsonl from a backup and investigate who changed them"
_STARTED = "recorded when the trust trail began"


@dataclass
class _TrustState:
    settings: dict[str, Any]
    lines: list[HistoryLine]
    tracked: bool
    trail: Trail


def trust_entries(layout: StoreLayout) -> list[dict[str, Any]]:
    """The trust trail's entries, oldest first (not verified: see ``verified_keys``)."""
    return [item.entry for item in read_trail(layout.trust_trail, TRUST_TRAIL, root=layout.root).lines]


def verified_keys(layout: StoreLayout) -> list[TrustedKey]:
    """The trusted keys, after checking the settings against the verified trust trail."""
    state = _read(layout)
    if not state.tracked:
        return _keys(state.settings)
    position = head_position(state.lines, state.settings["trust_head"])
    if position is None:
        raise HistoryError(
            f"{TRUST_TRAIL}: the settings record its last entry as seq {state.settings.get('trust_seq')}, which it "
            f"does not hold; entries were removed from trust.jsonl (truncated) or it was rewritten; {_RESTORE}"
        )
    _check_keys(state.settings, state.lines[: position + 1])
    return _keys(state.settings)


def recover_trust(layout: StoreLayout, *, now: str, actor: str, via: str) -> None:
    """Before a change (store lock held): start the trail of a legacy store, or finish an interrupted trust change."""
    state = _read(layout)
    settings = state.settings
    repaired = repair_end(layout.trust_trail, state.trail)
    if not state.tracked:
        _check_not_dropped(layout)
        recorded = {item.entry["key_id"] for item in state.lines}
        # Recorded as what they are: entries written now, by the change that starts the trail (its actor and
        # via); who added each key, and when, is what the older settings say, kept in the reason.
        drafts = [
            _draft(now, actor, via, "trust-add", key,
                   f"{_STARTED}: trusted since {key.added_at or 'an unknown time'}, "
                   f"added by {key.added_by or 'an unknown actor'}")
            for key in _keys(settings) if key.key_id not in recorded
        ]
        if state.lines or repaired:
            drafts.append(_note(now, actor, via, "completed the start of the trust trail, interrupted after seq "
                                f"{state.lines[-1].seq if state.lines else 0}" + (f"; {repaired}" if repaired else "")))
        _commit(layout, settings, state.lines, drafts)
        return
    position = head_position(state.lines, settings["trust_head"])
    if position is None:
        verified_keys(layout)  # raises, naming the truncation
    if position == len(state.lines) - 1:
        _check_keys(settings, state.lines)
        if repaired:
            _commit(layout, settings, state.lines, [_note(now, actor, via, f"completed an interrupted trust change: "
                                                                             f"{repaired}")])
        return
    _check_keys(settings, state.lines[: position + 1])  # the settings were right before the interrupted change
    change = _interrupted_change(state.lines, position, settings)
    reason = f"completed an interrupted trust change: applied {_describe(change)}"
    _commit(layout, settings, state.lines, [_note(now, actor, via, reason + (f"; {repaired}" if repaired else ""))])


def check_trust_settled(layout: StoreLayout) -> None:
    """Raise ``HistoryError`` when a trust change was interrupted: entries after the head the settings record,
    an unfinished last line, or a trail whose start was interrupted. For auditors: such a change is not in
    force, and the next change to the store completes it (``recover_trust``)."""
    state = _read(layout)
    completes = "it is not in force yet, and the next change to the store completes it (a trust-recover entry)"
    if state.trail.unfinished:
        raise HistoryError(
            f"{TRUST_TRAIL}: trust.jsonl ends in an unfinished line after seq "
            f"{state.lines[-1].seq if state.lines else 0}: a trust change was killed while appending it; {completes}"
        )
    if not state.tracked:
        if state.lines:
            raise HistoryError(
                f"{TRUST_TRAIL}: trust.jsonl holds {len(state.lines)} entries recording the keys of this older store, "
                "but rbfgate-store.json records no trust_head yet: the change that started the trail was interrupted "
                f"before it updated the settings; {completes}"
            )
        return
    position = head_position(state.lines, state.settings["trust_head"])
    if position is None or position == len(state.lines) - 1:
        return  # None: verified_keys names the truncation
    change = _interrupted_change(state.lines, position, state.settings)
    trusted = ", ".join(key.key_id for key in _keys(state.settings)) or "none"
    raise HistoryError(
        f"{TRUST_TRAIL}: trust.jsonl holds {_describe(change)} after seq {state.lines[position].seq}, the last entry "
        f"rbfgate-store.json records: a trust change was interrupted after it wrote its entry and before it updated "
        f"the settings, which still trust: {trusted}; {completes}"
    )


def _interrupted_change(lines: list[HistoryLine], position: int, settings: dict[str, Any]) -> dict[str, Any]:
    """The first entry after the settings' head (``lines[position + 1:]``): what an interrupted change leaves is one
    trust-add or trust-remove entry, or a trust-recover note, followed by trust-recover entries of recoveries killed
    in turn; ``HistoryError`` for more: the settings were replaced by an older copy of themselves."""
    later = [item.entry for item in lines[position + 1:]]
    changes = [entry for entry in later if entry["action"] != "trust-recover"]
    if len(changes) <= 1 and (not changes or later[0] is changes[0]):
        return later[0]  # the change, or a trust-recover note whose own settings write was interrupted
    listed = ", ".join(_describe(entry) for entry in later[:4]) + (", ..." if len(later) > 4 else "")
    raise HistoryError(
        f"{TRUST_TRAIL}: rbfgate-store.json records seq {settings.get('trust_seq')} as the trail's last entry, but "
        f"{len(later)} entries come after it ({listed}); an interrupted trust change leaves one, so the settings were "
        f"replaced by an older copy of themselves; {_RESTORE}"
    )


def _describe(entry: dict[str, Any]) -> str:
    key = f" of key {entry['key_id']}" if "key_id" in entry else ""
    return (f"seq {entry['seq']} ({entry['action']}{key} by {entry['actor']} via {entry.get('via') or '-'} "
            f"at {entry['time']})")


def check_trail_kept(layout: StoreLayout, entries: list[dict[str, Any]], model: str) -> None:
    """Raise ``HistoryError`` when the settings have no trust trail although ``model``'s history was written
    since trails exist (an entry with ``via``): the trail and its head were removed by hand."""
    if "trust_head" in read_settings(layout):
        return
    first = next((entry for entry in entries if "via" in entry), None)
    if first is not None:
        raise HistoryError(
            f"{TRUST_TRAIL}: rbfgate-store.json records no trust trail (no trust_head), but the history of {model} "
            f"holds entries written by a version of rbfgate that keeps one (from seq {first['seq']}); the trail and "
            f"its head were removed by hand, which would end signature checks unseen; {_RESTORE}"
        )


def change_trust(layout: StoreLayout, action: str, key: TrustedKey, *, now: str, actor: str, via: str,
                 reason: str) -> dict[str, Any]:
    """Append a ``trust-add`` or ``trust-remove`` entry, then write the settings it leads to (lock held)."""
    state = _read(layout)
    [entry] = _commit(layout, state.settings, state.lines, [_draft(now, actor, via, action, key, reason)])
    return entry


def _commit(layout, settings, lines: list[HistoryLine], drafts: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """Append ``drafts``, then rewrite the settings: keys folded from the whole trail, and its new head."""
    previous = lines[-1].entry if lines else None
    written = []
    for draft in drafts:
        previous = make_entry(previous, **draft)
        written.append(previous)
    if written:
        append_entries(layout.trust_trail, written)
    entries = [item.entry for item in lines] + written
    # A key the settings already trust keeps when and by whom it was added there: for keys recorded when the
    # trail began, the entry's time and actor are those of the migration, not of the addition.
    known = {(key.key_id, key.public_key): key for key in _keys(settings)}
    keys = [known.get((key.key_id, key.public_key), key) for key in _fold(entries)]
    settings = {
        **settings,
        "trusted_keys": [key.to_dict() for key in keys],
        "trust_head": entries[-1]["hash"] if entries else GENESIS,
        "trust_seq": entries[-1]["seq"] if entries else 0,
    }
    write_settings(layout, settings)
    return written


def _read(layout: StoreLayout) -> _TrustState:
    settings = read_settings(layout)
    trail = read_trail(layout.trust_trail, TRUST_TRAIL, root=layout.root)
    lines = trail.lines
    tracked = "trust_head" in settings
    if not tracked:
        if lines and not _interrupted_start(settings, lines):
            raise HistoryError(
                f"{TRUST_TRAIL}: trust.jsonl has {len(lines)} entries but rbfgate-store.json no longer records its "
                f"head (trust_head); the settings were rewritten by hand; {_RESTORE}"
            )
        return _TrustState(settings, lines, False, trail)
    if not isinstance(settings["trust_head"], str):
        raise StoreError(f"{layout.settings}: trust_head is malformed; {_RESTORE}")
    check_chain(lines, TRUST_TRAIL, settings["trust_head"], restore=_RESTORE)
    return _TrustState(settings, lines, True, trail)


def _interrupted_start(settings: dict[str, Any], lines: list[HistoryLine]) -> bool:
    """Whether ``lines`` are what a change killed while it started the trail leaves: the settings' keys
    recorded as "recorded when the trust trail began", chained from the start, before the settings moved."""
    check_chain(lines, TRUST_TRAIL, None, restore=_RESTORE)
    keys = {(key.key_id, key.public_key) for key in _keys(settings)}
    seen = [(item.entry.get("key_id"), item.entry.get("public_key")) for item in lines]
    return len(set(seen)) == len(seen) and set(seen) <= keys and all(
        item.entry["action"] == "trust-add" and str(item.entry["reason"]).startswith(_STARTED) for item in lines
    )


def _check_not_dropped(layout: StoreLayout) -> None:
    """Before starting a trail: no model may hold entries written since trails exist (``check_trail_kept``)."""
    for name in model_names(layout):
        try:
            entries = [item.entry for item in read_trail(layout.history(name), name, root=layout.root).lines]
        except HistoryError:
            continue  # that model's own changes are refused; its trail is no evidence either way
        check_trail_kept(layout, entries, name)


def _check_keys(settings: dict[str, Any], lines: list[HistoryLine]) -> None:
    expected = {(key.key_id, key.public_key) for key in _fold([item.entry for item in lines])}
    found = {(key.key_id, key.public_key) for key in _keys(settings)}
    if expected == found:
        return
    added = sorted(key_id for key_id, _ in found - expected)
    removed = sorted(key_id for key_id, _ in expected - found)
    what = "; ".join(part for part in (
        f"it trusts {', '.join(added)}, which no trust-add entry added" if added else "",
        f"it no longer trusts {', '.join(removed)}, which no trust-remove entry removed "
        "(so signatures could silently stop being required)" if removed else "",
    ) if part)
    raise HistoryError(f"{TRUST_TRAIL}: rbfgate-store.json was edited by hand: {what}; {_RESTORE}")


def _fold(entries: list[dict[str, Any]]) -> list[TrustedKey]:
    keys: dict[str, TrustedKey] = {}
    for entry in entries:
        if entry["action"] == "trust-add":
            keys[entry["key_id"]] = TrustedKey(entry["key_id"], entry["public_key"], entry["label"], entry["time"],
                                               entry["actor"])
        elif entry["action"] == "trust-remove":
            keys.pop(entry["key_id"], None)
    return list(keys.values())


def _keys(settings: dict[str, Any]) -> list[TrustedKey]:
    try:
        return [TrustedKey(**key) for key in settings.get("trusted_keys", [])]
    except TypeError as exc:
        raise StoreError(f"rbfgate-store.json: a trusted key entry is malformed ({exc}); {_RESTORE}") from exc


def _note(now: str, actor: str, via: str, reason: str) -> dict[str, Any]:
    return {"time": now, "actor": actor, "via": via, "action": "trust-recover", "version": None, "digest": None,
            "reason": reason}


def _draft(now: str, actor: str, via: str, action: str, key: TrustedKey, reason: str) -> dict[str, Any]:
    return {"time": now, "actor": actor, "via": via, "action": action, "version": None, "digest": None,
            "reason": reason, "key_id": key.key_id, "public_key": key.public_key, "label": key.label}
