"""The refusal policy: which records are scored and why the others are not.

The scorer never refuses; callers (the CLI, the swap preview, the HTTP
service) run records through ``check_records`` first. A record is refused
when any feature is missing, null, not a number (a boolean, a string, a
nested value), NaN or infinite, outside its allowed range, or when it holds
a feature the bundle does not know (``malformed_row`` is the CSV reader's
own reason for a row with more fields than its header). Every problem names the feature, the
value, a machine-readable reason and the allowed range. ``outside_domain`` is the one
record-level reason (no feature): it is decided after scoring, from the domain verdict
(``model_store.domain_policy``).

A JSON record may also carry its caller's id as ``"id"`` (``model_store.record_ids``): it is not
a feature and is never scored; ``check_records(..., ids=True)`` keeps it for the results and refuses
the record (``invalid_id``) when it breaks the id rule. In an older bundle that has a feature of
that name it stays a feature.

Values come in two flavours: JSON values (``from_json``), where only real
numbers count, and CSV text (``from_text``), where the text must parse as a
finite number.
"""

from __future__ import annotations

import math
import re
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from itertools import repeat
from operator import contains, itemgetter
from typing import Any

import numpy as np

from model_store.errors import InputError
from model_store.manifest import FeatureSpec
from model_store.record_columns import allowed_rows, column_values, plain_record, plain_rows
from model_store.record_ids import ID_RULE, RECORD_ID, id_problem, plainly_valid_id, printable_id

__all__ = [
    "REASONS",
    "CheckedBatch",
    "Converter",
    "Problem",
    "check_columns",
    "check_records",
    "from_json",
    "from_text",
]

REASONS = (
    "missing", "null", "not_a_number", "not_finite", "out_of_range", "unknown_feature", "malformed_row", "invalid_id",
    "outside_domain",
)

# A converter returns the float, or the reason the value cannot be scored.
_DECIMAL_TEXT = re.compile(r"[+-]?([0-9]+\.?[0-9]*|\.[0-9]+)([eE][+-]?[0-9]+)?")
# From this many records on, the column checks are faster than the per-value ones (measured here:
# about 8 numpy calls per feature cost more than the Python loop over a few records).
_COLUMN_MIN_RECORDS = 8
_NON_FINITE_TEXT = re.compile(r"[+-]?(nan|inf|infinity)", re.IGNORECASE)
Converter = Callable[[Any], "float | str"]


@dataclass(frozen=True)
class Problem:
    feature: str | None  # None for a record-level problem (outside_domain)
    value: Any
    reason: str
    allowed: tuple[float, float] | None
    message: str | None = None  # invalid_id only: which rule the id breaks, with its limit

    def to_dict(self) -> dict[str, Any]:
        problem = {
            "feature": self.feature,
            "value": _json_safe(self.value),
            "reason": self.reason,
            "allowed": list(self.allowed) if self.allowed is not None else None,
        }
        if self.message is not None:
            problem["message"] = self.message
        return problem

    def describe(self) -> str:
        """One human-readable phrase, as used in the CLI's ``problems`` column."""
        if self.reason == "out_of_range":
            return f"{self.feature}={self.value} outside [{self.allowed[0]:g}, {self.allowed[1]:g}]"
        if self.reason == "outside_domain":
            return f"outside the model's domain (domain score {self.value:.4g})"
        if self.reason == "malformed_row":
            return f"the row has {self.value} fields, more than the header"
        if self.reason == "unknown_feature":
            return f"{self.feature}: not a feature of this model"
        if self.reason == "invalid_id":
            return f"{self.feature}: {self.message or ID_RULE}"
        shown = "" if self.reason in ("missing", "null") else f"={self.value!r}"
        return f"{self.feature}{shown}: {self.reason.replace('_', ' ')}"


@dataclass
class CheckedBatch:
    """Records split into scoreable rows and refusals.

    values:    (n_accepted, f) float64 raw units in manifest feature order, every value finite
               and within its feature's allowed range (what ``Scorer.score`` takes unchecked)
    accepted:  (n_accepted,) indices of those records in the input
    problems:  input index -> its problems, for every refused record
    ids:       one per input record, its valid ``RECORD_ID`` or None (absent or refused);
               None as a whole unless ``check_records`` was asked for ids
    """

    values: np.ndarray
    accepted: np.ndarray
    problems: dict[int, list[Problem]] = field(default_factory=dict)
    ids: list[Any] | None = None


def from_json(value: Any) -> float | str:
    """A JSON value: an int or float (not a boolean) that is finite."""
    if value is None:
        return "null"
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return "not_a_number"
    try:
        number = float(value)
    except OverflowError:  # an integer too large for a float
        return "not_finite"
    return number if math.isfinite(number) else "not_finite"


def from_text(value: Any) -> float | str:
    """A CSV field: empty is missing; otherwise a plain decimal number that is finite.

    The grammar is ``[+-]digits[.digits][(e|E)[+-]digits]`` in ASCII: Python's
    ``float`` alone would also take ``1_000`` and non-ASCII digits, which a
    spreadsheet would not show as numbers. ``nan`` and ``inf`` spellings are
    reported as not finite rather than as text.
    """
    if not isinstance(value, str):
        return from_json(value)  # already a number (golden vectors mixed with CSV rows, say)
    text = value.strip()
    if text == "":
        return "missing"
    if _NON_FINITE_TEXT.fullmatch(text):
        return "not_finite"
    if not _DECIMAL_TEXT.fullmatch(text):
        return "not_a_number"
    number = float(text)
    return number if math.isfinite(number) else "not_finite"


def check_records(
    features: Sequence[FeatureSpec],
    records: Sequence[Mapping[str, Any]],
    convert: Converter = from_json,
    *,
    allow_extra: bool = False,
    ids: bool = False,
) -> CheckedBatch:
    """Validate ``records`` against the bundle's features; ``allow_extra`` ignores unknown keys.

    ``ids=True`` reads each record's ``RECORD_ID`` (not a feature, unless the bundle has a
    feature of that name) into ``CheckedBatch.ids`` and refuses records whose id is invalid.
    """
    rule = _RecordRule.of(features, convert, ids=ids, allow_extra=allow_extra)
    names, with_ids = rule.names, rule.with_ids
    if convert is from_json and len(records) >= _COLUMN_MIN_RECORDS:
        return _check_json_records(rule, records)
    if convert is from_json and len(records) == 1:
        # One record (most requests): plain ones in a few C-level calls, the rest by the rules below.
        row = plain_record(rule.getter, rule.lows, rule.highs, records[0], None if allow_extra else len(names),
                           RECORD_ID if with_ids else None)
        if row is not None:
            return CheckedBatch(np.array([row]), np.zeros(1, dtype=np.int64), {}, [None] if with_ids else None)
    rows: list[list[float]] = []
    accepted: list[int] = []
    problems: dict[int, list[Problem]] = {}
    record_ids: list[Any] | None = [] if with_ids else None
    for index, record in enumerate(records):
        row, found, record_id = rule.check(record)
        if record_ids is not None:
            record_ids.append(record_id)
        if found:
            problems[index] = found
        else:
            rows.append(row)
            accepted.append(index)
    values = np.asarray(rows, dtype=np.float64).reshape(len(rows), len(names))
    return CheckedBatch(values, np.asarray(accepted, dtype=np.int64), problems, record_ids)


@dataclass(frozen=True)
class _RecordRule:
    """The per-value rules for one record: its row, its problems in their documented order, its id."""

    names: list[str]
    bounds: list[tuple[float, float]]
    known: set[str]
    convert: Converter
    with_ids: bool
    allow_extra: bool
    getter: Callable[[Mapping[str, Any]], Any]  # itemgetter(*names)
    lows: tuple[float, ...]
    highs: tuple[float, ...]

    @classmethod
    def of(cls, features: Sequence[FeatureSpec], convert: Converter, *, ids: bool, allow_extra: bool) -> _RecordRule:
        """The rules for ``features``; with ``ids``, ``RECORD_ID`` is the record's id unless a feature has that name.

        Remembered per (features, convert, ids, allow_extra): building them took 3.5 us of a
        one-record check's 6.7 (in process). The key is the features' identities; the cache holds
        the features themselves, so no identity is reused while it is kept, and a FeatureSpec is
        frozen, so the same objects always give the same rules.
        """
        key = (tuple(map(id, features)), convert, ids, allow_extra)
        kept = _RULES.get(key)
        if kept is None:
            if len(_RULES) >= _RULES_KEPT:
                _RULES.clear()  # more bundles than that in one process: rebuild rather than grow
            kept = _RULES[key] = (tuple(features), cls._build(features, convert, ids=ids, allow_extra=allow_extra))
        return kept[1]

    @classmethod
    def _build(cls, features: Sequence[FeatureSpec], convert: Converter, *, ids: bool, allow_extra: bool) -> _RecordRule:
        names = [feature.name for feature in features]
        with_ids = ids and RECORD_ID not in names
        known = set(names) | {RECORD_ID} if with_ids else set(names)
        bounds = [feature.allowed for feature in features]
        return cls(names, bounds, known, convert, with_ids, allow_extra, _getter(names),
                   tuple(low for low, _ in bounds), tuple(high for _, high in bounds))

    def check(self, record: Mapping[str, Any]) -> tuple[list[float], list[Problem], Any]:
        row, found = _check_one(record, self.names, self.bounds, self.convert)
        record_id = None
        if self.with_ids:
            record_id = record.get(RECORD_ID)
            if record_id is not None or RECORD_ID in record:
                broken = id_problem(record_id)
                if broken is not None:
                    found.insert(0, Problem(RECORD_ID, printable_id(record_id), "invalid_id", None, broken))
                    record_id = None
                elif isinstance(record_id, float):
                    record_id = int(record_id)  # 7.0 is the integer 7 in JSON's data model; echo it as one
        if not self.allow_extra:
            found.extend(
                Problem(str(key), value, "unknown_feature", None) for key, value in record.items() if key not in self.known
            )
        return row, found, record_id

    def limits(self) -> tuple[np.ndarray, np.ndarray]:
        """(low, high), each (f,) float64: the allowed range of each feature."""
        return (np.array([low for low, _ in self.bounds], dtype=np.float64),
                np.array([high for _, high in self.bounds], dtype=np.float64))


def _check_json_records(rule: _RecordRule, records: Sequence[Mapping[str, Any]]) -> CheckedBatch:
    """``check_records`` for JSON values: plain records a column at a time (``model_store.record_columns``),
    every other record, and every record whose id is not plainly valid, through ``_RecordRule.check``."""
    n_records = len(records)
    with_id = np.zeros(n_records, dtype=bool)
    if rule.with_ids:
        with_id = np.fromiter(map(contains, records, repeat(RECORD_ID)), dtype=bool, count=n_records)  # C-level loop
    low, high = rule.limits()
    values, plain = plain_rows(rule.names, low, high, records, None if rule.allow_extra else with_id.astype(np.int64))
    record_ids: list[Any] | None = None
    if rule.with_ids:
        record_ids = [None] * n_records
        for index in np.flatnonzero(with_id & plain).tolist():
            _take_id(records[index][RECORD_ID], index, record_ids, plain)
    return _settle(rule, values, plain, record_ids, records.__getitem__)


def check_columns(
    features: Sequence[FeatureSpec], columns: Mapping[str, Sequence[Any]], ids: Sequence[Any] | None, n_rows: int
) -> CheckedBatch:
    """``check_records(features, records, from_json, ids=True)`` for the records that ``columns``
    (name -> n_rows JSON values) and ``ids`` (n_rows ids or None, or None as a whole) spell: row i
    is ``{name: columns[name][i], ...}`` plus ``RECORD_ID: ids[i]`` when that id is not None.

    ``ids`` must be None when a feature is named ``RECORD_ID`` (a bundle from before record ids):
    ``InputError`` otherwise.
    Plain rows are decided a column at a time; every other row is built as its record and goes
    through ``_RecordRule.check``, so both forms give the same values, problems and ids.
    """
    rule = _RecordRule.of(features, from_json, ids=True, allow_extra=False)
    names, with_ids = rule.names, rule.with_ids
    if ids is not None and not with_ids:
        raise InputError(f"this bundle has a feature named {RECORD_ID!r} (it predates record ids), so its rows take "
                         f"no ids; pass ids=None and the feature as the column {RECORD_ID!r}")
    low, high = rule.limits()
    values = np.full((n_rows, len(names)), np.nan)
    plain = np.ones(n_rows, dtype=bool)
    if not set(columns) <= set(names):
        plain[:] = False  # a column that is no feature refuses every row (unknown_feature)
    for position, name in enumerate(names):
        if name not in columns:
            continue  # its NaN refuses every row (missing), below
        values[:, position], _ = column_values(columns[name])  # NaN where a cell is no number
    plain &= allowed_rows(values, low, high)
    record_ids: list[Any] | None = None
    if with_ids:
        record_ids = [None] * n_rows
        if ids is not None:
            for index in np.flatnonzero(plain).tolist():
                if ids[index] is not None:
                    _take_id(ids[index], index, record_ids, plain)

    def record(index: int) -> dict[str, Any]:
        row = {name: cells[index] for name, cells in columns.items()}
        if ids is not None and ids[index] is not None:
            row[RECORD_ID] = ids[index]
        return row

    return _settle(rule, values, plain, record_ids, record)


def _take_id(record_id: Any, index: int, record_ids: list[Any], plain: np.ndarray) -> None:
    """Keep a plain row's id when it is plainly valid; otherwise the row goes to the per-value rules."""
    if plainly_valid_id(record_id):
        record_ids[index] = record_id
    else:
        plain[index] = False


def _settle(
    rule: _RecordRule, values: np.ndarray, plain: np.ndarray, record_ids: list[Any] | None,
    record: Callable[[int], Mapping[str, Any]],
) -> CheckedBatch:
    """Run every row that is not plain through the per-value rules (``record(i)`` is row i as a
    record); fill ``values`` of the ones they accept and collect the others' problems."""
    problems: dict[int, list[Problem]] = {}
    for index in np.flatnonzero(~plain).tolist():
        row, found, record_id = rule.check(record(index))
        if record_ids is not None:
            record_ids[index] = record_id
        if found:
            problems[index] = found
        else:
            values[index] = row
            plain[index] = True
    return CheckedBatch(values[plain], np.flatnonzero(plain), problems, record_ids)


_RULES: dict[tuple, tuple[tuple[FeatureSpec, ...], _RecordRule]] = {}
_RULES_KEPT = 256


def _getter(names: list[str]) -> Callable[[Mapping[str, Any]], Any]:
    """``itemgetter(*names)``: a record's values of ``names``, a tuple (one name: the value itself)."""
    return itemgetter(*names) if names else (lambda record: ())


def _check_one(record, names, bounds, convert) -> tuple[list[float], list[Problem]]:
    row: list[float] = []
    found: list[Problem] = []
    for name, (low, high) in zip(names, bounds):
        if name not in record:
            found.append(Problem(name, None, "missing", (low, high)))
            continue
        raw = record[name]
        number = convert(raw)
        if isinstance(number, str):
            found.append(Problem(name, raw, number, (low, high)))
        elif not low <= number <= high:
            found.append(Problem(name, number, "out_of_range", (low, high)))
        else:
            row.append(number)
    return row, found


def _json_safe(value: Any) -> Any:
    """Echo a refused value back without breaking JSON (no NaN, no nesting, bounded text)."""
    if isinstance(value, float) and not math.isfinite(value):
        return str(value)
    if isinstance(value, (dict, list)):
        return "(nested value)"
    if isinstance(value, str) and len(value) > 64:
        return value[:64] + "..."
    if isinstance(value, int) and not isinstance(value, bool) and abs(value) > 2**63:
        return "(integer too large)"
    return value
