"""Classification metrics recorded in a bundle's training metadata.

Computed with scikit-learn's metric functions on the model's own outputs.
The multi-class Brier score is the original definition (Brier 1950): the
mean over rows of the summed squared difference between the predicted
probabilities and the one-hot true class. A calibrated model also records
its reliability curves (scikit-learn's ``calibration_curve``, one class
against the rest; for two classes only the second, as scikit-learn's
``predict_proba[:, 1]``), with the number of rows in each probability bin.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from sklearn.calibration import calibration_curve
from sklearn.metrics import accuracy_score, balanced_accuracy_score, confusion_matrix, f1_score, log_loss, roc_auc_score

__all__ = ["RELIABILITY_BINS", "classification_metrics"]

RELIABILITY_BINS = 10  # uniform bins of predicted probability, as calibration_curve's default


def classification_metrics(parts, raw: np.ndarray, truth: list) -> dict[str, Any]:
    """Metrics of ``parts.estimator`` on rows ``raw`` (n, f) with true labels ``truth``."""
    classes = list(parts.classes)
    truth_array = np.asarray(truth)
    predicted = np.asarray(parts.estimator.predict(raw))
    metrics: dict[str, Any] = {
        "rows": int(len(truth)),
        "accuracy": float(accuracy_score(truth_array, predicted)),
        "balanced_accuracy": float(balanced_accuracy_score(truth_array, predicted)),
        "macro_f1": float(f1_score(truth_array, predicted, average="macro", labels=classes, zero_division=0)),
        "confusion_matrix": {
            "labels": classes,
            "rows_are": "true class",
            "counts": confusion_matrix(truth_array, predicted, labels=classes).tolist(),
        },
    }
    decision, _ = parts.decisions(raw)
    present = set(truth_array.tolist())
    if len(classes) == 2 and present == set(classes):
        metrics["roc_auc"] = float(roc_auc_score(truth_array == classes[1], decision))
    if parts.calibration["method"] != "none":
        probabilities = parts.estimator.predict_proba(raw)
        metrics["log_loss"] = float(log_loss(truth_array, probabilities, labels=classes))
        one_hot = (truth_array[:, None] == np.asarray(classes)[None, :]).astype(float)
        metrics["brier_score"] = float(np.mean(np.sum((probabilities - one_hot) ** 2, axis=1)))
        metrics["reliability"] = _reliability(truth_array, probabilities, classes)
    return metrics


def _reliability(truth: np.ndarray, probabilities: np.ndarray, classes: list) -> dict[str, Any]:
    """Per class: mean predicted probability, observed frequency and row count of each non-empty bin."""
    edges = np.linspace(0.0, 1.0, RELIABILITY_BINS + 1)
    curves = []
    for index in range(1 if len(classes) == 2 else 0, len(classes)):
        predicted, positive = probabilities[:, index], truth == classes[index]
        if positive.all() or not positive.any():
            continue  # calibration_curve needs both outcomes among the rows
        observed, mean_predicted = calibration_curve(positive, predicted, n_bins=RELIABILITY_BINS, strategy="uniform")
        # The same bins as calibration_curve (searchsorted on the inner edges), for the counts.
        counts = np.bincount(np.searchsorted(edges[1:-1], predicted), minlength=RELIABILITY_BINS)
        curves.append({
            "class": classes[index],
            "mean_predicted": mean_predicted.astype(float).tolist(),
            "observed": observed.astype(float).tolist(),
            "rows": counts[counts > 0].astype(int).tolist(),
        })
    return {"bins": RELIABILITY_BINS, "strategy": "uniform", "one_vs_rest": True, "curves": curves}
