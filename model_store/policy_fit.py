"""Choose the range margin and the domain thresholds out of sample, and estimate what they refuse.

A rule judged on the rows it was derived from refuses almost nothing of them and more of rows it
has never seen: the min/max of 124 wine rows contains all 124, but a new row falls outside one of
its 13 feature ranges far more often than 1 % of the time. So both rules are judged here on rows
their fit did not see (cross-fitting). The rows are the reference rows, then the holdout rows when
there are any (``n`` in all):

- Ranges: each row's ``margin_needed`` against the ranges derived from the other ``n - 1`` rows
  (leave-one-out, exact and cheap: only a row that alone holds a feature's minimum or maximum
  changes the ranges), with the rule that derives the bundle's ranges (``model_store.reference_rows``).
- Domain: a reference row's score by a one-class SVM fitted on the reference rows of the other
  ``FOLDS`` folds (scikit-learn ``KFold`` over all rows, shuffled with the export's seed), put on
  the bundle model's scale (``model_store.domain_fit``); a holdout row's score by the bundle's own
  model, which is fitted on the reference rows only.

``choose`` then sets the policy for a refusal budget of ``refuse_rate x n`` rows, split explicitly
between the rules: the ranges get ``RANGE_SHARE`` (half) of it, and the margin is the smallest
that refuses that many rows (rows no margin lets in, outside an explicit ``allowed`` or physical
``bounds``, count first); the domain's outside threshold spends the rest on the rows the ranges
accept, so the two rules together refuse about ``refuse_rate``. Half each, because neither rule
is known to matter more: the ranges catch an error in one feature (a unit, an offset, a column
mix-up), the domain model a combination no reference row resembles. A threshold for k whole rows
lies halfway between the k-th and the next value; for 0 rows, half the gap between the two most
extreme values beyond the most extreme one (an extrapolation: a 1 % tail cannot be measured on
fewer than 100 rows); a fraction of a row interpolates between the two whole counts around it. A
``--margin`` given by the user is kept, and the domain gets what its range refusals leave.

Whatever the budget, the outside threshold is at least the score of a row holding ``NO_MASS`` of
the model's kernel mass (``intercept + NO_MASS x sum(alpha)``): a row whose every kernel has
vanished gets the intercept, the score that says nothing about it, and is outside. Without the
floor, real rows scored out of sample at that level (rows far from the fold model's rows) pulled
the budget's threshold below the intercept itself, where no row can score, and the domain model
refused nothing at all (breast cancer, tests/benchmarks/domain_detection.py).

Choosing a threshold on the same values it is then measured on is optimistic again, so the
refusal estimate is nested: for each fold, the policy is chosen on the other folds' out-of-sample
values and measured on that fold's (no model is refitted); the estimate is the share of all rows
refused so. The bundle's ranges come from all rows and its domain model from all reference rows,
more than any fold model saw, so on new rows it tends to refuse less than the estimate says
(tests/benchmarks/domain_detection.py prints both; tests/bundle/test_fresh_refusals.py bounds the
share of new rows refused).

This module imports scikit-learn; the serving path never imports it.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from sklearn.model_selection import KFold

from model_store.domain_fit import UNUSUAL_RATE, OneClassFit, cross_fitted_scores
from model_store.reference_rows import margin_needed

__all__ = ["FOLDS", "NO_MASS", "RANGE_SHARE", "ChosenPolicy", "choose", "choose_policy", "lower_threshold", "upper_threshold"]

FOLDS = 10
RANGE_SHARE = 0.5
NO_MASS = 1e-3


@dataclass(frozen=True)
class ChosenPolicy:
    """The margin, the domain thresholds, and the out-of-sample record for the manifest."""

    margin: float
    unusual_below: float
    outside_below: float
    record: dict[str, Any]


def choose_policy(
    names: list[str],
    raw: np.ndarray,
    scaled_reference: np.ndarray,
    scaled_holdout: np.ndarray | None,
    domain: OneClassFit,
    *,
    feature_info: dict[str, dict],
    refuse_rate: float,
    margin: float | None,
    seed: int,
) -> ChosenPolicy:
    """The policy for ``raw`` (n, f) rows: reference rows first, then holdout rows (raw units).

    ``scaled_reference`` (n_ref, f) and ``scaled_holdout`` (n - n_ref, f) or None are the same rows
    in the scaled space; ``domain`` is the bundle's one-class SVM, fitted on ``scaled_reference``.
    ``margin`` None lets the margin be chosen; a number is kept as given.
    """
    n_reference = len(scaled_reference)
    folds = _folds(len(raw), seed)
    need = leave_one_out_needs(names, raw, feature_info)
    reference_folds = [held[held < n_reference] for held in folds]
    score = cross_fitted_scores(scaled_reference, reference_folds, domain, seed)
    if scaled_holdout is not None and len(scaled_holdout):
        score = np.concatenate([score, domain.decision(scaled_holdout)])
    floor = _no_mass_floor(domain)
    chosen_margin, unusual, outside = choose(need, score, refuse_rate, margin, floor)
    record = {
        "method": f"ranges leave-one-out, domain {len(folds)}-fold cross-fitting",
        "folds": len(folds),
        "seed": int(seed),
        "rows": len(raw),
        "range_share": RANGE_SHARE,
        "margin": float(chosen_margin),
        "margin_source": "chosen" if margin is None else "given",
        "estimate": _nested_estimate(need, score, folds, refuse_rate, margin, floor),
    }
    return ChosenPolicy(float(chosen_margin), unusual, outside, record)


def leave_one_out_needs(names: list[str], raw: np.ndarray, feature_info: dict[str, dict]) -> np.ndarray:
    """(n,) each row's ``margin_needed`` against the ranges derived from the other n - 1 rows of ``raw`` (n, f).

    Removing a row changes the ranges only when it holds a feature's minimum or maximum alone, so
    only those rows (at most 2 f) are measured against their own leave-one-out ranges; every other
    row is measured against the ranges of all rows, which are then the ones without it.
    """
    need = margin_needed(names, raw, raw, feature_info)
    low, high = raw.min(axis=0), raw.max(axis=0)
    sole = ((raw == low) & ((raw == low).sum(axis=0) == 1)) | ((raw == high) & ((raw == high).sum(axis=0) == 1))
    for row in np.flatnonzero(sole.any(axis=1)):
        need[row] = margin_needed(names, np.delete(raw, row, axis=0), raw[row:row + 1], feature_info)[0]
    return need


def _no_mass_floor(domain: OneClassFit) -> float:
    """The score below which a row holds less than ``NO_MASS`` of the model's kernel mass."""
    estimator = domain.estimator
    return float(estimator.intercept_[0]) + NO_MASS * float(estimator.dual_coef_.sum())


def _folds(rows: int, seed: int) -> list[np.ndarray]:
    splitter = KFold(n_splits=min(FOLDS, rows), shuffle=True, random_state=seed % 2**32)
    return [held for _, held in splitter.split(np.zeros((rows, 1)))]


def choose(need: np.ndarray, score: np.ndarray, refuse_rate: float,
           margin: float | None, floor: float = -np.inf) -> tuple[float, float, float]:
    """(margin, unusual_below, outside_below) for out-of-sample values of ``n`` rows.

    ``need`` (n,) is each row's margin needed, ``score`` (n,) its one-class score. The budget is
    ``refuse_rate x n`` rows: a ``margin`` of None is chosen to refuse ``RANGE_SHARE`` of it (rows
    no margin lets in count first), and the outside threshold refuses what is left of the budget
    among the rows the ranges accept. Budgets are fractions of rows: a threshold for 0.6 rows lies
    0.6 of the way from the one for 0 rows to the one for 1 row. The outside threshold is at least
    ``floor``, whatever the budget.
    """
    rows = len(need)
    budget = refuse_rate * rows
    fixed = int(np.isinf(need).sum())  # rows no margin lets in
    if margin is None:
        finite = np.sort(need[np.isfinite(need)])[::-1]
        range_budget = max(0.0, RANGE_SHARE * budget - fixed)
        margin = max(0.0, upper_threshold(finite, range_budget)) if len(finite) else 0.0
        domain_budget = budget - max(fixed, RANGE_SHARE * budget)
    else:
        domain_budget = budget - int((need > margin).sum())
    eligible = np.sort(score[~(need > margin)])
    outside = max(floor, lower_threshold(eligible, max(0.0, domain_budget)))
    unusual = max(outside, lower_threshold(eligible, UNUSUAL_RATE * rows))
    return float(margin), unusual, outside


def _nested_estimate(need: np.ndarray, score: np.ndarray, folds: list[np.ndarray], refuse_rate: float,
                     margin: float | None, floor: float) -> dict[str, float]:
    """Shares of the rows refused by a policy chosen without them (fold by fold), per rule and in total."""
    refused_range = refused_domain = 0
    for held in folds:
        fold_margin, _, fold_outside = choose(np.delete(need, held), np.delete(score, held), refuse_rate, margin, floor)
        out_of_range = need[held] > fold_margin
        refused_range += int(out_of_range.sum())
        refused_domain += int((~out_of_range & (score[held] < fold_outside)).sum())
    rows = len(need)
    return {
        "refused_range": refused_range / rows,
        "refused_domain": refused_domain / rows,
        "refused_total": (refused_range + refused_domain) / rows,
    }


def lower_threshold(ascending: np.ndarray, count: float) -> float:
    """A threshold with ``count`` of the ``ascending`` values below it (ties aside).

    For a whole ``count`` k it lies halfway between the k-th and the next value; with k = 0, half
    the gap between the two lowest values below the lowest (an extrapolation); a fractional count
    interpolates linearly between the thresholds of the whole counts around it.
    """
    whole = int(np.floor(count))
    fraction = float(count) - whole
    at = _lower_threshold_whole(ascending, whole)
    if fraction == 0.0 or whole + 1 > len(ascending):
        return at
    return at + fraction * (_lower_threshold_whole(ascending, whole + 1) - at)


def upper_threshold(descending: np.ndarray, count: float) -> float:
    """A threshold with ``count`` of the ``descending`` values above it, as ``lower_threshold`` mirrored."""
    return -lower_threshold(-np.asarray(descending), count)


def _lower_threshold_whole(ascending: np.ndarray, count: int) -> float:
    if len(ascending) == 0:
        return -np.inf
    if count >= len(ascending):
        return float(ascending[-1]) + 1e-12 * max(1.0, abs(float(ascending[-1])))
    if count > 0:
        return float(0.5 * (ascending[count - 1] + ascending[count]))
    gap = float(ascending[1] - ascending[0]) if len(ascending) > 1 else abs(float(ascending[0]))
    return float(ascending[0]) - 0.5 * gap
