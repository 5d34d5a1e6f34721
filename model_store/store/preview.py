"""Swap preview: what would change for callers if a candidate version replaced the active one.

Both versions score the same rows: the golden vectors of both versions and,
optionally, recent inputs. Each version first validates every row with the
refusal policy (``model_store.refusal.check_records``), exactly as the
service would, so a row may be refused by one version and scored by the
other. The report counts label flips (with an active-by-candidate class
table), the largest change in decision value and probability, rows only one
of the two would refuse, features whose allowed range changed, domain verdicts
that would change (an active-by-candidate verdict table; "none" for a version
without a domain model; rows refused as ``outside_domain`` count there, not among
the range refusals), the contract comparison (``model_store.store.contract``:
which changes would break callers, and so make ``activate`` refuse without
accept-breaking), and the distribution of per-row changes (a histogram by row
source). Nothing in the store changes.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np

from model_store.bundle import Bundle
from model_store.errors import NotFoundError
from model_store.refusal import CheckedBatch, Converter, check_records, from_json
from model_store.store.contract import ContractComparison, compare_contracts
from model_store.store.preview_text import render

if TYPE_CHECKING:
    from model_store.store.store import Store

__all__ = ["CHANGE_BINS", "MAX_EXAMPLES", "PreviewReport", "preview"]

MAX_EXAMPLES = 20  # refused rows listed per direction; the counts are always complete
CHANGE_BINS = 20  # bins of the change distribution (probability: 0.05 wide)


@dataclass
class PreviewReport:
    """The comparison; ``to_dict()`` is JSON-safe, ``render_text()`` is what the CLI prints."""

    model: str
    candidate: dict[str, str]
    active: dict[str, str]
    sources: dict[str, int]
    scored_by_both: int
    flips: int
    flips_by_source: dict[str, int]
    flip_table: dict[str, Any]
    largest_decision_change: dict[str, Any] | None
    largest_probability_change: dict[str, Any] | None
    comparable_note: str | None
    refused_by_candidate_only: int
    refused_by_active_only: int
    refused_by_both: int
    examples: dict[str, list[dict[str, Any]]] = field(default_factory=dict)
    range_changes: list[dict[str, Any]] = field(default_factory=list)
    contract: ContractComparison = field(default_factory=lambda: ContractComparison((), 0))
    change_distribution: dict[str, Any] | None = None
    domain_changes: dict[str, Any] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        return {
            "model": self.model,
            "candidate": self.candidate,
            "active": self.active,
            "rows": {"by_source": self.sources, "total": sum(self.sources.values()), "scored_by_both": self.scored_by_both},
            "label_flips": {"count": self.flips, "by_source": self.flips_by_source, "table": self.flip_table},
            "largest_decision_change": self.largest_decision_change,
            "largest_probability_change": self.largest_probability_change,
            "comparable_note": self.comparable_note,
            "refusals": {
                "candidate_only": self.refused_by_candidate_only,
                "active_only": self.refused_by_active_only,
                "both": self.refused_by_both,
                "examples": self.examples,
            },
            "allowed_range_changes": self.range_changes,
            "contract": self.contract.to_dict(),
            "change_distribution": self.change_distribution,
            "domain_verdict_changes": self.domain_changes,
        }

    def render_text(self) -> str:
        return render(self)


def preview(
    store: "Store",
    name: str,
    candidate_version: str,
    records: Sequence[Mapping[str, object]] | None = None,
    *,
    record_rows: Sequence[int] | None = None,
    convert: Converter = from_json,
    allow_extra: bool = False,
) -> PreviewReport:
    """Compare ``candidate_version`` with the active version of ``name`` on golden vectors and ``records``.

    ``records`` are JSON-like rows by default; a CSV caller passes text rows with
    ``convert=from_text, allow_extra=True`` (extra columns such as an id are ignored),
    exactly as ``rbfgate score`` reads them. ``record_rows`` numbers the records in
    messages (default 1, 2, 3, ...), e.g. CSV data-row numbers.
    """
    active_record = store.active(name)
    if active_record is None:
        raise NotFoundError(
            f"{name} has no active version; a preview compares a candidate with the active version, "
            f"activate one first with 'rbfgate activate {name} VERSION'"
        )
    candidate = store.load_verified(name, candidate_version)
    active = store.load_verified(name, active_record.version)
    origins, rows = _rows(active, candidate, records or [], record_rows)
    checked_active = check_records(active.manifest.features, rows, convert, allow_extra=allow_extra)
    checked_candidate = check_records(candidate.manifest.features, rows, convert, allow_extra=allow_extra)
    both = sorted(set(checked_active.accepted.tolist()) & set(checked_candidate.accepted.tolist()))
    scores_active = _scores_for(active, checked_active, both)
    scores_candidate = _scores_for(candidate, checked_candidate, both)
    labels_active, labels_candidate = scores_active.labels.tolist(), scores_candidate.labels.tolist()
    flipped = [index for index, a, c in zip(both, labels_active, labels_candidate) if a != c]
    sources: dict[str, int] = {}
    for source, _ in origins:
        sources[source] = sources.get(source, 0) + 1
    same_classes = active.classes == candidate.classes
    report = PreviewReport(
        model=name,
        candidate={"version": candidate.version, "digest": candidate.digest},
        active={"version": active.version, "digest": active.digest},
        sources=sources,
        scored_by_both=len(both),
        flips=len(flipped),
        flips_by_source={source: sum(origins[index][0] == source for index in flipped) for source in sources},
        flip_table=_flip_table(active.classes, candidate.classes, labels_active, labels_candidate),
        largest_decision_change=None,
        largest_probability_change=None,
        comparable_note=None if same_classes else (
            f"the class lists differ (active {active.classes}, candidate {candidate.classes}); "
            "decision values and probabilities are not compared"
        ),
        refused_by_candidate_only=0,
        refused_by_active_only=0,
        refused_by_both=0,
        range_changes=_range_changes(active, candidate),
        contract=compare_contracts(active.manifest, candidate.manifest, records or [], convert,
                                   bundles=(active, candidate), outside_action=store.outside_action(name)),
    )
    if same_classes and both:
        report.largest_decision_change = _largest(
            scores_active.decision, scores_candidate.decision, both, origins, active.classes
        )
        if scores_active.probabilities is not None and scores_candidate.probabilities is not None:
            report.largest_probability_change = _largest(
                scores_active.probabilities, scores_candidate.probabilities, both, origins, active.classes
            )
        report.change_distribution = _change_distribution(scores_active, scores_candidate, both, origins)
    _refusals(report, checked_active, checked_candidate, origins)
    report.domain_changes = _domain_changes(scores_active, scores_candidate)
    return report


_VERDICT_ROWS = ("typical", "unusual", "outside", "none")


def _domain_changes(active, candidate) -> dict[str, Any]:
    """Counts of the rows scored by both by (active verdict, candidate verdict); "none" without a domain model."""
    def verdicts(scores) -> list[str]:
        return ["none"] * len(scores.labels) if scores.domain_verdict is None else scores.domain_verdict.tolist()

    before, after = verdicts(active), verdicts(candidate)
    counts = [[0] * len(_VERDICT_ROWS) for _ in _VERDICT_ROWS]
    for a, c in zip(before, after):
        counts[_VERDICT_ROWS.index(a)][_VERDICT_ROWS.index(c)] += 1
    return {"changed": sum(a != c for a, c in zip(before, after)), "verdicts": list(_VERDICT_ROWS), "counts": counts}


def _rows(active: Bundle, candidate: Bundle, records, record_rows):
    origins: list[tuple[str, int]] = []
    rows: list[Mapping[str, object]] = []
    seen = set()
    for bundle in (active, candidate):
        if bundle.version in seen:
            continue
        seen.add(bundle.version)
        for index, values in enumerate(bundle.manifest.golden.inputs):
            origins.append((f"golden {bundle.version}", index))
            rows.append(dict(zip(bundle.feature_names, values)))
    numbers = list(record_rows) if record_rows is not None else list(range(1, len(records) + 1))
    for number, record in zip(numbers, records):
        origins.append(("inputs", number))
        rows.append(record)
    return origins, rows


def _scores_for(bundle: Bundle, checked: CheckedBatch, indices: list[int]):
    position = {int(index): row for row, index in enumerate(checked.accepted.tolist())}
    values = checked.values[[position[index] for index in indices]] if indices else checked.values[:0]
    return bundle.score(values.reshape(len(indices), len(bundle.feature_names)))


def _flip_table(active_classes, candidate_classes, labels_active, labels_candidate) -> dict[str, Any]:
    """Counts of rows by (active label, candidate label); rows are active classes, columns candidate ones."""
    counts = [[0] * len(candidate_classes) for _ in active_classes]
    row_of = {label: index for index, label in enumerate(active_classes)}
    column_of = {label: index for index, label in enumerate(candidate_classes)}
    for a, c in zip(labels_active, labels_candidate):
        counts[row_of[a]][column_of[c]] += 1
    return {"active_classes": list(active_classes), "candidate_classes": list(candidate_classes), "counts": counts}


def _largest(before: np.ndarray, after: np.ndarray, both, origins, classes) -> dict[str, Any]:
    """The largest absolute change, where it happened, and its before/after values."""
    change = np.abs(np.asarray(after, dtype=np.float64) - np.asarray(before, dtype=np.float64))
    flat = int(np.argmax(change))
    row, column = np.unravel_index(flat, change.shape) if change.ndim == 2 else (flat, None)
    source, index = origins[both[int(row)]]
    where = (int(row),) if column is None else (int(row), int(column))
    return {
        "change": float(change[where]),
        "active": float(np.asarray(before)[where]),
        "candidate": float(np.asarray(after)[where]),
        "source": source,
        "row": index,
        "class": None if column is None else classes[int(column)],
    }


def _change_distribution(scores_active, scores_candidate, both, origins) -> dict[str, Any]:
    """Histogram, by row source, of each row's largest absolute change: in probability (any class)
    when both versions are calibrated, else in decision value. Bounded in size whatever the rows."""
    calibrated = scores_active.probabilities is not None and scores_candidate.probabilities is not None
    before, after = (
        (scores_active.probabilities, scores_candidate.probabilities) if calibrated
        else (scores_active.decision, scores_candidate.decision)
    )
    change = np.abs(np.asarray(after, dtype=np.float64) - np.asarray(before, dtype=np.float64))
    per_row = change.max(axis=1) if change.ndim == 2 else change
    top = 1.0 if calibrated else max(float(per_row.max()), 1e-12)
    edges = np.linspace(0.0, top, CHANGE_BINS + 1)
    bins = np.clip(np.searchsorted(edges, per_row, side="right") - 1, 0, CHANGE_BINS - 1)
    counts: dict[str, list[int]] = {}
    for row, index in zip(bins.tolist(), both):
        counts.setdefault(origins[index][0], [0] * CHANGE_BINS)[row] += 1
    return {"measure": "probability" if calibrated else "decision", "edges": edges.tolist(), "counts": counts,
            "rows": len(both)}


def _refusals(report: PreviewReport, checked_active: CheckedBatch, checked_candidate: CheckedBatch, origins) -> None:
    refused_active, refused_candidate = set(checked_active.problems), set(checked_candidate.problems)
    only_candidate = sorted(refused_candidate - refused_active)
    only_active = sorted(refused_active - refused_candidate)
    report.refused_by_candidate_only = len(only_candidate)
    report.refused_by_active_only = len(only_active)
    report.refused_by_both = len(refused_active & refused_candidate)

    def example(index: int, problems) -> dict[str, Any]:
        source, row = origins[index]
        return {"source": source, "row": row, "problems": [problem.to_dict() for problem in problems[index]]}

    report.examples = {
        "candidate_only": [example(index, checked_candidate.problems) for index in only_candidate[:MAX_EXAMPLES]],
        "active_only": [example(index, checked_active.problems) for index in only_active[:MAX_EXAMPLES]],
    }


def _range_changes(active: Bundle, candidate: Bundle) -> list[dict[str, Any]]:
    before = {feature.name: list(feature.allowed) for feature in active.manifest.features}
    after = {feature.name: list(feature.allowed) for feature in candidate.manifest.features}
    names = list(before) + [name for name in after if name not in before]
    return [
        {"feature": name, "active": before.get(name), "candidate": after.get(name)}
        for name in names
        if before.get(name) != after.get(name)
    ]
