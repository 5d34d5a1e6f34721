"""Which bundle file scoring uses: a bundle path, or a version from the store.

From the store, ``rbfgate score --store DIR --model NAME`` takes the active
version, ``--version V`` that version, and ``--at TIME`` the version that was
live at that moment according to the model's history (an auditor's re-run of
a past month with what was live then; ``Store.live_at``, as ``rbfgate history
--at`` answers it). The history's hash chain is verified before it is believed, and the bundle is loaded as the store loads it for
serving: checksums, digest as published, golden vectors, signature policy.
"""

from __future__ import annotations

from dataclasses import dataclass
from itertools import takewhile
from datetime import datetime, timezone
from pathlib import Path

from model_store.bundle import Bundle, load_bundle
from model_store.domain_policy import DEFAULT_OUTSIDE_ACTION
from model_store.errors import InputError, NotFoundError
from model_store.store import Store
from model_store.store.domain_choice import outside_action_from
from model_store.store.timeline import parse_moment

__all__ = ["ScoringModel", "from_bundle_path", "from_store"]


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
    entries = None
    if at is not None:
        moment = parse_moment(at)
        live = store.live_at(name, moment)  # verifies the trail first: an audit must not rest on an edited one
        version, how = live.version, f"live at {live.at}"
        # The outside-domain choice in force then, with the version live then (entries in chain order).
        entries = list(takewhile(lambda entry: _entry_time(entry) <= moment, store.history(name)))
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
    action = outside_action_from(entries) if entries is not None else store.outside_action(name)
    return ScoringModel(bundle, f"store {store.root}, model {name}, version {version} ({how})", action)


def _entry_time(entry: dict) -> datetime:
    return datetime.fromisoformat(entry["time"]).astimezone(timezone.utc)
