"""Decision values to probabilities, as scikit-learn's CalibratedClassifierCV does it.

Reproduces ``sklearn.calibration._CalibratedClassifier.predict_proba`` for a
single calibrated classifier (``ensemble=False``) with numpy only:

- sigmoid (Platt scaling): ``p = 1 / (1 + exp(a * f + b))`` per column;
- isotonic: linear interpolation through the fitted thresholds, clipped to
  the first and last threshold;
- temperature: ``softmax(beta * logits)``, where a binary decision ``f``
  becomes the two logits ``(-f, f)``.

For sigmoid and isotonic, calibration input column c feeds class c's map
(scikit-learn's pairing, even for one-vs-one columns). With more than two classes, the per-class values
are normalised to sum to one (uniform where every class got zero), exactly as
scikit-learn does; in every method values in (1, 1 + 1e-5] are set to 1.
"""

from __future__ import annotations

import numpy as np

from model_store.manifest import Calibration

__all__ = ["Calibrator"]


class Calibrator:
    """Maps calibration inputs of shape (n,) binary or (n, k) to probabilities (n, n_classes)."""

    def __init__(self, spec: Calibration, n_classes: int) -> None:
        self.method = spec.method
        self.n_classes = n_classes
        self._sigmoid = [(p.a, p.b) for p in spec.sigmoid or []]
        self._isotonic = [
            (np.asarray(p.x_thresholds, dtype=np.float64), np.asarray(p.y_thresholds, dtype=np.float64))
            for p in spec.isotonic or []
        ]
        self._beta = spec.beta

    def probabilities(self, decision: np.ndarray) -> np.ndarray:
        """``decision``: (n,) for binary, (n, columns) otherwise -> probabilities (n, n_classes)."""
        if self.method == "temperature":
            proba = self._temperature(decision)
        else:
            proba = self._per_column(decision)
        proba[(1.0 < proba) & (proba <= 1.0 + 1e-5)] = 1.0
        return proba

    def _per_column(self, decision: np.ndarray) -> np.ndarray:
        columns = decision[:, np.newaxis] if decision.ndim == 1 else decision  # reshape(n, -1) fails for n = 0
        n_rows = columns.shape[0]
        proba = np.zeros((n_rows, self.n_classes))
        binary = self.n_classes == 2
        # scikit-learn zips columns with its calibrators (one per class): with
        # decision_function_shape='ovo' and 4+ classes it calibrates only the first
        # n_classes pairwise columns, and so do we.
        for column in range(min(columns.shape[1], len(self._sigmoid) + len(self._isotonic))):
            target = column + 1 if binary else column
            proba[:, target] = self._map_column(column, columns[:, column])
        if binary:
            proba[:, 0] = 1.0 - proba[:, 1]
            return proba
        denominator = np.sum(proba, axis=1)[:, np.newaxis]
        uniform = np.full_like(proba, 1 / self.n_classes)
        return np.divide(proba, denominator, out=uniform, where=denominator != 0)

    def _map_column(self, column: int, values: np.ndarray) -> np.ndarray:
        if self.method == "sigmoid":
            a, b = self._sigmoid[column]
            return _expit(-(a * values + b))
        x_thresholds, y_thresholds = self._isotonic[column]
        if len(y_thresholds) == 1:
            return np.repeat(y_thresholds, len(values))
        clipped = np.clip(values, x_thresholds[0], x_thresholds[-1])
        return np.interp(clipped, x_thresholds, y_thresholds)

    def _temperature(self, decision: np.ndarray) -> np.ndarray:
        if decision.ndim == 1:
            logits = np.stack([-decision, decision], axis=1)
        else:
            logits = decision
        scaled = self._beta * logits
        scaled -= scaled.max(axis=1, keepdims=True)
        np.exp(scaled, out=scaled)
        scaled /= scaled.sum(axis=1, keepdims=True)
        return scaled


def _expit(values: np.ndarray) -> np.ndarray:
    # 1 / (1 + exp(-x)); exp overflowing to inf correctly gives 0.
    with np.errstate(over="ignore"):
        return 1.0 / (1.0 + np.exp(-values))
