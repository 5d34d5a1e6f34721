"""A bundle of 100,000 support vectors x 50 features, written directly (no libsvm fit).

Fitting an SVC that keeps 100,000 support vectors takes many minutes here
(about 110 s for 50,000 x 10 already) and the result would only matter for
its array sizes: loading and self-testing cost the same whatever the fitted
coefficients are. So the arrays are drawn from a fixed seed and written with
``model_store.bundle.write_bundle``, and the golden decisions come from an
independent numpy implementation of the SVM decision function (scikit-learn user guide,
"Support Vector Machines", section on SVC's mathematical formulation: the binary
``decision_function(x) = sum_i dual_coef_[0, i] exp(-gamma |x - s_i|^2) + intercept_[0]``,
positive for ``classes_[1]``), with the squared distance summed directly as
``sum_k (x_k - s_ik)^2`` rather than rbfgate's BLAS expansion, so the bundle's
self-test compares two different computations.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from model_store.bundle import write_bundle

__all__ = ["write_large_bundle"]

_GOLDEN_ROWS = 40


def write_large_bundle(out: Path, *, n_support: int = 100_000, features: int = 50, version: str = "1.0.0",
                       seed: int = 11) -> Path:
    """Write the bundle to ``out`` (which must not exist) and return ``out``."""
    rng = np.random.default_rng([seed, n_support, features])
    center = rng.normal(size=features) * 10.0
    scale = rng.uniform(0.5, 3.0, size=features)
    support_vectors = rng.normal(size=(n_support, features))  # scaled space
    half = n_support // 2
    dual_coef = np.concatenate([-rng.uniform(0, 1e-3, half), rng.uniform(0, 1e-3, n_support - half)])[None, :]
    gamma = 1.0 / features
    intercept = float(rng.normal() * 0.01)
    golden_raw = center + scale * rng.normal(size=(_GOLDEN_ROWS, features)) * 0.8
    decisions = _direct_decision((golden_raw - center) / scale, support_vectors, dual_coef[0], gamma, intercept)
    reference_sample = support_vectors[rng.choice(n_support, 200, replace=False)] + rng.normal(size=(200, features)) * 0.1
    quantiles = np.quantile(_direct_nearest(reference_sample, support_vectors), np.linspace(0, 1, 101))
    raw_support = center + scale * support_vectors
    document = {
        "format": "rbfgate-bundle/1",
        "name": "large",
        "version": version,
        "created": "2026-01-01T00:00:00Z",
        "creator": "benchmark",
        "features": [
            {"name": f"f{index:02d}", "unit": None, "description": "synthetic benchmark feature",
             "allowed": [float(center[index] - 8 * scale[index]), float(center[index] + 8 * scale[index])],
             "training": {"min": float(raw_support[:, index].min()), "max": float(raw_support[:, index].max()),
                          "mean": float(center[index]), "std": float(scale[index])}}
            for index in range(features)
        ],
        "scaler": {"kind": "standard", "center": center.tolist(), "scale": scale.tolist()},
        "kernel": {"kind": "rbf", "gamma": gamma, "sigma": 1.0 / math.sqrt(2.0 * gamma)},
        "classifier": {"estimator": "SVC", "classes": [0, 1], "support_per_class": [half, n_support - half],
                       "intercepts": [intercept], "break_ties": False, "decision_function_shape": "ovr"},
        "calibration": {"method": "none"},
        "training": {"notes": ["synthetic arrays written by tests/benchmarks/large_bundle.py, not a fit"]},
        "reference_distance": {"space": "scaled", "rows": 200},
        "golden": {"inputs": golden_raw.tolist(), "labels": [int(value > 0) for value in decisions],
                   "decisions": decisions.tolist(), "pairwise_decisions": None, "probabilities": None},
    }
    arrays = {"support_vectors.npy": support_vectors, "dual_coef.npy": dual_coef, "reference_quantiles.npy": quantiles}
    return write_bundle(out, document, arrays)


def _direct_decision(scaled: np.ndarray, support: np.ndarray, coef: np.ndarray, gamma: float,
                     intercept: float) -> np.ndarray:
    out = np.empty(len(scaled))
    for row, x in enumerate(scaled):
        squared = ((support - x) ** 2).sum(axis=1)
        out[row] = np.exp(-gamma * squared) @ coef + intercept
    return out


def _direct_nearest(rows: np.ndarray, support: np.ndarray) -> np.ndarray:
    return np.array([np.sqrt(((support - x) ** 2).sum(axis=1).min()) for x in rows])
