"""The numpy scorer: scikit-learn's RBF SVC/NuSVC decision, labels and probabilities.

For a row ``x`` (raw units) the scorer computes, in order:

1. ``z = (x - center) / scale``                      the bundle's per-feature affine scaler;
2. ``d2_j = |z|^2 + |s_j|^2 - 2 z.s_j``, clamped at 0  one BLAS product per chunk of rows;
3. ``K_j = exp(-gamma d2_j)``                          the RBF kernel;
4. ``P = K @ A + b``                                   one column per pair of classes (i < j),
   where ``A`` rearranges scikit-learn's ``dual_coef_`` into libsvm's one-vs-one layout;
5. labels by libsvm's vote (pair (i, j) votes i when its decision is > 0, ties go to the
   lowest class index), the binary decision as ``P[:, 0]``, the multiclass decision as
   scikit-learn's ovr-shaped ``votes + sum / (3 (|sum| + 1))`` (``model_store.one_vs_one``);
6. probabilities through the bundle's calibration;
7. when the bundle has a domain model, its one-class decision and verdict
   (``model_store.domain``), through the same kernel code (``model_store.kernel``).

Rows are processed in chunks so that the kernel block (rows x support vectors
float64) stays under ``KERNEL_BLOCK_BYTES`` (a quarter of the core's L2 cache, 512 KiB to
4 MiB, ``model_store.kernel.block_bytes_for``) and at most ``MAX_CHUNK_ROWS`` (1,024) rows
whatever the batch size; a single row is one matrix-vector product (``model_store.kernel``);
bundles with more than ``KERNEL_BLOCK_BYTES / (8 MIN_CHUNK_ROWS)`` support vectors (1,024 to
8,192) are also split into tiles of support vectors, so that a chunk keeps ``MIN_CHUNK_ROWS``
rows and the support matrix is not re-read for every few rows. Nearest support vectors,
distances, percentiles and range checks came out bit-identical for batch
sizes 1, 7, 100 and 10,000 (tests/bundle checks it). Decisions and
probabilities may differ in the last bits, because OpenBLAS picks its
matrix-product kernel by matrix size and the kernels sum in different orders:
measured up to 3e-14 relative on the scikit-learn datasets, bounded in general
by the rounding of a sum, about 1e-12 x max(1, |value|, total coefficient mass).
A label could only change for a decision that close to a tie. The scorer never
refuses a row; it reports the range check, the nearest support vector and the
domain verdict so that callers (CLI, service) can apply their refusal policy.
"""

from __future__ import annotations

import bisect
import math
from contextlib import nullcontext
from dataclasses import dataclass

import numpy as np

from model_store.calibration import Calibrator
from model_store.domain import DomainModel
from model_store.kernel import KERNEL_BLOCK_BYTES, MAX_CHUNK_ROWS, MIN_CHUNK_ROWS, KernelExpansion, workspace as _workspace
from model_store.one_vs_one import libsvm_vote, libsvm_vote_one, ovr_decision, ovr_decision_one, pairwise_coefficients

__all__ = ["KERNEL_BLOCK_BYTES", "MIN_CHUNK_ROWS", "Scorer", "Scores"]


@dataclass(frozen=True)
class Scores:
    """Scores of n rows against a bundle with k classes and f features.

    labels:              (n,) class labels (the manifest's type: int or str)
    label_index:         (n,) int, index of the label in the manifest's classes
    decision:            (n,) float binary, (n, k) float multiclass (scikit-learn's ovr shape)
    pairwise_decision:   (n, k(k-1)/2) libsvm one-vs-one decisions, None when binary
    probabilities:       (n, k) float, None when the bundle is not calibrated
    nearest_distance:    (n,) Euclidean distance to the nearest support vector, scaled space
    nearest_similarity:  (n,) exp(-gamma * nearest_distance^2), in (0, 1]
    nearest_index:       (n,) int, row of that support vector in the bundle
    nearest_label:       (n,) class label of that support vector
    nearest_percentile:  (n,) percentile (0-100) of the distance among the reference rows
    range_excess:        (n, f) raw units outside the allowed range: 0 inside,
                         value - high above it, value - low (negative) below it
    domain_score:        (n,) the one-class SVM decision (larger is more typical), None when the
                         bundle has no domain model (bundles of format rbfgate-bundle/1)
    domain_verdict:      (n,) "typical" / "unusual" / "outside", None without a domain model
    """

    labels: np.ndarray
    label_index: np.ndarray
    decision: np.ndarray
    pairwise_decision: np.ndarray | None
    probabilities: np.ndarray | None
    nearest_distance: np.ndarray
    nearest_similarity: np.ndarray
    nearest_index: np.ndarray
    nearest_label: np.ndarray
    nearest_percentile: np.ndarray
    range_excess: np.ndarray
    domain_score: np.ndarray | None = None
    domain_verdict: np.ndarray | None = None

    @property
    def out_of_range(self) -> np.ndarray:
        """(n, f) bool, True where a feature lies outside its allowed range."""
        return self.range_excess != 0

    @property
    def in_range(self) -> np.ndarray:
        """(n,) bool, True where every feature lies inside its allowed range."""
        return ~self.out_of_range.any(axis=1)


class Scorer:
    """Immutable scoring state built once from a bundle's arrays.

    center, scale:        (f,) raw -> scaled affine map
    support_vectors:      (n_sv, f) scaled space, grouped by class in class order
    dual_coef:            (k - 1, n_sv) scikit-learn's ``dual_coef_``
    intercepts:           (k(k-1)/2,) scikit-learn's ``intercept_``
    reference_quantiles:  (q,) non-decreasing quantiles of the reference nearest distance
    """

    def __init__(
        self,
        *,
        classes: list,
        center: np.ndarray,
        scale: np.ndarray,
        gamma: float,
        support_vectors: np.ndarray,
        support_per_class: list[int],
        dual_coef: np.ndarray,
        intercepts: np.ndarray,
        allowed_low: np.ndarray,
        allowed_high: np.ndarray,
        reference_quantiles: np.ndarray,
        calibrator: Calibrator | None,
        break_ties: bool = False,
        calibrate_pairwise: bool = False,
        domain: DomainModel | None = None,
        block_bytes: int = KERNEL_BLOCK_BYTES,
    ) -> None:
        self.classes = np.asarray(classes, dtype=object if isinstance(classes[0], str) else np.int64)
        self.n_classes = len(classes)
        self.pairs = [(i, j) for i in range(self.n_classes) for j in range(i + 1, self.n_classes)]
        self.center = np.ascontiguousarray(center, dtype=np.float64)
        self.scale = np.ascontiguousarray(scale, dtype=np.float64)
        boundaries = np.concatenate([[0], np.cumsum(support_per_class)])
        self.support_class = np.repeat(np.arange(self.n_classes), support_per_class)
        pair_coef = pairwise_coefficients(np.asarray(dual_coef, np.float64), boundaries, self.pairs)
        self.kernel = KernelExpansion(support_vectors, pair_coef, gamma, block_bytes)
        self.intercepts = np.asarray(intercepts, dtype=np.float64)
        self.allowed_low = np.asarray(allowed_low, dtype=np.float64)
        self.allowed_high = np.asarray(allowed_high, dtype=np.float64)
        self.reference_quantiles = np.asarray(reference_quantiles, dtype=np.float64)
        self._quantile_list = self.reference_quantiles.tolist()  # for the few-row percentile path
        self.calibrator = calibrator
        self.break_ties = break_ties
        self.calibrate_pairwise = calibrate_pairwise
        self.domain = domain

    @property
    def n_features(self) -> int:
        return len(self.center)

    @property
    def gamma(self) -> float:
        return self.kernel.gamma

    @property
    def support_vectors(self) -> np.ndarray:
        return self.kernel.support_vectors

    @property
    def resident_bytes(self) -> int:
        """Bytes of the arrays this scorer holds, its kernel expansions and domain model included
        (about 2 x support vectors x features x 8 bytes): what keeping it loaded costs, used to
        bound caches of loaded versions."""
        return _array_bytes(self)

    def score(self, raw: np.ndarray) -> Scores:
        """Score ``raw`` (n, f) float64, finite, in manifest feature order and raw units."""
        if len(raw) == 1:
            one = self._score_one(raw)
            if one is not None:
                return one
        with np.errstate(over="ignore", invalid="ignore"):
            # In place, the same two operations: each fresh (n, f) temporary costs page faults once
            # glibc has trimmed its heap (measured: two temporaries of 4 MB took 13x one).
            scaled = np.subtract(raw, self.center)
            np.divide(scaled, self.scale, out=scaled)
            scaled_sq = np.einsum("ij,ij->i", scaled, scaled)
        pairwise, nearest_index = self.kernel.evaluate(scaled, scaled_sq)
        pairwise += self.intercepts
        # A Python float overflows to inf without a warning, so one product decides whether any row is
        # far (as in model_store.kernel); NaN (an overflowed scaled row) is not finite either.
        any_far = len(scaled_sq) > 0 and not math.isfinite(float(scaled_sq.max()) * self.gamma)
        scores = self._finish(raw, scaled, pairwise, nearest_index, any_far)
        if self.domain is None:
            return scores
        domain_score = self.domain.decision(scaled, scaled_sq)
        # Scores is frozen; setting the two fields on the new object avoids copying the rest.
        object.__setattr__(scores, "domain_score", domain_score)
        object.__setattr__(scores, "domain_verdict", self.domain.verdicts(domain_score))
        return scores

    def _score_one(self, raw: np.ndarray) -> Scores | None:
        """``score`` of one row ``raw`` (1, f) with as few numpy calls as the arithmetic allows, or
        None for a far row (the batch path scores it).

        A single record's time was mostly per-call overhead: 67 us for a 989 x 10 bundle whose one
        matrix-vector product takes 3 (tests/benchmarks models, one BLAS thread). Each value comes
        from the operations the batch path applies to that row, in the same order (the exponents
        by one gemv, ``model_store.kernel``), so results agree with a batch as README, Exactness says.
        """
        with np.errstate(over="ignore", invalid="ignore"):
            scaled = np.subtract(raw, self.center)
            np.divide(scaled, self.scale, out=scaled)
            scaled_sq = np.einsum("ij,ij->i", scaled, scaled)
        norm_sq = float(scaled_sq[0])
        if not math.isfinite(norm_sq * self.gamma):
            return None
        row = scaled[0]
        # What needs only the row comes first: the classifier's gemv streams its whole support
        # matrix through the core's cache, and the Python and numpy work after it then runs cold.
        excess = range_excess(raw, self.allowed_low, self.allowed_high)
        domain_score = None if self.domain is None else self.domain.decision_row(row, norm_sq)
        sums, index = self.kernel.evaluate_row(row, norm_sq)
        pairwise = (sums + self.intercepts).reshape(1, -1)
        if self.n_classes == 2:
            decision = pairwise[:, 0]
            label_index = int(decision[0] >= 0)  # libsvm votes class 0 when -decision > 0
            calibration_input, pairwise_decision = decision, None
        else:
            pair_values = pairwise[0].tolist()
            decision = np.array([ovr_decision_one(pair_values, self.pairs, self.n_classes)])
            label_index = (int(np.argmax(decision[0])) if self.break_ties
                           else libsvm_vote_one(pair_values, self.pairs, self.n_classes))
            calibration_input = pairwise if self.calibrate_pairwise else decision
            pairwise_decision = pairwise
        probabilities = None
        if self.calibrator is not None:
            probabilities = self.calibrator.probabilities(calibration_input)
            label_index = int(np.argmax(probabilities[0]))
        difference = np.subtract(scaled, self.kernel.support_vectors[index:index + 1])  # as _distances
        distance = math.sqrt(float(np.einsum("ij,ij->i", difference, difference)[0]))
        nearest_class = int(self.support_class[index])
        scores = Scores(
            labels=self.classes[label_index:label_index + 1].copy(),
            label_index=np.array([label_index], dtype=np.int64),
            decision=decision,
            pairwise_decision=pairwise_decision,
            probabilities=probabilities,
            nearest_distance=np.array([distance]),
            nearest_similarity=np.exp(np.array([-self.gamma * (distance * distance)])),
            nearest_index=np.array([index], dtype=np.int64),
            nearest_label=self.classes[nearest_class:nearest_class + 1].copy(),
            nearest_percentile=np.array([_percentile(distance, self._quantile_list, len(self._quantile_list) - 1)]),
            range_excess=excess,
        )
        if domain_score is not None:
            object.__setattr__(scores, "domain_score", np.array([domain_score]))
            object.__setattr__(scores, "domain_verdict", np.array([self.domain.verdict(domain_score)], dtype=object))
        return scores

    def _finish(self, raw, scaled, pairwise, nearest_index, any_far: bool) -> Scores:
        binary = self.n_classes == 2
        if binary:
            decision = pairwise[:, 0].copy()
            # libsvm's decision is -decision here; it votes class 0 when its value is > 0.
            label_index = (decision >= 0).astype(np.int64)
            calibration_input = decision
        else:
            decision = ovr_decision(pairwise, self.pairs, self.n_classes)
            if self.break_ties:
                label_index = np.argmax(decision, axis=1)
            else:
                label_index = libsvm_vote(pairwise, self.pairs, self.n_classes)
            calibration_input = pairwise if self.calibrate_pairwise else decision
        probabilities = None
        if self.calibrator is not None:
            probabilities = self.calibrator.probabilities(calibration_input)
            # A calibrated scikit-learn model predicts the most probable class.
            label_index = np.argmax(probabilities, axis=1)
        # The BLAS form loses precision near a support vector; recompute the winner exactly.
        with np.errstate(over="ignore", invalid="ignore") if any_far else nullcontext():
            nearest_distance = _distances(scaled, self.kernel.support_vectors, nearest_index)
        return Scores(
            labels=self.classes[label_index],
            label_index=label_index,
            decision=decision,
            pairwise_decision=None if binary else pairwise,
            probabilities=probabilities,
            nearest_distance=nearest_distance,
            nearest_similarity=np.exp(-self.gamma * nearest_distance**2),
            nearest_index=nearest_index,
            nearest_label=self.classes[self.support_class[nearest_index]],
            nearest_percentile=distance_percentile(nearest_distance, self.reference_quantiles, self._quantile_list),
            range_excess=range_excess(raw, self.allowed_low, self.allowed_high),
        )


def _distances(scaled: np.ndarray, support_vectors: np.ndarray, index: np.ndarray) -> np.ndarray:
    """(n,) exact Euclidean distance of each row of ``scaled`` (n, f) to ``support_vectors[index]``.

    A chunk of rows at a time through a reused buffer: the (n, f) difference as one fresh array
    cost more in page faults than in arithmetic. Each row's operations are the same whatever the chunk.
    """
    n_rows, n_features = scaled.shape
    distance = np.empty(n_rows)
    chunk = max(1, min(n_rows, MAX_CHUNK_ROWS, KERNEL_BLOCK_BYTES // (8 * max(1, n_features))))  # buffer <= the block
    buffer = _workspace(chunk, n_features, 0)[0]  # the kernel's block: the kernel is done with it here
    for start in range(0, n_rows, chunk):
        stop = min(start + chunk, n_rows)
        difference = buffer[: stop - start]
        np.take(support_vectors, index[start:stop], axis=0, out=difference)
        np.subtract(scaled[start:stop], difference, out=difference)
        np.einsum("ij,ij->i", difference, difference, out=distance[start:stop])
    return np.sqrt(distance, out=distance)


def range_excess(raw: np.ndarray, low: np.ndarray, high: np.ndarray) -> np.ndarray:
    """(n, f) signed amount outside [low, high] (low <= high): 0 inside, value - high above, value - low below."""
    # raw - clip(raw): the same subtraction above and below, raw - raw = +0.0 inside; one temporary
    # instead of four (a 10,000 x 50 batch spent more here than in its percentiles).
    excess = np.maximum(raw, low)  # np.clip's values, without its slower broadcasting path
    np.minimum(excess, high, out=excess)
    return np.subtract(raw, excess, out=excess)


def distance_percentile(distance: np.ndarray, quantiles: np.ndarray, quantile_list: list[float] | None = None
                        ) -> np.ndarray:
    """Percentile (0-100) of each distance, interpolated in evenly spaced reference quantiles.

    Ties in the quantiles (many reference rows at distance 0, say) resolve to
    the highest quantile that does not exceed the distance. ``quantile_list`` is
    ``quantiles.tolist()`` when the caller keeps it (the scorer does, once).
    """
    steps = len(quantiles) - 1
    if len(distance) <= _PYTHON_PERCENTILE_ROWS:
        listed = quantiles.tolist() if quantile_list is None else quantile_list
        return np.array([_percentile(value, listed, steps) for value in distance.tolist()])
    upper = np.searchsorted(quantiles, distance, side="right")
    # upper lies in [0, steps + 1], so one bound of each clip is never reached; np.minimum and
    # np.maximum give the same integers without np.clip's per-call overhead (~10 us per row scored).
    lower = np.maximum(upper - 1, 0)
    upper_clipped = np.minimum(upper, steps)
    span = quantiles[upper_clipped] - quantiles[lower]
    # Divide only where the span is positive (0 elsewhere), so no warning needs silencing.
    fraction = np.divide(distance - quantiles[lower], span, out=np.zeros_like(span), where=span > 0)
    position = np.where(upper == 0, 0.0, np.where(upper > steps, steps, lower + fraction))
    return 100.0 * position / steps


# Up to this many rows the percentile is computed with Python floats: a dozen numpy calls cost
# more than the arithmetic (single records), and the operations are the same
# IEEE 754 ones in the same order, so the results are the same bits.
_PYTHON_PERCENTILE_ROWS = 4


def _percentile(distance: float, quantiles: list[float], steps: int) -> float:
    """``distance_percentile`` for one distance, operation for operation."""
    upper = bisect.bisect_right(quantiles, distance)  # np.searchsorted(side="right") on sorted quantiles
    if upper == 0:
        return 100.0 * 0.0 / steps
    if upper > steps:
        return 100.0 * steps / steps
    lower = upper - 1
    span = quantiles[upper] - quantiles[lower]
    fraction = (distance - quantiles[lower]) / span if span > 0 else 0.0
    return 100.0 * (lower + fraction) / steps


def _array_bytes(holder: object, depth: int = 0) -> int:
    """nbytes of the arrays among ``holder``'s attributes and, two levels down, its parts' attributes."""
    total = 0
    for value in vars(holder).values():
        if isinstance(value, np.ndarray):
            total += value.nbytes
        elif depth < 2 and hasattr(value, "__dict__") and not isinstance(value, type):
            total += _array_bytes(value, depth + 1)
    return total
