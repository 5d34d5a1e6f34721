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

from typing import Any

from model_store.store.state import activation_stack
from model_store.view import charts

__all__ = ["SWITCH_ACTIONS", "timeline_data"]

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
