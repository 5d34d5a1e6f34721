"""A model's versions over time, from its history entries: which version was live when.

    timeline = timeline_data(entries, now="2026-12-02T10:00:00Z")
    timeline["intervals"]   [{"version", "start", "end", "until"}]   one per stretch a version was live
    timeline["switches"]    [{"time", "action", "version", "actor", "reason", "via"}]
    timeline["rollback_to"] the version a rollback would return to, or None

The active version after each entry is the top of the activation stack
(``model_store.store.state.activation_stack``), the same rule the store applies, so the plot
and the store cannot disagree about what an activation or a rollback did.
"""

from __future__ import annotations

from datetime import datetime, timezone
from typing import Any

from model_store.errors import InputError
from model_store.store.state import activation_stack
from model_store.view import charts

__all__ = ["SWITCH_ACTIONS", "live_at", "parse_moment", "timeline_data"]

SWITCH_ACTIONS = ("activate", "rollback")


def timeline_data(entries: list[dict[str, Any]], *, now: str) -> dict[str, Any]:
    """Intervals and switches of one model's history ``entries`` (oldest first); ``now`` (RFC 3339)
    closes the interval of the version live at the end."""
    intervals: list[dict[str, Any]] = []
    switches: list[dict[str, Any]] = []
    live: str | None = None
    stack: list[tuple[str, str]] = []
    for index, entry in enumerate(entries):
        if entry["action"] not in SWITCH_ACTIONS:
            continue
        stack = activation_stack(entries[: index + 1])
        version = stack[-1][0] if stack else None
        switches.append({
            "time": entry["time"], "action": entry["action"], "version": entry["version"],
            "actor": entry["actor"], "reason": entry.get("reason"), "via": entry.get("via"),
        })
        if version == live:
            continue
        if intervals:
            intervals[-1]["end"] = intervals[-1]["until"] = entry["time"]
        if version is not None:
            intervals.append({"version": version, "start": entry["time"], "end": now, "until": "now"})
        live = version
    return {"intervals": intervals, "switches": switches, "live": live,
            "rollback_to": stack[-2][0] if len(stack) >= 2 else None,
            "chart": charts.timeline_chart(intervals, switches) if switches else None}


def live_at(entries: list[dict[str, Any]], moment: datetime) -> dict[str, Any]:
    """The version live at ``moment`` and the switch that made it live (None before the first)."""
    switches = [entry for entry in entries if entry["action"] in SWITCH_ACTIONS and _time(entry) <= moment]
    if not switches:
        return {"at": _format(moment), "version": None, "since": None, "entry": None}
    last = switches[-1]
    stack = activation_stack(entries[: entries.index(last) + 1])
    return {"at": _format(moment), "version": stack[-1][0] if stack else None, "since": last["time"], "entry": last}


def parse_moment(text: str) -> datetime:
    """An RFC 3339 date-time with an offset (``Z`` or ``+01:00``), as an aware datetime."""
    try:
        moment = datetime.fromisoformat(text.strip().replace("z", "Z"))
    except ValueError:
        moment = None
    if moment is None or moment.tzinfo is None:
        raise InputError(f"time {text[:40]!r}: expected an RFC 3339 date-time with an offset, "
                         "e.g. 2026-12-01T21:40:00Z")
    return moment.astimezone(timezone.utc)


def _time(entry: dict[str, Any]) -> datetime:
    return datetime.strptime(entry["time"], "%Y-%m-%dT%H:%M:%SZ").replace(tzinfo=timezone.utc)


def _format(moment: datetime) -> str:
    return moment.astimezone(timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")
