"""Reference values for the service tests, computed by scikit-learn and numpy only.

- labels, decision values and probabilities: scikit-learn's ``predict``,
  ``decision_function`` (the SVC inside the pipeline) and ``predict_proba``;
- nearest support vector: ``sklearn.metrics.pairwise_distances_argmin_min`` between
  the scaled rows and ``SVC.support_vectors_`` (Euclidean distance);
- similarity: the RBF kernel exp(-gamma * d^2) (textbook definition, also
  scikit-learn's ``rbf_kernel``), with the fitted ``SVC._gamma``.
"""

from __future__ import annotations

import numpy as np
from sklearn.calibration import CalibratedClassifierCV
from sklearn.metrics import pairwise_distances_argmin_min
from sklearn.metrics.pairwise import rbf_kernel
from sklearn.pipeline import Pipeline

from model_store import GOLDEN_TOLERANCE

__all__ = ["assert_close", "sklearn_reference"]


def _svc_and_scaled(model, X: np.ndarray):
    inner = model.calibrated_classifiers_[0].estimator if isinstance(model, CalibratedClassifierCV) else model
    if isinstance(inner, Pipeline):
        scaled = inner[:-1].transform(X)
        return inner, inner[-1], scaled
    return inner, inner, X


def sklearn_reference(model, X: np.ndarray) -> dict[str, np.ndarray | None]:
    """What scikit-learn says about rows ``X`` (n, f): labels, decision, probabilities, nearest support."""
    uncalibrated, svc, scaled = _svc_and_scaled(model, X)
    nearest_index, nearest_distance = pairwise_distances_argmin_min(scaled, svc.support_vectors_)
    support_class = np.repeat(np.arange(len(svc.classes_)), svc.n_support_)
    similarity = rbf_kernel(scaled, svc.support_vectors_, gamma=svc._gamma)[np.arange(len(X)), nearest_index]
    return {
        "labels": model.predict(X),
        "decision": uncalibrated.decision_function(X),
        "probabilities": model.predict_proba(X) if isinstance(model, CalibratedClassifierCV) else None,
        "nearest_index": nearest_index,
        "nearest_distance": nearest_distance,
        # model.classes_, not svc.classes_: a temperature calibrator fits its SVC on encoded labels.
        "nearest_label": np.asarray(model.classes_)[support_class[nearest_index]],
        "nearest_similarity": similarity,
    }


def assert_close(ours, reference, what: str, tolerance: float = GOLDEN_TOLERANCE) -> None:
    """|ours - reference| <= tolerance * max(1, |reference|) elementwise (the bundle's golden tolerance)."""
    ours = np.asarray(ours, dtype=np.float64)
    reference = np.asarray(reference, dtype=np.float64)
    assert ours.shape == reference.shape, f"{what}: shape {ours.shape}, reference {reference.shape}"
    excess = np.abs(ours - reference) - tolerance * np.maximum(1.0, np.abs(reference))
    worst = np.unravel_index(np.argmax(excess), excess.shape)
    assert excess[worst] <= 0, f"{what}: at {worst} ours {ours[worst]!r}, reference {reference[worst]!r}"
