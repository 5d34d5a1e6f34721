"""The contract comparison: what a switch from the active version to a candidate changes for callers.

Callers see a version through its contract: the features a record must hold (names, units,
allowed ranges), the classes a label can take, whether probabilities come back, and the domain
model that may refuse a record as ``outside_domain``. The comparison lists each difference and
marks the ones that can break a caller:

    feature_added          breaking: callers do not send it, so their records are refused as missing
    feature_removed        breaking: callers still send it, so their records are refused as unknown
    unit_changed           breaking (one unit to another): callers keep sending the old unit and get
                           scores for wrong values
    unit_added             not breaking (no unit -> a unit: documentation added, the values are the same)
    unit_removed           not breaking (a unit -> no unit: documentation removed)
    range_narrowed         breaking when the new range would refuse values the active version accepts:
                           with recent inputs, when some of them (inside the active range) fall outside
                           the new one (``recent_refused``); without, when the new range excludes part
                           of the active version's training range [min, max] of that feature (the
                           values it was fitted on, as far as its own allowed range accepts them)
    range_widened          not breaking
    class_removed          breaking: callers that act on that label never see it again
    class_added            breaking: a client generated from the active version's document
                           (label enums) cannot read the new label
    probability_removed    breaking: ``probability`` turns to null
    probability_added      not breaking
    calibration_changed    not breaking (another calibration method; probabilities move)
    domain_added, domain_removed, domain_changed
                           see ``model_store.store.contract_domain``: breaking when the candidate
                           would refuse as outside_domain records the active version scores, and
                           when ``domain`` turns to null

Each change that needs data says what it was judged on (``basis``): ``recent inputs: N`` or the
active version's training range for ranges, ``refuse rates`` for a domain model without recent
inputs. Over HTTP the recent inputs are the answering worker's sample, empty after a restart, so
the training-range rule is what keeps a routine retrain (every range a little narrower, inside the
old training range) from counting as breaking there and in the CLI without ``--inputs``.

Rollback never consults this: going back to the version active before is always allowed.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

from model_store.domain_policy import DEFAULT_OUTSIDE_ACTION
from model_store.manifest import FeatureSpec, Manifest
from model_store.refusal import Converter, from_json
from model_store.store.contract_change import TRAINING_RANGE_BASIS, ContractChange, recent_basis, refused_share
from model_store.store.contract_domain import compare_domain

if TYPE_CHECKING:
    from model_store.bundle import Bundle

__all__ = ["ContractChange", "ContractComparison", "compare_contracts", "range_basis"]


def range_basis(recent_inputs: int) -> str:
    """What narrowed ranges are judged on, given how many recent inputs there are."""
    return recent_basis(recent_inputs) if recent_inputs else TRAINING_RANGE_BASIS


@dataclass(frozen=True)
class ContractComparison:
    changes: tuple[ContractChange, ...]
    recent_inputs: int  # how many recent inputs the range checks used (0: none were given)

    @property
    def breaking(self) -> tuple[ContractChange, ...]:
        return tuple(change for change in self.changes if change.breaking)

    @property
    def range_basis(self) -> str:
        return range_basis(self.recent_inputs)

    def to_dict(self) -> dict[str, Any]:
        return {
            "breaking": [change.detail for change in self.breaking],
            "changes": [change.to_dict() for change in self.changes],
            "recent_inputs": self.recent_inputs,
            "range_basis": self.range_basis,
        }

    def render_lines(self) -> list[str]:
        if not self.changes:
            return ["contract: unchanged (same features, units, ranges, classes, probabilities and domain model)"]
        count = len(self.breaking)
        lines = [f"contract: {len(self.changes)} change(s), {count} breaking"
                 + (" (activating needs --accept-breaking)" if count else ""),
                 f"  narrowed ranges judged on: {self.range_basis}"]
        lines.extend(f"  {'BREAKING ' if change.breaking else ''}{change.detail}" for change in self.changes)
        return lines


def compare_contracts(
    active: Manifest,
    candidate: Manifest,
    recent: Sequence[Mapping[str, Any]] = (),
    convert: Converter = from_json,
    *,
    bundles: "tuple[Bundle, Bundle] | None" = None,
    outside_action: str = DEFAULT_OUTSIDE_ACTION,
) -> ContractComparison:
    """Compare the contracts of ``active`` and ``candidate``; ``recent`` are recent input records
    (JSON values, or CSV text with ``convert=from_text``) for judging narrowed ranges and, with
    ``bundles`` (the active and the candidate bundle, to score them), the domain model.
    ``outside_action`` is the model's choice for records outside the domain (``refuse`` or ``flag``)."""
    changes = [
        *_compare_features(active, candidate, recent, convert),
        *_compare_classes(active, candidate),
        *_compare_probabilities(active, candidate),
        *compare_domain(active, candidate, recent, convert, bundles=bundles, outside_action=outside_action),
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
        change = _compare_unit(old, new)
        if change is not None:
            changes.append(change)
        change = _compare_range(old, new, recent, convert)
        if change is not None:
            changes.append(change)
    return changes


def _compare_unit(old: FeatureSpec, new: FeatureSpec) -> ContractChange | None:
    old_unit, new_unit = old.unit or None, new.unit or None  # "" (from a feature-info file) is no unit
    if old_unit == new_unit:
        return None
    name = old.name
    if old_unit is None:
        return ContractChange("unit_added", name, None, new_unit, False,
                              f"feature {name}: unit {new_unit} documented (the active version names none)")
    if new_unit is None:
        return ContractChange("unit_removed", name, old_unit, None, False,
                              f"feature {name}: unit {old_unit} no longer documented (the candidate names none)")
    return ContractChange("unit_changed", name, old_unit, new_unit, True,
                          f"feature {name}: unit {old_unit} -> {new_unit}; callers sending the old unit would get "
                          "scores for the wrong values")


def _compare_range(old: FeatureSpec, new: FeatureSpec, recent, convert) -> ContractChange | None:
    (low, high), (new_low, new_high) = old.allowed, new.allowed
    if (low, high) == (new_low, new_high):
        return None
    shown = f"feature {old.name}: allowed range [{low:g}, {high:g}] -> [{new_low:g}, {new_high:g}]"
    if new_low <= low and new_high >= high:
        return ContractChange("range_widened", old.name, [low, high], [new_low, new_high], False, f"{shown} (widened)")
    seen = [value for value in _numbers(recent, old.name, convert) if low <= value <= high]
    if seen:
        outside = sum(1 for value in seen if not new_low <= value <= new_high)
        refused = refused_share(outside, len(seen))
        verdict = f"narrowed; {outside} of {len(seen)} recent inputs ({100.0 * refused['share']:.1f}%) would be refused"
        return ContractChange("range_narrowed", old.name, [low, high], [new_low, new_high], outside > 0,
                              f"{shown} ({verdict})", refused, recent_basis(len(recent)))
    # No recent value to count: the values the active version was fitted on and accepts are the ones
    # its callers are known to send.
    fitted_low, fitted_high = max(old.training.min, low), min(old.training.max, high)
    training = f"[{old.training.min:g}, {old.training.max:g}]"
    none = "no recent inputs" if not recent else "no recent input inside the active range"
    if fitted_low > fitted_high or (new_low <= fitted_low and new_high >= fitted_high):
        breaking = False
        verdict = f"narrowed; {none}, and it still holds the active version's training range {training}"
    else:
        breaking = True
        verdict = (f"narrowed; {none}, and it excludes part of the active version's training range "
                   f"{training}: values that version was fitted on and accepts would be refused")
    return ContractChange("range_narrowed", old.name, [low, high], [new_low, new_high], breaking,
                          f"{shown} ({verdict})", None, TRAINING_RANGE_BASIS)


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
