"""Fit the domain model at export: a one-class SVM and the thresholds of its verdicts.

scikit-learn's ``OneClassSVM`` (Schölkopf et al. 2001, "Estimating the support of a
high-dimensional distribution") is fitted on the reference rows in the classifier's scaled space,
with ``nu`` = ``NU`` and scikit-learn's ``gamma='scale'`` rule, ``1 / (f * variance of the scaled
rows)``, fixed as a number so that the bundle records it. References larger than
``MAX_FIT_ROWS`` are subsampled without replacement by a generator seeded from the reference
file's SHA-256; the seed and the row count go into the manifest.

Thresholds come from rows the model was not fitted on: the holdout when there is one, else
out-of-fold scores of ``CV_FOLDS`` one-class SVMs fitted with the same settings on the other folds
(each scaled by the ratio of its coefficient sum to the full model's: libsvm's coefficients sum to
``nu`` x rows, so the decision grows with the rows fitted). Of ``n`` such rows, the ``round(rate n)``
lowest scores fall below a threshold placed halfway to the next score, so the policy refuses about
``--refuse-rate`` of them (counting range refusals first) and flags about ``UNUSUAL_RATE`` as
unusual. With ``round(rate n) = 0`` the threshold sits half the gap between the two lowest scores
below the lowest one: a small holdout cannot measure a 1 % tail, so it is extrapolated.

This module imports scikit-learn; the serving path never imports it.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from sklearn.model_selection import KFold
from sklearn.svm import OneClassSVM

__all__ = ["CV_FOLDS", "DEFAULT_REFUSE_RATE", "MAX_FIT_ROWS", "NU", "UNUSUAL_RATE", "FittedDomain", "fit_domain",
           "lower_threshold"]

DEFAULT_REFUSE_RATE = 0.01
UNUSUAL_RATE = 0.10
NU = 0.05
MAX_FIT_ROWS = 2000  # libsvm's one-class fit grows with the square of the rows
CV_FOLDS = 5


@dataclass(frozen=True)
class FittedDomain:
    """The manifest's ``domain`` section, its arrays, and the fitted estimator (the reference)."""

    spec: dict[str, Any]
    arrays: dict[str, np.ndarray]
    estimator: OneClassSVM


def fit_domain(
    reference: np.ndarray,
    holdout: np.ndarray | None,
    holdout_in_range: np.ndarray | None,
    *,
    refuse_rate: float,
    seed: int,
) -> FittedDomain:
    """Fit on ``reference`` (n, f) scaled rows; thresholds from ``holdout`` (m, f) scaled rows or CV.

    ``holdout_in_range`` (m,) bool marks the holdout rows the range rule accepts; the domain
    threshold only spends what is left of the refusal budget after the range refusals.
    """
    fit_rows, subsample_seed = _subsample(reference, seed)
    gamma = 1.0 / (reference.shape[1] * float(fit_rows.var())) if fit_rows.var() > 0 else 1.0
    estimator = OneClassSVM(kernel="rbf", gamma=gamma, nu=NU).fit(fit_rows)
    if holdout is not None and len(holdout) >= 2:
        scores = estimator.decision_function(holdout)
        in_range = holdout_in_range if holdout_in_range is not None else np.ones(len(holdout), bool)
        source = "holdout"
    else:
        scores = _out_of_fold(fit_rows, gamma, estimator, seed)
        in_range = np.ones(len(scores), bool)
        source = "cross-validation"
    total = len(scores)
    eligible = np.sort(scores[in_range])
    range_refused = total - len(eligible)
    outside = lower_threshold(eligible, max(0, round(refuse_rate * total) - range_refused))
    unusual = max(outside, lower_threshold(eligible, round(UNUSUAL_RATE * total)))
    spec = {
        "method": "one-class-svm",
        "space": "scaled",
        "gamma": float(gamma),
        "nu": NU,
        "intercept": float(estimator.intercept_[0]),
        "support_vectors": int(len(estimator.support_vectors_)),
        "fit_rows": int(len(fit_rows)),
        "reference_rows": int(len(reference)),
        "subsample_seed": subsample_seed,
        "thresholds": {"unusual_below": float(unusual), "outside_below": float(outside)},
        "calibration": {"source": source, "rows": int(total), "refuse_rate": float(refuse_rate),
                        "unusual_rate": UNUSUAL_RATE},
    }
    arrays = {
        "domain_support_vectors.npy": estimator.support_vectors_,
        "domain_alpha.npy": estimator.dual_coef_[0],
    }
    return FittedDomain(spec, arrays, estimator)


def lower_threshold(ascending: np.ndarray, count: int) -> float:
    """A threshold with ``count`` of the ``ascending`` scores below it (ties aside), halfway to the next."""
    if len(ascending) == 0:
        return -np.inf
    if count >= len(ascending):
        return float(ascending[-1]) + 1e-12 * max(1.0, abs(float(ascending[-1])))
    if count > 0:
        return float(0.5 * (ascending[count - 1] + ascending[count]))
    gap = float(ascending[1] - ascending[0]) if len(ascending) > 1 else abs(float(ascending[0]))
    return float(ascending[0]) - 0.5 * gap


def _subsample(reference: np.ndarray, seed: int) -> tuple[np.ndarray, int | None]:
    if len(reference) <= MAX_FIT_ROWS:
        return reference, None
    rows = np.sort(np.random.default_rng(seed).choice(len(reference), MAX_FIT_ROWS, replace=False))
    return reference[rows], seed


def _out_of_fold(rows: np.ndarray, gamma: float, full: OneClassSVM, seed: int) -> np.ndarray:
    folds = KFold(n_splits=min(CV_FOLDS, len(rows)), shuffle=True, random_state=seed % 2**32)
    scores = np.empty(len(rows))
    full_mass = float(full.dual_coef_.sum())
    for fitted, held in folds.split(rows):
        model = OneClassSVM(kernel="rbf", gamma=gamma, nu=NU).fit(rows[fitted])
        scores[held] = model.decision_function(rows[held]) * (full_mass / float(model.dual_coef_.sum()))
    return scores
