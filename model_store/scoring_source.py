"""Which bundle file scoring uses: a bundle path, or a version from the store.

From the store, ``rbfgate score --store DIR --model NAME`` takes the active
version, ``--version V`` that version, and ``--at TIME`` the version that was
live at that moment according to the model's history (an auditor's re-run of
a past month with what was live then). The history's hash chain is verified
before it is believed, and the bundle is loaded as the store loads it for
serving: checksums, digest as published, golden vectors, signature policy.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path

from model_store.bundle import Bundle, load_bundle
from model_store.domain_policy import DEFAULT_OUTSIDE_ACTION
from model_store.errors import InputError, NotFoundError
from model_store.store import Store
from model_store.store.domain_choice import outside_action_from
from model_store.store.state import activation_stack

__all__ = ["ScoringModel", "from_bundle_path", "from_store", "parse_moment", "version_live_at"]


@dataclass(frozen=True)
class ScoringModel:
    """The verified bundle, a one-line description of where it came from (for the output's metadata),
    and what becomes of rows outside its domain: the store's choice for the model, else ``refuse``."""

    bundle: Bundle
    origin: str
    outside_action: str = DEFAULT_OUTSIDE_ACTION


def from_bundle_path(path: Path) -> ScoringModel:
    bundle = load_bundle(path)
    return ScoringModel(bundle, f"bundle {path}")


def from_store(store: Store, name: str, *, version: str | None = None, at: str | None = None) -> ScoringModel:
    """The active version, ``version``, or the version live at ``at`` (RFC 3339), loaded and verified."""
    if version is not None and at is not None:
        raise InputError("give --version or --at, not both")
    if at is not None:
        moment = parse_moment(at)
        store.verify_history(name)  # an audit answer must not rest on an edited trail
    entries = store.history(name)
    if at is not None:
        # The outside-domain choice in force then, with the version live then.
        entries = [entry for entry in entries if _entry_time(entry) <= moment]
        version = version_live_at(entries, moment)
        if version is None:
            raise NotFoundError(f"no version of {name} was active at {at}; 'rbfgate history {name}' shows when "
                                "versions were activated")
        how = f"live at {at}"
    elif version is None:
        active = store.active(name)
        if active is None:
            raise NotFoundError(f"{name} has no active version in {store.root}; give --version or activate one")
        version, how = active.version, "active"
    else:
        how = "as given"
    try:
        bundle = store.load_verified(name, version)
    except NotFoundError as exc:
        if at is None:
            raise
        raise NotFoundError(f"{name} {version} was live at {at} but is no longer in the store (pruned); "
                            "restore it from a backup to re-run with it") from exc
    return ScoringModel(bundle, f"store {store.root}, model {name}, version {version} ({how})",
                        outside_action_from(entries))


def parse_moment(text: str) -> datetime:
    """An RFC 3339 date-time with a time zone (``2026-12-01T21:40:00Z``, ``...+01:00``), as UTC."""
    try:
        moment = datetime.fromisoformat(text.strip())
    except ValueError as exc:
        raise InputError(f"--at {text!r}: not an RFC 3339 time; write it like 2026-12-01T21:40:00Z") from exc
    if moment.tzinfo is None or "T" not in text.upper():
        raise InputError(f"--at {text!r}: give a date, a time and a time zone, e.g. 2026-12-01T21:40:00Z")
    return moment.astimezone(timezone.utc)


def version_live_at(entries: list[dict], moment: datetime) -> str | None:
    """The version active at ``moment``: the activation stack of the entries up to it (inclusive).

    History times are RFC 3339 UTC with whole seconds, so an activation at
    21:40:00 is live from 21:40:00 on; a moment between two entries of the
    same second resolves to the later one.
    """
    until = [entry for entry in entries if _entry_time(entry) <= moment]
    stack = activation_stack(until)
    return stack[-1][0] if stack else None


def _entry_time(entry: dict) -> datetime:
    return datetime.fromisoformat(entry["time"]).astimezone(timezone.utc)
