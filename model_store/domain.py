"""The applicability domain: a one-class SVM over the reference rows, and its three verdicts.

The domain model is scikit-learn's ``OneClassSVM`` (Schölkopf, Platt, Shawe-Taylor, Smola and
Williamson, "Estimating the support of a high-dimensional distribution", Neural Computation 13(7),
2001) fitted at export on the reference rows in the classifier's scaled space, whitened by the
bundle's map ``W`` (``model_store.domain_fit``; bundles exported before it have none, ``W`` = I).
Its score is the one-class decision, exactly scikit-learn's ``decision_function`` of ``w = z W``::

    score(z) = sum_j alpha_j exp(-gamma |z W - s_j|^2) + intercept

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

from contextlib import nullcontext

import numpy as np

from model_store.kernel import KERNEL_BLOCK_BYTES, KernelExpansion

__all__ = ["OUTSIDE", "TYPICAL", "UNUSUAL", "VERDICTS", "DomainModel"]

TYPICAL, UNUSUAL, OUTSIDE = "typical", "unusual", "outside"
VERDICTS = (TYPICAL, UNUSUAL, OUTSIDE)
# searchsorted over (outside_below, unusual_below) gives 0 below the first, 1 between, 2 above.
_BY_POSITION = np.asarray((OUTSIDE, UNUSUAL, TYPICAL), dtype=object)


class DomainModel:
    """support_vectors (n_sv, f) in the model's space, alpha (n_sv,) scikit-learn's ``dual_coef_[0]``,
    whitening (f, f) the map from scaled rows to that space, or None for the scaled space itself."""

    def __init__(self, *, support_vectors: np.ndarray, alpha: np.ndarray, intercept: float, gamma: float,
                 unusual_below: float, outside_below: float, whitening: np.ndarray | None = None,
                 block_bytes: int = KERNEL_BLOCK_BYTES) -> None:
        self.kernel = KernelExpansion(support_vectors, np.asarray(alpha, np.float64).reshape(-1, 1), gamma, block_bytes)
        self.whitening = None if whitening is None else np.ascontiguousarray(whitening, dtype=np.float64)
        # |z W|^2 <= |z|^2 |W|_F^2 (Cauchy-Schwarz, each partial sum of the product too): a Python
        # float product then says whether any row can overflow, and the common case pays for no
        # np.errstate and no finiteness pass (microseconds felt on one record).
        self._whitening_sq = 0.0 if whitening is None else float(np.square(self.whitening).sum())
        self.intercept = float(intercept)
        self.unusual_below = float(unusual_below)
        self.outside_below = float(outside_below)
        self._thresholds = np.array([self.outside_below, self.unusual_below])

    @property
    def gamma(self) -> float:
        return self.kernel.gamma

    def decision(self, scaled: np.ndarray, scaled_sq: np.ndarray) -> np.ndarray:
        """(n,) one-class decision of ``scaled`` (n, f) rows with squared norms ``scaled_sq`` (n,)."""
        if self.whitening is not None:
            scaled, scaled_sq = self._whitened(scaled, scaled_sq)
        sums, _ = self.kernel.evaluate(scaled, scaled_sq, nearest=False)
        return sums[:, 0] + self.intercept

    def decision_row(self, scaled_row: np.ndarray, scaled_sq: float) -> float:
        """``decision`` of one row ``scaled_row`` (f,) with squared norm ``scaled_sq``, as a float."""
        if self.whitening is not None:
            if not scaled_sq * self._whitening_sq < 1e300:  # the product may overflow: the batch way
                return float(self.decision(scaled_row[None, :], np.array([scaled_sq]))[0])
            scaled_row = np.dot(scaled_row, self.whitening)  # vector products: no einsum for one row
            scaled_sq = float(np.dot(scaled_row, scaled_row))
        sums, _ = self.kernel.evaluate_row(scaled_row, scaled_sq, nearest=False)
        return float(sums[0]) + self.intercept

    def verdict(self, score: float) -> str:
        """The verdict of one score: two float comparisons (NaN is outside, as in ``verdicts``)."""
        return TYPICAL if score >= self.unusual_below else UNUSUAL if score >= self.outside_below else OUTSIDE

    def _whitened(self, scaled: np.ndarray, scaled_sq: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(w (n, f), |w|^2 (n,)) for ``w = scaled W``; a row whose product overflows is infinitely far."""
        bounded = len(scaled_sq) == 0 or float(scaled_sq.max()) * self._whitening_sq < 1e300
        with nullcontext() if bounded else np.errstate(over="ignore", invalid="ignore"):
            whitened = scaled @ self.whitening
            whitened_sq = np.einsum("ij,ij->i", whitened, whitened)
        if not bounded:
            far = ~np.isfinite(whitened_sq)
            # inf - inf in the product gives NaN; the kernel code scores a row of squared norm inf
            # as infinitely far (all kernels 0), which is what an overflowing row is.
            whitened[far] = 0.0
            whitened_sq[far] = np.inf
        return whitened, whitened_sq

    def verdicts(self, score: np.ndarray) -> np.ndarray:
        """(n,) object array of ``typical`` / ``unusual`` / ``outside`` for (n,) scores."""
        # side="right": a score equal to a threshold is on its upper side (score >= threshold).
        position = np.searchsorted(self._thresholds, score, side="right")
        # searchsorted puts NaN above everything; like the comparisons of ``verdict``, call it
        # outside. The kernel never returns NaN for finite rows; this keeps the two one rule regardless.
        position[np.isnan(score)] = 0
        return _BY_POSITION[position]
