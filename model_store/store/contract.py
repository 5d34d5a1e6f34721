"""The contract comparison: what a switch from the active version to a candidate changes for callers.

Callers see a version through its contract: the features a record must hold (names, units,
allowed ranges), the classes a label can take, and whether probabilities come back. The
comparison lists each difference and marks the ones that can break a caller:

    feature_added          breaking: callers do not send it, so their records are refused as missing
    feature_removed        breaking: callers still send it, so their records are refused as unknown
    unit_changed           breaking: callers keep sending the old unit and get scores for wrong values
    range_narrowed         breaking when recent inputs fall outside the new range, or when there
                           are no recent inputs to show that none would (``recent_refused``)
    range_widened          not breaking
    class_removed          breaking: callers that act on that label never see it again
    class_added            breaking: a client generated from the active version's document
                           (label enums) cannot read the new label
    probability_removed    breaking: ``probability`` turns to null
    probability_added      not breaking
    calibration_changed    not breaking (another calibration method; probabilities move)

Rollback never consults this: going back to the version active before is always allowed.
A further part of the contract (say domain thresholds in the manifest) is one more
``_compare_*`` function in ``compare_contracts``.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from model_store.manifest import FeatureSpec, Manifest
from model_store.refusal import Converter, from_json

__all__ = ["ContractChange", "ContractComparison", "compare_contracts"]


@dataclass(frozen=True)
class ContractChange:
    """One difference. ``subject`` is the feature or class (None for probability and calibration);
    ``recent_refused`` is ``{"count", "of", "share"}`` for a narrowed range checked on recent inputs."""

    kind: str
    subject: str | int | None
    active: Any
    candidate: Any
    breaking: bool
    detail: str
    recent_refused: dict[str, Any] | None = None

    def to_dict(self) -> dict[str, Any]:
        return {
            "kind": self.kind, "subject": self.subject, "active": self.active, "candidate": self.candidate,
            "breaking": self.breaking, "detail": self.detail, "recent_refused": self.recent_refused,
        }


@dataclass(frozen=True)
class ContractComparison:
    changes: tuple[ContractChange, ...]
    recent_inputs: int  # how many recent inputs the range checks used (0: none were given)

    @property
    def breaking(self) -> tuple[ContractChange, ...]:
        return tuple(change for change in self.changes if change.breaking)

    def to_dict(self) -> dict[str, Any]:
        return {
            "breaking": [change.detail for change in self.breaking],
            "changes": [change.to_dict() for change in self.changes],
            "recent_inputs": self.recent_inputs,
        }

    def render_lines(self) -> list[str]:
        if not self.changes:
            return ["contract: unchanged (same features, units, ranges, classes and probabilities)"]
        count = len(self.breaking)
        lines = [f"contract: {len(self.changes)} change(s), {count} breaking"
                 + (" (activating needs --accept-breaking)" if count else "")]
        lines.extend(f"  {'BREAKING ' if change.breaking else ''}{change.detail}" for change in self.changes)
        return lines


def compare_contracts(
    active: Manifest,
    candidate: Manifest,
    recent: Sequence[Mapping[str, Any]] = (),
    convert: Converter = from_json,
) -> ContractComparison:
    """Compare the contracts of ``active`` and ``candidate``; ``recent`` are recent input records
    (JSON values, or CSV text with ``convert=from_text``) for judging narrowed ranges."""
    changes = [
        *_compare_features(active, candidate, recent, convert),
        *_compare_classes(active, candidate),
        *_compare_probabilities(active, candidate),
    ]
    return ContractComparison(tuple(changes), len(recent))


def _compare_features(active: Manifest, candidate: Manifest, recent, convert) -> list[ContractChange]:
    before = {feature.name: feature for feature in active.features}
    after = {feature.name: feature for feature in candidate.features}
    changes = []
    for name in after:
        if name not in before:
            changes.append(ContractChange(
                "feature_added", name, None, list(after[name].allowed), True,
                f"feature {name} added: records without it would be refused as missing",
            ))
    for name, old in before.items():
        new = after.get(name)
        if new is None:
            changes.append(ContractChange(
                "feature_removed", name, list(old.allowed), None, True,
                f"feature {name} removed: records that still send it would be refused as unknown_feature",
            ))
            continue
        old_unit, new_unit = old.unit or None, new.unit or None  # "" (from a feature-info file) is no unit
        if old_unit != new_unit:
            changes.append(ContractChange(
                "unit_changed", name, old_unit, new_unit, True,
                f"feature {name}: unit {old_unit or '(none)'} -> {new_unit or '(none)'}; callers sending the old "
                "unit would get scores for the wrong values",
            ))
        change = _compare_range(old, new, recent, convert)
        if change is not None:
            changes.append(change)
    return changes


def _compare_range(old: FeatureSpec, new: FeatureSpec, recent, convert) -> ContractChange | None:
    (low, high), (new_low, new_high) = old.allowed, new.allowed
    if (low, high) == (new_low, new_high):
        return None
    shown = f"feature {old.name}: allowed range [{low:g}, {high:g}] -> [{new_low:g}, {new_high:g}]"
    if new_low <= low and new_high >= high:
        return ContractChange("range_widened", old.name, [low, high], [new_low, new_high], False, f"{shown} (widened)")
    seen = [value for value in _numbers(recent, old.name, convert) if low <= value <= high]
    outside = sum(1 for value in seen if not new_low <= value <= new_high)
    if not seen:
        refused = None
        verdict = "narrowed; no recent inputs to show that callers stay inside it"
    else:
        refused = {"count": outside, "of": len(seen), "share": outside / len(seen)}
        verdict = f"narrowed; {outside} of {len(seen)} recent inputs ({100.0 * outside / len(seen):.1f}%) would be refused"
    return ContractChange(
        "range_narrowed", old.name, [low, high], [new_low, new_high], not seen or outside > 0,
        f"{shown} ({verdict})", refused,
    )


def _numbers(records, name: str, convert) -> list[float]:
    values = []
    for record in records:
        if name in record:
            number = convert(record[name])
            if not isinstance(number, str):  # a refusal reason, not a number
                values.append(number)
    return values


def _compare_classes(active: Manifest, candidate: Manifest) -> list[ContractChange]:
    before, after = list(active.classifier.classes), list(candidate.classifier.classes)
    changes = [
        ContractChange("class_removed", label, label, None, True,
                       f"class {label!r} removed: callers acting on that label would never see it again")
        for label in before if label not in after
    ]
    changes.extend(
        ContractChange("class_added", label, None, label, True,
                       f"class {label!r} added: clients generated from the active version's document reject "
                       "an unknown label")
        for label in after if label not in before
    )
    return changes


def _compare_probabilities(active: Manifest, candidate: Manifest) -> list[ContractChange]:
    old, new = active.calibration.method, candidate.calibration.method
    if old == new:
        return []
    if new == "none":
        return [ContractChange("probability_removed", None, old, new, True,
                               f"probability removed: the candidate is not calibrated (active: {old}), so "
                               "\"probability\" would be null")]
    if old == "none":
        return [ContractChange("probability_added", None, old, new, False,
                               f"probability added: the candidate is calibrated ({new})")]
    return [ContractChange("calibration_changed", None, old, new, False,
                           f"calibration {old} -> {new}: probabilities are computed another way")]
