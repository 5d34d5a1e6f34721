"""Fit the domain model at export: the one-class SVM of the bundle and its cross-fitted scores.

scikit-learn's ``OneClassSVM`` (Schölkopf et al. 2001, "Estimating the support of a
high-dimensional distribution") is fitted on the reference rows in the classifier's scaled space,
with ``nu`` = ``NU`` and scikit-learn's ``gamma='scale'`` rule, ``1 / (f * variance of the scaled
rows)``, fixed as a number so that the bundle records it. References larger than
``MAX_FIT_ROWS`` are subsampled without replacement by a generator seeded from the reference
file's SHA-256; the seed and the row count go into the manifest.

The thresholds of its verdicts are chosen with the range margin in ``model_store.policy_fit``, on
scores of rows the scoring model was not fitted on: a holdout row is scored by the bundle's model
itself; a reference row by a model fitted with the same settings on the other cross-fitting folds
of the reference. Such a fold model saw fewer rows than the bundle's, and libsvm's one-class
coefficients sum to ``nu`` x rows, so its decision is on a smaller scale: each fold's scores are
multiplied by the ratio of the bundle model's coefficient sum to the fold model's, which puts them
on the bundle model's scale (tests/bundle/test_policy_fit.py checks it where in-sample and
out-of-sample scores agree, at the median row).

This module imports scikit-learn; the serving path never imports it.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from sklearn.svm import OneClassSVM

__all__ = ["DEFAULT_REFUSE_RATE", "MAX_FIT_ROWS", "NU", "UNUSUAL_RATE", "FittedDomain", "cross_fitted_scores",
           "domain_spec", "fit_one_class"]

DEFAULT_REFUSE_RATE = 0.01
UNUSUAL_RATE = 0.10
NU = 0.05
MAX_FIT_ROWS = 2000  # libsvm's one-class fit grows with the square of the rows


@dataclass(frozen=True)
class FittedDomain:
    """The manifest's ``domain`` section, its arrays, and the fitted estimator (the reference)."""

    spec: dict[str, Any]
    arrays: dict[str, np.ndarray]
    estimator: OneClassSVM


@dataclass(frozen=True)
class OneClassFit:
    """The bundle's one-class SVM before its thresholds are known."""

    estimator: OneClassSVM
    gamma: float
    fit_rows: int
    reference_rows: int
    subsample_seed: int | None


def fit_one_class(reference: np.ndarray, seed: int) -> OneClassFit:
    """Fit on ``reference`` (n, f) scaled rows (a seeded subsample of ``MAX_FIT_ROWS`` when larger)."""
    fit_rows, subsample_seed = _subsample(reference, seed)
    variance = float(fit_rows.var())
    gamma = 1.0 / (reference.shape[1] * variance) if variance > 0 else 1.0
    estimator = OneClassSVM(kernel="rbf", gamma=gamma, nu=NU).fit(fit_rows)
    return OneClassFit(estimator, gamma, len(fit_rows), len(reference), subsample_seed)


def cross_fitted_scores(reference: np.ndarray, folds: list[np.ndarray], full: OneClassFit, seed: int) -> np.ndarray:
    """(n,) score of each ``reference`` (n, f) row by a model fitted on the other ``folds``, on ``full``'s scale.

    ``folds`` partition ``range(n)``; each fold model is fitted like ``full`` (same gamma and nu,
    the same subsample bound) on the rows outside its fold. A fold that leaves fewer than 2 rows to
    fit on (a reference of 2 or 3 rows) keeps ``full``'s own, in-sample scores.
    """
    scores = full.estimator.decision_function(reference)  # kept only where a fold leaves under 2 rows to fit
    full_mass = float(full.estimator.dual_coef_.sum())
    for index, held in enumerate(folds):
        others = np.setdiff1d(np.arange(len(reference)), held, assume_unique=True)
        if len(held) == 0 or len(others) < 2:
            continue
        rows, _ = _subsample(reference[others], seed + index + 1)
        model = OneClassSVM(kernel="rbf", gamma=full.gamma, nu=NU).fit(rows)
        scores[held] = model.decision_function(reference[held]) * (full_mass / float(model.dual_coef_.sum()))
    return scores


def domain_spec(fit: OneClassFit, thresholds: dict[str, float], calibration: dict[str, Any]) -> FittedDomain:
    """The bundle's domain section and arrays for ``fit`` with the chosen ``thresholds``."""
    estimator = fit.estimator
    spec = {
        "method": "one-class-svm",
        "space": "scaled",
        "gamma": float(fit.gamma),
        "nu": NU,
        "intercept": float(estimator.intercept_[0]),
        "support_vectors": int(len(estimator.support_vectors_)),
        "fit_rows": int(fit.fit_rows),
        "reference_rows": int(fit.reference_rows),
        "subsample_seed": fit.subsample_seed,
        "thresholds": {"unusual_below": float(thresholds["unusual_below"]),
                       "outside_below": float(thresholds["outside_below"])},
        "calibration": calibration,
    }
    arrays = {
        "domain_support_vectors.npy": estimator.support_vectors_,
        "domain_alpha.npy": estimator.dual_coef_[0],
    }
    return FittedDomain(spec, arrays, estimator)


def _subsample(reference: np.ndarray, seed: int) -> tuple[np.ndarray, int | None]:
    if len(reference) <= MAX_FIT_ROWS:
        return reference, None
    rows = np.sort(np.random.default_rng(seed).choice(len(reference), MAX_FIT_ROWS, replace=False))
    return reference[rows], seed
