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

A store made before the trail existed has keys and no ``trust_head``: its keys
are taken as they are until the next change to the store, which records them
as ``trust-add`` entries ("recorded when the trust trail began") first.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from model_store.errors import HistoryError, StoreError
from model_store.store.audit import check_chain, head_position
from model_store.store.history import GENESIS, HistoryLine, append_entries, make_entry, read_trail
from model_store.store.layout import StoreLayout, read_settings, write_settings
from model_store.store.signing import TrustedKey

__all__ = ["TRUST_TRAIL", "change_trust", "recover_trust", "trust_entries", "verified_keys"]

TRUST_TRAIL = "trust trail"  # how messages name it
_RESTORE = "restore rbfgate-store.json and trust.jsonl from a backup and investigate who changed them"


@dataclass
class _TrustState:
    settings: dict[str, Any]
    lines: list[HistoryLine]
    tracked: bool


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
    if not state.tracked:
        drafts = [
            _draft(now, key.added_by or actor, via, "trust-add", key,
                   f"recorded when the trust trail began: trusted since {key.added_at or 'an unknown time'}")
            for key in _keys(settings)
        ]
        _commit(layout, settings, state.lines, drafts)
        return
    position = head_position(state.lines, settings["trust_head"])
    if position is None:
        verified_keys(layout)  # raises, naming the truncation
    if position == len(state.lines) - 1:
        _check_keys(settings, state.lines)
        return
    _check_keys(settings, state.lines[: position + 1])  # the settings were right before the interrupted change
    later = [item.entry for item in state.lines[position + 1:]]
    note = {"time": now, "actor": actor, "via": via, "action": "trust-recover", "version": None, "digest": None,
            "reason": f"completed an interrupted trust change: applied entries seq {later[0]['seq']} to {later[-1]['seq']}"}
    _commit(layout, settings, state.lines, [note])


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
    settings = {
        **settings,
        "trusted_keys": [key.to_dict() for key in _fold(entries)],
        "trust_head": entries[-1]["hash"] if entries else GENESIS,
        "trust_seq": entries[-1]["seq"] if entries else 0,
    }
    write_settings(layout, settings)
    return written


def _read(layout: StoreLayout) -> _TrustState:
    settings = read_settings(layout)
    lines = read_trail(layout.trust_trail, TRUST_TRAIL, root=layout.root).lines
    tracked = "trust_head" in settings
    if not tracked:
        if lines:
            raise HistoryError(
                f"{TRUST_TRAIL}: trust.jsonl has {len(lines)} entries but rbfgate-store.json no longer records its "
                f"head (trust_head); the settings were rewritten by hand; {_RESTORE}"
            )
        return _TrustState(settings, lines, False)
    if not isinstance(settings["trust_head"], str):
        raise StoreError(f"{layout.settings}: trust_head is malformed; {_RESTORE}")
    check_chain(lines, TRUST_TRAIL, settings["trust_head"])
    return _TrustState(settings, lines, True)


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


def _draft(now: str, actor: str, via: str, action: str, key: TrustedKey, reason: str) -> dict[str, Any]:
    return {"time": now, "actor": actor, "via": via, "action": action, "version": None, "digest": None,
            "reason": reason, "key_id": key.key_id, "public_key": key.public_key, "label": key.label}
