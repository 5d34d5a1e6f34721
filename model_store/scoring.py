"""The numpy scorer: scikit-learn's RBF SVC/NuSVC decision, labels and probabilities.

For a row ``x`` (raw units) the scorer computes, in order:

1. ``z = (x - center) / scale``                      the bundle's per-feature affine scaler;
2. ``d2_j = |z|^2 + |s_j|^2 - 2 z.s_j``, clamped at 0  one BLAS product per chunk of rows;
3. ``K_j = exp(-gamma d2_j)``                          the RBF kernel;
4. ``P = K @ A + b``                                   one column per pair of classes (i < j),
   where ``A`` rearranges scikit-learn's ``dual_coef_`` into libsvm's one-vs-one layout;
5. labels by libsvm's vote (pair (i, j) votes i when its decision is > 0, ties go to the
   lowest class index), the binary decision as ``P[:, 0]``, the multiclass decision as
   scikit-learn's ovr-shaped ``votes + sum / (3 (|sum| + 1))``;
6. probabilities through the bundle's calibration.

Rows are processed in chunks so that the kernel block (rows x support vectors
float64) stays under ``KERNEL_BLOCK_BYTES`` (4 MiB, cache-sized) whatever the
batch size; bundles with more than 8,192 support vectors are also split into
tiles of support vectors, so that a chunk keeps ``MIN_CHUNK_ROWS`` rows and the
support matrix is not re-read for every few rows. Nearest support vectors,
distances, percentiles and range checks came out bit-identical for batch
sizes 1, 7, 100 and 10,000 (tests/bundle checks it). Decisions and
probabilities may differ in the last bits, because OpenBLAS picks its
matrix-product kernel by matrix size and the kernels sum in different orders:
measured up to 3e-14 relative on the scikit-learn datasets, bounded in general
by the rounding of a sum, about 1e-12 x max(1, |value|, total coefficient mass).
A label could only change for a decision that close to a tie. The scorer never
refuses a row; it reports the range check and the nearest support vector so that
callers (CLI, service) can apply their refusal policy.
"""

from __future__ import annotations

from contextlib import nullcontext
from dataclasses import dataclass

import numpy as np

from model_store.calibration import Calibrator

__all__ = ["KERNEL_BLOCK_BYTES", "MIN_CHUNK_ROWS", "Scorer", "Scores"]

# Small enough that the kernel block stays in the CPU cache between the passes over it
# (exponent, argmax, clamp, exp, product); at least two rows per chunk, see score().
KERNEL_BLOCK_BYTES = 4 << 20
# Larger bundles are scored in tiles of support vectors so that a chunk still holds this many
# rows: each tile of the support matrix is then read once per MIN_CHUNK_ROWS rows, not once per
# handful of rows (a 100,000 x 50 bundle would otherwise stream 40 MB for every 5 rows).
MIN_CHUNK_ROWS = 64
# Tiles never get smaller than this, whatever block_bytes says: a tiny test block then still
# scores small bundles in one tile, as before tiles existed.
_MIN_TILE = 1024
_TRANSPOSE_BLOCK = 4096


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
        block_bytes: int = KERNEL_BLOCK_BYTES,
    ) -> None:
        self.classes = np.asarray(classes, dtype=object if isinstance(classes[0], str) else np.int64)
        self.n_classes = len(classes)
        self.pairs = [(i, j) for i in range(self.n_classes) for j in range(i + 1, self.n_classes)]
        self.center = np.ascontiguousarray(center, dtype=np.float64)
        self.scale = np.ascontiguousarray(scale, dtype=np.float64)
        self.gamma = float(gamma)
        self.support_vectors = np.ascontiguousarray(support_vectors, dtype=np.float64)
        # -gamma d2 = [z, -gamma |z|^2, 1] . [2 gamma s, 1, -gamma |s|^2]: one matrix product
        # yields the kernel's exponent, with no extra passes over the block.
        # Filled in place, a block of support vectors at a time so the transposition stays in
        # cache: column_stack plus a transposed copy took 0.2-0.6 s for a 100,000 x 50 bundle,
        # this 0.04 s (tests/benchmarks), with the same numbers.
        support_sq = np.einsum("ij,ij->i", self.support_vectors, self.support_vectors)
        n_features = self.support_vectors.shape[1]
        self._support_augmented_t = np.empty((n_features + 2, len(support_sq)))
        for start in range(0, len(support_sq), _TRANSPOSE_BLOCK):
            stop = start + _TRANSPOSE_BLOCK
            np.multiply(self.support_vectors[start:stop].T, 2.0 * self.gamma,
                        out=self._support_augmented_t[:n_features, start:stop])
        self._support_augmented_t[n_features] = 1.0
        self._support_augmented_t[n_features + 1] = -self.gamma * support_sq
        boundaries = np.concatenate([[0], np.cumsum(support_per_class)])
        self.support_class = np.repeat(np.arange(self.n_classes), support_per_class)
        self._pair_coef = _pairwise_coefficients(np.asarray(dual_coef, np.float64), boundaries, self.pairs)
        self.intercepts = np.asarray(intercepts, dtype=np.float64)
        self.allowed_low = np.asarray(allowed_low, dtype=np.float64)
        self.allowed_high = np.asarray(allowed_high, dtype=np.float64)
        self.reference_quantiles = np.asarray(reference_quantiles, dtype=np.float64)
        self.calibrator = calibrator
        self.break_ties = break_ties
        self.calibrate_pairwise = calibrate_pairwise
        n_support = max(1, len(self.support_vectors))
        self.support_per_tile = min(n_support, max(_MIN_TILE, block_bytes // (8 * MIN_CHUNK_ROWS)))
        self.rows_per_chunk = max(2, block_bytes // (8 * self.support_per_tile))

    @property
    def n_features(self) -> int:
        return len(self.center)

    @property
    def resident_bytes(self) -> int:
        """Bytes of the arrays this scorer holds (about 2 x support vectors x features x 8 bytes):
        what keeping it loaded costs, used to bound caches of loaded versions."""
        return sum(value.nbytes for value in vars(self).values() if isinstance(value, np.ndarray))

    def score(self, raw: np.ndarray) -> Scores:
        """Score ``raw`` (n, f) float64, finite, in manifest feature order and raw units."""
        if raw.shape[0] == 1:
            # numpy sends a one-row product to BLAS gemv, whose sums round differently from
            # gemm's; scoring the row twice keeps single rows on the same path as batches.
            return _first_row(self.score(raw[[0, 0]]))
        n_rows = raw.shape[0]
        n_pairs = len(self.pairs)
        pairwise = np.empty((n_rows, n_pairs))
        nearest_index = np.empty(n_rows, dtype=np.int64)
        with np.errstate(over="ignore", invalid="ignore"):
            scaled = (raw - self.center) / self.scale
            augmented = np.empty((n_rows, self.n_features + 2))
            augmented[:, :-2] = scaled
            augmented[:, -2] = -self.gamma * np.einsum("ij,ij->i", scaled, scaled)
        augmented[:, -1] = 1.0
        far = ~np.isfinite(augmented[:, -2])
        any_far = bool(far.any())
        if any_far:
            # |z|^2 overflowed: the row is infinitely far from every support vector, its kernel
            # is 0 and its decision the intercept (as libsvm computes it). Make its exponent
            # exactly -inf instead of the inf - inf = NaN the expanded form would give.
            augmented[far, :-2] = 0.0
            augmented[far, -2] = -np.inf
        block = np.empty((min(n_rows, self.rows_per_chunk), self.support_per_tile))
        # With a far row, BLAS may multiply its -inf by the zero padding of its kernels and raise
        # the invalid flag; the results are exact (-inf), so silence that one case.
        with np.errstate(invalid="ignore") if any_far else nullcontext():
            for start in range(0, n_rows, self.rows_per_chunk):
                stop = min(start + self.rows_per_chunk, n_rows)
                self._score_chunk(
                    augmented[start:stop], block[: stop - start], pairwise[start:stop], nearest_index[start:stop]
                )
        return self._finish(raw, scaled, pairwise, nearest_index, any_far)

    def _score_chunk(self, augmented, block, pairwise_out, nearest_out) -> None:
        n_support = self._support_augmented_t.shape[1]
        if block.shape[1] >= n_support:  # every support vector in one tile: most bundles
            np.matmul(augmented, self._support_augmented_t, out=block)  # -gamma d2
            np.argmax(block, axis=1, out=nearest_out)
            _kernel_in_place(block, block[np.arange(len(block)), nearest_out])
            np.matmul(block, self._pair_coef, out=pairwise_out)
        else:
            self._score_tiles(augmented, block, pairwise_out, nearest_out)
        pairwise_out += self.intercepts

    def _score_tiles(self, augmented, block, pairwise_out, nearest_out) -> None:
        """One tile of support vectors at a time; the nearest one and the sums carried across tiles."""
        n_rows, tile = block.shape
        rows = np.arange(n_rows)
        best = np.full(n_rows, -np.inf)
        nearest_out[:] = 0  # what one argmax returns for a row whose exponents are all -inf
        pairwise_out[:] = 0.0
        flat = block.reshape(-1)
        for start in range(0, self._support_augmented_t.shape[1], tile):
            stop = min(start + tile, self._support_augmented_t.shape[1])
            part = flat[: n_rows * (stop - start)].reshape(n_rows, stop - start)
            np.matmul(augmented, self._support_augmented_t[:, start:stop], out=part)
            local = np.argmax(part, axis=1)
            value = part[rows, local]
            closer = value > best  # strict: a tie keeps the earlier support vector, as one argmax would
            nearest_out[closer] = local[closer] + start
            best[closer] = value[closer]
            _kernel_in_place(part, value)
            pairwise_out += part @ self._pair_coef[start:stop]

    def _finish(self, raw, scaled, pairwise, nearest_index, any_far: bool) -> Scores:
        binary = self.n_classes == 2
        if binary:
            decision = pairwise[:, 0].copy()
            # libsvm's decision is -decision here; it votes class 0 when its value is > 0.
            label_index = (decision >= 0).astype(np.int64)
            calibration_input = decision
        else:
            decision = _ovr_decision(pairwise, self.pairs, self.n_classes)
            if self.break_ties:
                label_index = np.argmax(decision, axis=1)
            else:
                label_index = _libsvm_vote(pairwise, self.pairs, self.n_classes)
            calibration_input = pairwise if self.calibrate_pairwise else decision
        probabilities = None
        if self.calibrator is not None:
            probabilities = self.calibrator.probabilities(calibration_input)
            # A calibrated scikit-learn model predicts the most probable class.
            label_index = np.argmax(probabilities, axis=1)
        # The BLAS form loses precision near a support vector; recompute the winner exactly.
        with np.errstate(over="ignore", invalid="ignore") if any_far else nullcontext():
            difference = scaled - self.support_vectors[nearest_index]
            nearest_distance = np.sqrt(np.einsum("ij,ij->i", difference, difference))
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
            nearest_percentile=distance_percentile(nearest_distance, self.reference_quantiles),
            range_excess=range_excess(raw, self.allowed_low, self.allowed_high),
        )


def _kernel_in_place(exponent: np.ndarray, row_max: np.ndarray) -> None:
    """exp(min(exponent, 0)) in place; ``row_max`` (rows,) is each row's largest exponent."""
    # d2 >= 0, but rounding can make it slightly negative: clamp, skipping the pass over the
    # block when no exponent is positive (the common case; the result is the same).
    if (row_max > 0).any():
        np.minimum(exponent, 0.0, out=exponent)
    np.exp(exponent, out=exponent)


def _first_row(scores: Scores) -> Scores:
    return Scores(**{name: None if value is None else value[:1] for name, value in vars(scores).items()})


def range_excess(raw: np.ndarray, low: np.ndarray, high: np.ndarray) -> np.ndarray:
    """(n, f) signed amount outside [low, high]: 0 inside, value - high above, value - low below."""
    above = np.maximum(raw - high, 0.0)
    below = np.minimum(raw - low, 0.0)
    return above + below


def distance_percentile(distance: np.ndarray, quantiles: np.ndarray) -> np.ndarray:
    """Percentile (0-100) of each distance, interpolated in evenly spaced reference quantiles.

    Ties in the quantiles (many reference rows at distance 0, say) resolve to
    the highest quantile that does not exceed the distance.
    """
    steps = len(quantiles) - 1
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


def _pairwise_coefficients(dual_coef: np.ndarray, boundaries: np.ndarray, pairs) -> np.ndarray:
    """(n_sv, n_pairs): column (i, j) holds dual_coef_[j - 1] on class i's support
    vectors and dual_coef_[i] on class j's, zero elsewhere (libsvm's one-vs-one layout)."""
    coef = np.zeros((dual_coef.shape[1], len(pairs)))
    for column, (i, j) in enumerate(pairs):
        rows_i = slice(boundaries[i], boundaries[i + 1])
        rows_j = slice(boundaries[j], boundaries[j + 1])
        coef[rows_i, column] = dual_coef[j - 1, rows_i]
        coef[rows_j, column] = dual_coef[i, rows_j]
    return coef


def _libsvm_vote(pairwise: np.ndarray, pairs, n_classes: int) -> np.ndarray:
    votes = np.zeros((len(pairwise), n_classes), dtype=np.int64)
    for column, (i, j) in enumerate(pairs):
        wins_i = pairwise[:, column] > 0
        votes[:, i] += wins_i
        votes[:, j] += ~wins_i
    return np.argmax(votes, axis=1)  # first maximum: libsvm gives ties to the lowest index


def _ovr_decision(pairwise: np.ndarray, pairs, n_classes: int) -> np.ndarray:
    """scikit-learn's ``_ovr_decision_function(dec < 0, -dec, n_classes)``, same operation order."""
    votes = np.zeros((len(pairwise), n_classes))
    confidence = np.zeros((len(pairwise), n_classes))
    for column, (i, j) in enumerate(pairs):
        value = pairwise[:, column]
        confidence[:, i] += value
        confidence[:, j] -= value
        wins_i = value >= 0
        votes[wins_i, i] += 1
        votes[~wins_i, j] += 1
    return votes + confidence / (3 * (np.abs(confidence) + 1))
