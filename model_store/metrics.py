"""Classification metrics recorded in a bundle's training metadata.

Computed with scikit-learn's metric functions on the model's own outputs.
The multi-class Brier score is the original definition (Brier 1950): the
mean over rows of the summed squared difference between the predicted
probabilities and the one-hot true class.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from sklearn.metrics import accuracy_score, balanced_accuracy_score, confusion_matrix, f1_score, log_loss, roc_auc_score

__all__ = ["classification_metrics"]


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
    return metrics
