"""What was live at a given moment: the version, the entry that made it live and the entry that ended it.

The answer is read from a verified trail (the caller verifies it first). An
entry takes effect at its ``time``; at a moment equal to an entry's time the
entry counts. Entries are taken in chain order (seq), up to the first whose
time is later than the moment asked about, so a clock that went backwards
between two hosts cannot make a later entry count before an earlier one.
A re-activation of the live version changes nothing: the entry that made it
live stays the one that moved the pointer to it.

    moment    RFC 3339 date-time with an offset, e.g. 2026-11-30T14:00:00Z or 2026-11-30T15:00:00+01:00
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from datetime import datetime, timedelta, timezone
from typing import Any

from model_store.errors import InputError, NotFoundError
from model_store.store.history import format_time
from model_store.store.state import Step, apply_entry

__all__ = ["AT_PATTERN", "LiveAt", "live_at", "parse_moment"]

# RFC 3339 section 5.6 date-time; "T" may be lower case or a space (section 5.6, NOTE), the offset is required.
AT_PATTERN = r"^\d{4}-\d{2}-\d{2}[Tt ]\d{2}:\d{2}:\d{2}(\.\d+)?([Zz]|[+-]\d{2}:\d{2})$"
_DATE_TIME = re.compile(
    r"(\d{4})-(\d{2})-(\d{2})[Tt ](\d{2}):(\d{2}):(\d{2})(\.\d+)?(?:([Zz])|([+-])(\d{2}):(\d{2}))"
)
_EXAMPLE = "e.g. 2026-11-30T14:00:00Z or 2026-11-30T15:00:00+01:00"


@dataclass(frozen=True)
class LiveAt:
    """The version live at ``at`` (UTC, RFC 3339), the entry that made it live, the one that ended it (or None)."""

    model: str
    at: str
    version: str
    digest: str
    made_live: dict[str, Any]
    ended: dict[str, Any] | None

    def to_dict(self) -> dict[str, Any]:
        return {
            "model": self.model, "at": self.at, "version": self.version, "bundle_sha256": self.digest,
            "made_live": self.made_live, "ended": self.ended,
        }


def parse_moment(text: str) -> datetime:
    """An aware datetime from an RFC 3339 date-time; ``InputError`` saying what is wrong otherwise."""
    match = _DATE_TIME.fullmatch(str(text).strip())
    if match is None:
        raise InputError(
            f"time {str(text)[:60]!r} is not an RFC 3339 date-time with an offset ({_EXAMPLE}); "
            "give the date, 'T', the time and 'Z' or an offset from UTC"
        )
    year, month, day, hour, minute, second, fraction, zulu, sign, offset_hours, offset_minutes = match.groups()
    if int(year) == 0:  # RFC 3339 allows year 0000, which Python's datetime cannot hold: before any entry anyway
        return datetime.min.replace(tzinfo=timezone.utc)
    try:
        offset = timedelta(0) if zulu else (1 if sign == "+" else -1) * timedelta(
            hours=int(offset_hours), minutes=int(offset_minutes)
        )
        moment = datetime(int(year), int(month), int(day), int(hour), int(minute), int(second),
                          tzinfo=timezone(offset))
        moment = moment.astimezone(timezone.utc) + timedelta(seconds=float(fraction or 0))
    except ValueError as exc:
        raise InputError(f"time {text!r} is not a valid date-time ({exc}); {_EXAMPLE}") from None
    except OverflowError:  # within an offset of datetime's first or last moment
        return (datetime.min if int(year) < 5000 else datetime.max).replace(tzinfo=timezone.utc)
    return moment


def live_at(model: str, entries: list[dict[str, Any]], moment: datetime) -> LiveAt:
    """The version of ``model`` live at ``moment`` according to ``entries`` (a verified trail, oldest first)."""
    stack: list[Step] = []
    made_live: dict[str, Any] | None = None
    index = 0
    for index, entry in enumerate(entries):  # noqa: B007 - index is read after the loop
        if _entry_time(entry) > moment:
            break
        made_live = _fold(stack, entry, made_live)
    else:
        index = len(entries)
    at = format_time(moment) if moment.microsecond == 0 else moment.astimezone(timezone.utc).isoformat().replace(
        "+00:00", "Z"
    )
    if not stack or made_live is None:
        first = next((entry for entry in entries if entry["action"] == "activate"), None)
        if first is None:
            raise NotFoundError(f"no version of {model} was ever activated, so none was live at {at}")
        raise NotFoundError(
            f"no version of {model} was live at {at}: the first activation is seq {first['seq']} "
            f"({first['version']}) at {first['time']}; ask about a later time"
        )
    live = stack[-1]
    ended = None
    for entry in entries[index:]:
        apply_entry(stack, entry)
        if not stack or stack[-1].version != live.version:
            ended = entry
            break
    return LiveAt(model, at, live.version, live.digest, made_live, ended)


def _fold(stack: list[Step], entry: dict[str, Any], made_live: dict[str, Any] | None) -> dict[str, Any] | None:
    before = stack[-1].version if stack else None
    apply_entry(stack, entry)
    after = stack[-1].version if stack else None
    return entry if after is not None and after != before else made_live


def _entry_time(entry: dict[str, Any]) -> datetime:
    return datetime.strptime(entry["time"], "%Y-%m-%dT%H:%M:%SZ").replace(tzinfo=timezone.utc)
