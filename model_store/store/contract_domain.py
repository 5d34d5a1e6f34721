"""The domain part of the contract comparison: what a switch changes in the applicability domain.

Each version of format 2 carries a domain model (``model_store.domain``): a one-class SVM and two
thresholds on its score, chosen at export so that the whole refusal policy refuses about the
version's refuse rate (``domain.calibration.refuse_rate``, the export's ``--refuse-rate``) of
held-out rows. A record the range rules accept but whose score falls below ``outside_below`` is
refused as ``outside_domain`` unless the operators chose to only flag such records
(``model_store.domain_policy``); every answer carries the ``domain`` verdict.

    domain_added     the candidate has a domain model, the active version none
    domain_removed   breaking: ``domain`` turns to null in every answer
    domain_changed   thresholds, refuse rate or the one-class model itself differ

``domain_added`` and ``domain_changed`` are judged like narrowed ranges: they are breaking when the
candidate would refuse, as ``outside_domain``, records the active version scores.

- With recent inputs (and both bundles, to score them): breaking when at least one recent input
  that the active version scores (accepted by its ranges, and not refused as outside its own
  domain) passes the candidate's ranges but falls outside the candidate's domain;
  ``recent_refused`` has the count, of how many the active version scores, and the share.
- Without them: a domain model can only be judged on what each version was exported with.
  ``domain_added`` is breaking (the active version refuses nothing as outside_domain);
  ``domain_changed`` is breaking when the candidate's refuse rate is higher than the active
  version's, so it refuses a larger share of records like the held-out ones. With equal rates the
  two models still refuse different records; only recent inputs can count those.
- When the model only flags records outside its domain, nothing is refused: not breaking.

The thresholds of two one-class models are scores on different scales (each model's decision),
so their numbers are listed, not compared.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import TYPE_CHECKING, Any

from model_store.domain import OUTSIDE
from model_store.domain_policy import DEFAULT_OUTSIDE_ACTION
from model_store.manifest import DomainSpec, Manifest
from model_store.refusal import Converter, check_records
from model_store.store.contract_change import ContractChange, recent_basis, refused_share

if TYPE_CHECKING:
    from model_store.bundle import Bundle

__all__ = ["REFUSE_RATES_BASIS", "compare_domain"]

REFUSE_RATES_BASIS = "refuse rates"
_DOMAIN_FILES = ("domain_alpha.npy", "domain_support_vectors.npy", "domain_whitening.npy")


def compare_domain(
    active: Manifest,
    candidate: Manifest,
    recent: Sequence[Mapping[str, Any]],
    convert: Converter,
    *,
    bundles: "tuple[Bundle, Bundle] | None" = None,
    outside_action: str = DEFAULT_OUTSIDE_ACTION,
) -> list[ContractChange]:
    """The domain change from ``active`` to ``candidate`` (none, or one ``ContractChange``).

    ``bundles`` (active, candidate) score ``recent`` to count the records that would newly be
    refused as outside_domain; ``outside_action`` is the model's choice (``refuse`` or ``flag``).
    """
    old, new = active.domain, candidate.domain
    if new is None:
        if old is None:
            return []
        return [ContractChange(
            "domain_removed", None, _summary(old), None, True,
            f"domain model removed (active: {_shown(old)}): \"domain\" would be null in every answer",
        )]
    if old is not None and _same_model(active, candidate):
        return []
    kind = "domain_added" if old is None else "domain_changed"
    shown = f"domain model added ({_shown(new)})" if old is None else f"domain model changed: {_changed(old, new)}"
    summary_old = None if old is None else _summary(old)
    if outside_action == "flag":
        return [ContractChange(kind, None, summary_old, _summary(new), False,
                               f"{shown} (this model only flags records outside its domain; none are refused)")]
    counted = _newly_outside(bundles, recent, convert) if recent and bundles is not None else None
    if counted is not None:
        count, of = counted
        refused = refused_share(count, of)
        return [ContractChange(
            kind, None, summary_old, _summary(new), count > 0,
            f"{shown} ({count} of {of} recent inputs the active version scores ({100.0 * refused['share']:.1f}%) "
            "would be refused as outside_domain)",
            refused, recent_basis(len(recent)),
        )]
    if old is None:
        verdict, breaking = "no recent inputs to show that none the active version scores would be refused", True
    else:
        higher = new.calibration.refuse_rate > old.calibration.refuse_rate
        breaking = higher
        verdict = (f"no recent inputs to count; the candidate's refuse rate is "
                   f"{'higher' if higher else 'not higher'} than the active version's")
    return [ContractChange(kind, None, summary_old, _summary(new), breaking, f"{shown} ({verdict})",
                           None, REFUSE_RATES_BASIS)]


def _newly_outside(bundles: "tuple[Bundle, Bundle]", recent, convert) -> tuple[int, int] | None:
    """(recent inputs the active version scores that the candidate refuses as outside_domain, how many
    the active version scores); None when the active version scores none of them."""
    active, candidate = bundles
    scored = _accepted(active, recent, convert, keep_outside=False)
    if not scored:
        return None
    outside = _accepted(candidate, recent, convert, keep_outside=True)
    return len(scored & outside), len(scored)


def _accepted(bundle: "Bundle", recent, convert, *, keep_outside: bool) -> set[int]:
    """Indices of ``recent`` records that ``bundle``'s ranges accept and whose domain verdict is outside
    (``keep_outside``), or that it scores: accepted and not outside (refusing, as the model does)."""
    checked = check_records(bundle.manifest.features, recent, convert, allow_extra=True)
    accepted = checked.accepted.tolist()
    if not accepted:
        return set()
    verdicts = bundle.score(checked.values).domain_verdict
    if verdicts is None:
        return set() if keep_outside else set(accepted)
    return {index for index, verdict in zip(accepted, verdicts.tolist()) if (verdict == OUTSIDE) == keep_outside}


def _same_model(active: Manifest, candidate: Manifest) -> bool:
    """The same one-class model, thresholds and refuse rate (the arrays compared by their SHA-256)."""
    old, new = active.domain, candidate.domain
    # A file both lack (the whitening of a bundle exported before it) is the same; one side's alone is not.
    same_arrays = all(
        (name in active.files) == (name in candidate.files)
        and (name not in active.files or active.files[name].sha256 == candidate.files[name].sha256)
        for name in _DOMAIN_FILES
    )
    return same_arrays and (old.gamma, old.intercept, old.thresholds, old.calibration.refuse_rate) == (
        new.gamma, new.intercept, new.thresholds, new.calibration.refuse_rate)


def _summary(spec: DomainSpec) -> dict[str, float]:
    return {"outside_below": spec.thresholds.outside_below, "unusual_below": spec.thresholds.unusual_below,
            "refuse_rate": spec.calibration.refuse_rate}


def _shown(spec: DomainSpec) -> str:
    return (f"outside below {spec.thresholds.outside_below:.4g}, unusual below {spec.thresholds.unusual_below:.4g}, "
            f"refuse rate {100.0 * spec.calibration.refuse_rate:g}%")


def _changed(old: DomainSpec, new: DomainSpec) -> str:
    space = f"space {old.space} -> {new.space}, " if old.space != new.space else ""
    return (f"{space}outside below {old.thresholds.outside_below:.4g} -> {new.thresholds.outside_below:.4g}, "
            f"unusual below {old.thresholds.unusual_below:.4g} -> {new.thresholds.unusual_below:.4g}, "
            f"refuse rate {100.0 * old.calibration.refuse_rate:g}% -> {100.0 * new.calibration.refuse_rate:g}%")
