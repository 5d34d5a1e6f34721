"""Fit the domain model at export: the one-class SVM of the bundle and its cross-fitted scores.

scikit-learn's ``OneClassSVM`` (Schölkopf et al. 2001, "Estimating the support of a
high-dimensional distribution") is fitted on the reference rows in the classifier's scaled space
after a whitening map ``W`` (f, f): ``w = z W`` with ``W = D^-1 R^(-1/2)``, ``D`` the diagonal of
the fit rows' standard deviations (1 for a constant feature) and ``R`` the Ledoit-Wolf shrunk
covariance of the rows divided by them (Ledoit and Wolf 2004, "A well-conditioned estimator for
large-dimensional covariance matrices", J. Multivariate Analysis 88; scikit-learn's
``LedoitWolf``), so that ``W^T (D R D) W`` is the identity. Even with unit variances (a
StandardScaler) correlated features stay correlated, and an isotropic kernel sees a row that breaks
a correlation (one feature moved, two swapped, features drawn independently) as hardly further from
the reference than one that follows it; after whitening every direction of ``D R D`` counts alike
and such a row is far. The other side of it: a row far out along the direction the reference rows
vary most (every feature of breast cancer 3 standard deviations up) is nearer than it looks in the
scaled space, and is left to the ranges. The division by ``D`` first keeps the whitening
independent of the features' units (Ledoit-Wolf shrinks towards a multiple of the identity, which
would otherwise drown a feature of small variance beside large ones, as with no scaler); after a
StandardScaler fitted on the same rows ``D`` is the identity. Fold models of cross-fitting whiten
with the same ``D`` and their own ``R``. The eigenvalues of ``R`` are floored at
``EIGENVALUE_FLOOR`` x their mean, so that no direction is magnified more than about 30 times the
average one (shrinkage usually keeps them far above it, but it is 0 for a handful of rows); fewer
than 3 rows, or rows without variance, are not whitened (``W`` = identity). The kernel width is the
median heuristic on the whitened rows: ``gamma = 1 / (2 sigma^2)`` with ``sigma^2`` the median
squared distance between two distinct ones (common practice in kernel methods; e.g. Gretton et al.
2012, "A kernel two-sample test", JMLR 13). scikit-learn's ``gamma='scale'`` rule, ``1 / (f *
variance)``, gives a width ``1 / sqrt(2 gamma)`` about half as large there: whitening gives
held-out rows coordinates along directions of little reference variance that the fitted rows do not
share, and with it 1.9 % of breast cancer's held-out rows (30 features) kept no kernel mass and
were refused (``model_store.policy_fit.NO_MASS``), at the bound of twice the 1 % refuse rate
(tests/benchmarks/domain_detection.py, seeds 0-4; the median heuristic: 0.9 %). ``gamma`` is fixed
as a number so that the bundle records it. References larger than ``MAX_FIT_ROWS`` are subsampled
without replacement by a generator seeded from the reference file's SHA-256; the seed and the row
count go into the manifest.

The thresholds of its verdicts are chosen with the range margin in ``model_store.policy_fit``, on
scores of rows the scoring model was not fitted on: a holdout row is scored by the bundle's model
itself; a reference row by a model fitted with the same settings (its own whitening, the same gamma
and nu) on the other cross-fitting folds of the reference. Such a fold model saw fewer rows than the
bundle's, and libsvm's one-class coefficients sum to ``nu`` x rows, so its decision is on a smaller
scale: each fold's scores are multiplied by the ratio of the bundle model's coefficient sum to the
fold model's, which puts them on the bundle model's scale (tests/bundle/test_policy_fit.py checks it
where in-sample and out-of-sample scores agree, at the median row).

This module imports scikit-learn; the serving path never imports it.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy.spatial.distance import pdist
from sklearn.covariance import LedoitWolf
from sklearn.svm import OneClassSVM

__all__ = ["DEFAULT_REFUSE_RATE", "EIGENVALUE_FLOOR", "MAX_FIT_ROWS", "NU", "UNUSUAL_RATE", "FittedDomain", "OneClassFit",
           "cross_fitted_scores", "domain_spec", "feature_deviation", "fit_one_class", "whitening_map"]

DEFAULT_REFUSE_RATE = 0.01
UNUSUAL_RATE = 0.10
NU = 0.05
MAX_FIT_ROWS = 2000  # libsvm's one-class fit grows with the square of the rows
EIGENVALUE_FLOOR = 1e-3  # of the mean eigenvalue: a direction is magnified at most ~30x the average


@dataclass(frozen=True)
class OneClassFit:
    """The bundle's one-class SVM before its thresholds are known: ``estimator`` is fitted on ``rows @ whitening``."""

    estimator: OneClassSVM
    whitening: np.ndarray  # (f, f) the map from the scaled space to the model's space: w = z W
    deviation: np.ndarray  # (f,) the fit rows' feature deviations, D of the whitening
    shrinkage: float | None  # Ledoit-Wolf's shrinkage, None when the rows had no variance to whiten
    fit_rows: int
    reference_rows: int
    subsample_seed: int | None

    @property
    def gamma(self) -> float:
        return float(self.estimator.gamma)

    def decision(self, scaled: np.ndarray) -> np.ndarray:
        """(n,) scikit-learn's ``decision_function`` of ``scaled`` (n, f) rows, whitened first."""
        return self.estimator.decision_function(scaled @ self.whitening)


@dataclass(frozen=True)
class FittedDomain:
    """The manifest's ``domain`` section, its arrays, and the fitted model (the reference)."""

    spec: dict[str, Any]
    arrays: dict[str, np.ndarray]
    fit: OneClassFit

    def decision(self, scaled: np.ndarray) -> np.ndarray:
        """(n,) the domain score of ``scaled`` (n, f) rows by scikit-learn, the bundle's reference value."""
        return self.fit.decision(scaled)


def feature_deviation(rows: np.ndarray) -> np.ndarray:
    """(f,) each feature's standard deviation over ``rows`` (n, f), 1 where it is constant."""
    deviation = rows.std(axis=0)
    deviation[deviation == 0] = 1.0  # a constant feature: nothing to divide, its column stays 0
    return deviation


def whitening_map(rows: np.ndarray, deviation: np.ndarray) -> tuple[np.ndarray, float | None]:
    """(W (f, f), shrinkage): ``W = D^-1 R^(-1/2)`` for ``rows`` (n, f) and ``D = diag(deviation)``.

    ``deviation`` (f,) is ``feature_deviation`` of the bundle model's fit rows, also for the fold
    models of cross-fitting: a fold's own deviation of a feature that is almost constant (a pixel
    dark in all but a few images) can be tiny and would magnify it without bound. Identity and
    None for fewer than 3 rows or rows without variance: there is then no covariance worth
    inverting.
    """
    features = rows.shape[1]
    if len(rows) < 3 or not float(rows.std(axis=0).max()) > 0:
        return np.eye(features), None
    estimate = LedoitWolf().fit(rows / deviation)
    eigenvalues, eigenvectors = np.linalg.eigh(estimate.covariance_)
    eigenvalues = np.maximum(eigenvalues, EIGENVALUE_FLOOR * float(eigenvalues.mean()))
    inverse_root = (eigenvectors * eigenvalues ** -0.5) @ eigenvectors.T
    return inverse_root / deviation[:, None], float(estimate.shrinkage_)


def fit_one_class(reference: np.ndarray, seed: int) -> OneClassFit:
    """Fit on ``reference`` (n, f) scaled rows (a seeded subsample of ``MAX_FIT_ROWS`` when larger), whitened."""
    fit_rows, subsample_seed = _subsample(reference, seed)
    deviation = feature_deviation(fit_rows)
    estimator, whitening, shrinkage = _fit_whitened(fit_rows, deviation, gamma=None)
    return OneClassFit(estimator, whitening, deviation, shrinkage, len(fit_rows), len(reference), subsample_seed)


def _fit_whitened(rows: np.ndarray, deviation: np.ndarray, gamma: float | None
                  ) -> tuple[OneClassSVM, np.ndarray, float | None]:
    """(estimator, W, shrinkage): a one-class SVM on ``rows`` (n, f) whitened by their own map.

    ``gamma`` None takes the median heuristic over the distinct whitened rows (module docstring).
    """
    whitening, shrinkage = whitening_map(rows, deviation)
    whitened = rows @ whitening
    if gamma is None:
        distances = pdist(whitened, "sqeuclidean") if len(whitened) > 1 else np.zeros(0)
        distances = distances[distances > 0]  # duplicate rows would pull the median to 0
        gamma = 1.0 / (2.0 * float(np.median(distances))) if len(distances) else 1.0
    return OneClassSVM(kernel="rbf", gamma=gamma, nu=NU).fit(whitened), whitening, shrinkage


def cross_fitted_scores(reference: np.ndarray, folds: list[np.ndarray], full: OneClassFit, seed: int) -> np.ndarray:
    """(n,) score of each ``reference`` (n, f) row by a model fitted on the other ``folds``, on ``full``'s scale.

    ``folds`` partition ``range(n)``; each fold model is fitted like ``full`` (its own whitening of
    the rows it is fitted on, the same gamma and nu, the same subsample bound) on the rows outside
    its fold. A fold that leaves fewer than 2 rows to fit on (a reference of 2 or 3 rows) keeps
    ``full``'s own, in-sample scores.
    """
    scores = full.decision(reference)  # kept only where a fold leaves under 2 rows to fit
    full_mass = float(full.estimator.dual_coef_.sum())
    for index, held in enumerate(folds):
        others = np.setdiff1d(np.arange(len(reference)), held, assume_unique=True)
        if len(held) == 0 or len(others) < 2:
            continue
        rows, _ = _subsample(reference[others], seed + index + 1)
        model, whitening, _ = _fit_whitened(rows, full.deviation, full.gamma)
        fold_scores = model.decision_function(reference[held] @ whitening)
        scores[held] = fold_scores * (full_mass / float(model.dual_coef_.sum()))
    return scores


def domain_spec(fit: OneClassFit, thresholds: dict[str, float], calibration: dict[str, Any]) -> FittedDomain:
    """The bundle's domain section and arrays for ``fit`` with the chosen ``thresholds``."""
    estimator = fit.estimator
    spec = {
        "method": "one-class-svm",
        "space": "whitened",
        "whitening": {"method": "ledoit-wolf", "shrinkage": fit.shrinkage},
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
        "domain_whitening.npy": fit.whitening,
    }
    return FittedDomain(spec, arrays, fit)


def _subsample(reference: np.ndarray, seed: int) -> tuple[np.ndarray, int | None]:
    if len(reference) <= MAX_FIT_ROWS:
        return reference, None
    rows = np.sort(np.random.default_rng(seed).choice(len(reference), MAX_FIT_ROWS, replace=False))
    return reference[rows], seed
