"""The applicability domain: a one-class SVM over the reference rows, and its three verdicts.

The domain model is scikit-learn's ``OneClassSVM`` (Schölkopf, Platt, Shawe-Taylor, Smola and
Williamson, "Estimating the support of a high-dimensional distribution", Neural Computation 13(7),
2001) fitted at export on the reference rows in the classifier's scaled space. Its score is the
one-class decision, exactly scikit-learn's ``decision_function``::

    score(z) = sum_j alpha_j exp(-gamma |z - s_j|^2) + intercept

computed by the same kernel code as the classifier (``model_store.kernel``). Larger is more typical;
it is positive inside the estimated support and falls towards ``intercept`` (negative) far from
every reference row. Two thresholds chosen at export on rows scored out of sample, together with
the range margin (``model_store.policy_fit``), turn it into a verdict::

    score >= unusual_below                   typical
    outside_below <= score < unusual_below   unusual  (answered, flagged)
    score < outside_below                    outside  (refused as outside_domain, unless the
                                                       operator chose to only flag it)
"""

from __future__ import annotations

import numpy as np

from model_store.kernel import KERNEL_BLOCK_BYTES, KernelExpansion

__all__ = ["OUTSIDE", "TYPICAL", "UNUSUAL", "VERDICTS", "DomainModel"]

TYPICAL, UNUSUAL, OUTSIDE = "typical", "unusual", "outside"
VERDICTS = (TYPICAL, UNUSUAL, OUTSIDE)
# searchsorted over (outside_below, unusual_below) gives 0 below the first, 1 between, 2 above.
_BY_POSITION = np.asarray((OUTSIDE, UNUSUAL, TYPICAL), dtype=object)


class DomainModel:
    """support_vectors (n_sv, f) scaled space, alpha (n_sv,) scikit-learn's ``dual_coef_[0]``."""

    def __init__(self, *, support_vectors: np.ndarray, alpha: np.ndarray, intercept: float, gamma: float,
                 unusual_below: float, outside_below: float, block_bytes: int = KERNEL_BLOCK_BYTES) -> None:
        self.kernel = KernelExpansion(support_vectors, np.asarray(alpha, np.float64).reshape(-1, 1), gamma, block_bytes)
        self.intercept = float(intercept)
        self.unusual_below = float(unusual_below)
        self.outside_below = float(outside_below)
        self._thresholds = np.array([self.outside_below, self.unusual_below])

    @property
    def gamma(self) -> float:
        return self.kernel.gamma

    def decision(self, scaled: np.ndarray, scaled_sq: np.ndarray) -> np.ndarray:
        """(n,) one-class decision of ``scaled`` (n, f) rows with squared norms ``scaled_sq`` (n,)."""
        sums, _ = self.kernel.evaluate(scaled, scaled_sq, nearest=False)
        return sums[:, 0] + self.intercept

    def verdicts(self, score: np.ndarray) -> np.ndarray:
        """(n,) object array of ``typical`` / ``unusual`` / ``outside`` for (n,) scores."""
        # side="right": a score equal to a threshold is on its upper side (score >= threshold).
        return _BY_POSITION[np.searchsorted(self._thresholds, score, side="right")]
