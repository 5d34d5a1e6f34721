"""The one RBF kernel expansion behind every score: the classifier's decision and the domain model's.

For rows ``z`` (scaled space) an expansion computes

    sums[r, c] = sum_j coef[j, c] exp(-gamma |z_r - s_j|^2)      (n, m)
    nearest[r] = argmin_j |z_r - s_j|                             (n,)

with one BLAS product per chunk of rows: ``-gamma d2 = [z, -gamma |z|^2, 1] . [2 gamma s, 1, -gamma |s|^2]``
(the augmented form, so the exponent needs no extra passes over the block), clamped at 0 (rounding
can make ``d2`` slightly negative), exponentiated in place, then multiplied by ``coef``. The
classifier's ``coef`` has one column per pair of classes (libsvm's one-vs-one layout), the one-class
SVM's a single column (its ``dual_coef_``); both use this code, so they cannot drift apart.

Chunks keep the kernel block (rows x support vectors float64) under ``block_bytes`` and at most
``MAX_CHUNK_ROWS`` rows; expansions with
more than ``block_bytes / (8 MIN_CHUNK_ROWS)`` support vectors are split into tiles of support
vectors, so a chunk keeps ``MIN_CHUNK_ROWS`` rows and the support matrix is not re-read for every
few rows. The nearest support vector is the first one at the largest exponent, across tiles too.

A single row is one matrix-vector product over the augmented support matrix (``evaluate_row``):
gemv streams the matrix once, where a gemm of two rows packs it first (measured 2.6 to 6 times
slower for 10,000 to 50,000 support vectors). gemv sums each exponent in another order than gemm,
so its largest exponent is trusted as the nearest support vector only when it beats every other by
more than four times the rounding bound of one sum (each of gemv's and gemm's values is within that
bound of the exact one); that is then the one gemm picks too, for any batch. Otherwise (a near tie, or a far row) the row goes the batch way.
"""

from __future__ import annotations

import math
import threading
from contextlib import nullcontext

import numpy as np

from model_store.cpu_cache import data_cache_bytes

__all__ = ["KERNEL_BLOCK_BYTES", "MAX_CHUNK_ROWS", "MIN_CHUNK_ROWS", "KernelExpansion", "block_bytes_for", "workspace"]


def block_bytes_for(l2_bytes: int | None) -> int:
    """The kernel block's size for a core with ``l2_bytes`` of L2 cache: a quarter of it, within
    512 KiB and 4 MiB; 1 MiB when the size is unknown.

    The block is passed over up to five times (exponent, argmax, clamp when an exponent is positive,
    exp, product), so it should stay in the core's own cache beside the operands it meets there
    (common practice in blocked kernels; we did not read cache-miss counters).
    Measured on an Intel Xeon with 2 MB of L2 per core (2026-12-03, 10,000 rows, one BLAS thread,
    tests/benchmarks models), 512 KiB against the 4 MiB used before: 989 x 10 25.5 -> 20.1 ms,
    9,793 x 10 217 -> 174 ms, 49,966 x 10 1,037 -> 767 ms, 953 x 50 41.5 -> 38.4 ms, 9,792 x 50
    331 -> 309 ms, 49,925 x 50 1,737 -> 1,622 ms; 256 KiB was slower again (more chunks, each a
    dozen numpy calls). The bounds keep at least 64 rows per chunk of the classifier's tiles and
    the block no larger than the size measured before on an AMD EPYC.
    """
    if not l2_bytes:
        return 1 << 20
    return min(4 << 20, max(512 << 10, l2_bytes // 4))


# This machine's block, decided once at import (every scorer of the process shares it).
KERNEL_BLOCK_BYTES = block_bytes_for(data_cache_bytes(2))
# Larger expansions are evaluated in tiles of support vectors so that a chunk still holds this many
# rows: each tile of the support matrix is then read once per MIN_CHUNK_ROWS rows, not once per
# handful of rows (a 100,000 x 50 bundle would otherwise stream 40 MB for every 5 rows).
MIN_CHUNK_ROWS = 64
# And no chunk holds more rows than this: a narrow expansion (a domain model of ~120 support vectors)
# would otherwise take 4,000+ rows per chunk, whose (rows, f + 2) operand no longer fits the core's
# cache beside the block; measured twice as slow at 50 features (1,000 x 50: 9.1 ms per 10,000 rows
# with 4,443-row chunks, 4.8 ms with 1,024; tests/benchmarks models, one BLAS thread).
MAX_CHUNK_ROWS = 1024
# Tiles never get smaller than this, whatever block_bytes says: a tiny test block then still
# scores small bundles in one tile, as before tiles existed.
_MIN_TILE = 1024
_TRANSPOSE_BLOCK = 4096
# Unit roundoff of float64 (IEEE 754 binary64, round to nearest): 2^-53.
_UNIT_ROUNDOFF = 2.0**-53


class KernelExpansion:
    """Immutable kernel state built once from a bundle's arrays.

    support_vectors:  (n_sv, f) scaled space
    coef:             (n_sv, m) one column per output
    gamma:            kernel coefficient, exp(-gamma d^2)
    """

    def __init__(self, support_vectors: np.ndarray, coef: np.ndarray, gamma: float,
                 block_bytes: int = KERNEL_BLOCK_BYTES) -> None:
        self.gamma = float(gamma)
        self.support_vectors = np.ascontiguousarray(support_vectors, dtype=np.float64)
        self.coef = np.ascontiguousarray(coef, dtype=np.float64)
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
        # Rounding bound of one exponent (a dot product of n_features + 2 terms whose absolute values
        # sum to at most gamma (|z| + max |s|)^2): gamma_K = K u / (1 - K u), K the length (Higham,
        # "Accuracy and Stability of Numerical Algorithms", 2nd ed., section 3.1), for any summation
        # order, FMA or not. Doubled for the rounding of the terms themselves.
        terms = n_features + 2
        self._dot_error_per_unit = 2.0 * self.gamma * terms * _UNIT_ROUNDOFF / (1.0 - terms * _UNIT_ROUNDOFF)
        self._largest_support_norm = math.sqrt(float(support_sq.max())) if len(support_sq) else 0.0
        n_support = max(1, len(self.support_vectors))
        self.support_per_tile = min(n_support, max(_MIN_TILE, block_bytes // (8 * MIN_CHUNK_ROWS)))
        self.rows_per_chunk = max(2, min(MAX_CHUNK_ROWS, block_bytes // (8 * self.support_per_tile)))

    @property
    def n_outputs(self) -> int:
        return self.coef.shape[1]

    def evaluate(self, scaled: np.ndarray, scaled_sq: np.ndarray, *, nearest: bool = True
                 ) -> tuple[np.ndarray, np.ndarray | None]:
        """(sums (n, m), nearest (n,) int) for ``scaled`` (n, f) rows whose squared norms are ``scaled_sq`` (n,).

        ``nearest=False`` skips the nearest support vector (None is returned for it), which the
        domain model does not report: one reduction instead of an argmax and a gather per chunk.

        A row whose ``-gamma |z|^2`` overflows is infinitely far from every support vector: its
        kernel is 0, so its sums are exactly 0 (libsvm's answer) and its nearest index is 0.
        """
        n_rows = len(scaled)
        if n_rows == 1:
            sums, index = self.evaluate_row(scaled[0], float(scaled_sq[0]), nearest=nearest)
            return sums.reshape(1, -1), None if index is None else np.array([index], dtype=np.int64)
        n_features = scaled.shape[1]
        # Python floats overflow to inf without a warning: one check decides whether any row is far,
        # so the common case pays for no np.errstate (a few microseconds per call, felt on one row).
        any_far = not math.isfinite(float(scaled_sq.max()) * self.gamma) if n_rows else False
        sums = np.empty((n_rows, self.n_outputs))
        want_nearest = nearest
        nearest_index = np.empty(n_rows, dtype=np.int64)
        chunk_rows = max(1, min(n_rows, self.rows_per_chunk))
        block, operand = workspace(chunk_rows, self.support_per_tile, n_features + 2)
        sums_only = not want_nearest and block.shape[1] >= self._support_augmented_t.shape[1]
        # With a far row, BLAS may multiply its -inf by the zero padding of its kernels and raise
        # the invalid flag; the results are exact (-inf), so silence that one case.
        with np.errstate(invalid="ignore") if any_far else nullcontext():
            for start in range(0, n_rows, chunk_rows):
                stop = min(start + chunk_rows, n_rows)
                augmented = operand[: stop - start]
                self._augment(scaled[start:stop], scaled_sq[start:stop], augmented, any_far)
                if sums_only:  # the domain model: sums only, no argmax and gather per chunk
                    self._sum_chunk(augmented, block[: stop - start], sums[start:stop])
                else:
                    self._score_chunk(augmented, block[: stop - start], sums[start:stop], nearest_index[start:stop])
        return sums, nearest_index if want_nearest else None

    def _augment(self, scaled, scaled_sq, out, any_far: bool) -> None:
        """Fill ``out`` (rows, f + 2) with ``[z, -gamma |z|^2, 1]`` for ``scaled`` (rows, f) rows."""
        out[:, :-2] = scaled
        out[:, -1] = 1.0
        if not any_far:
            np.multiply(scaled_sq, -self.gamma, out=out[:, -2])
            return
        with np.errstate(over="ignore", invalid="ignore"):
            np.multiply(scaled_sq, -self.gamma, out=out[:, -2])
        far = ~np.isfinite(out[:, -2])
        # Make the exponent exactly -inf instead of the inf - inf = NaN the expanded form would give.
        out[far, :-2] = 0.0
        out[far, -2] = -np.inf

    def evaluate_row(self, scaled_row: np.ndarray, scaled_sq: float, *, nearest: bool = True
                     ) -> tuple[np.ndarray, int | None]:
        """(sums (m,), nearest index or None) of one row ``scaled_row`` (f,) with squared norm ``scaled_sq``:
        ``evaluate`` of that row alone, by one gemv when it can decide, else the batch arithmetic."""
        if self._support_augmented_t.shape[1]:
            one = self._evaluate_row(scaled_row, scaled_sq, nearest)
            if one is not None:
                return one
        # A near tie, a far row or no support vectors: scored as two equal rows, the batch arithmetic.
        sums, index = self.evaluate(np.stack((scaled_row, scaled_row)), np.array([scaled_sq, scaled_sq]),
                                    nearest=nearest)
        return sums[0], None if index is None else int(index[0])

    def _evaluate_row(self, scaled_row: np.ndarray, scaled_sq: float, nearest: bool
                      ) -> tuple[np.ndarray, int | None] | None:
        """``evaluate_row`` by one gemv; None when the batch path must decide.

        None for a far row (its exponent overflows) and, when ``nearest``, for a row whose largest
        exponent is not clear of the others by four rounding bounds (gemm could order them otherwise).
        """
        row_exponent = scaled_sq * -self.gamma  # the batch's np.multiply(scaled_sq, -gamma), same bits
        if not math.isfinite(row_exponent):
            return None
        augmented = np.concatenate((scaled_row, (row_exponent, 1.0)))
        exponent = augmented @ self._support_augmented_t  # -gamma d2, (n_sv,): the matrix read once
        index = None
        if nearest:
            index = int(exponent.argmax())
            top = float(exponent[index])
            reach = math.sqrt(scaled_sq) + self._largest_support_norm
            bound = self._dot_error_per_unit * reach * reach  # a Python float ** 2 raises on overflow; * gives inf
            # Either sum is within bound of the exact one: a lead over 4 bounds is a lead in gemm too.
            # The runner-up is the largest exponent once the top one is set aside (a max, not a
            # compare and count: one pass without a temporary).
            exponent[index] = -np.inf
            if float(exponent.max()) >= top - 4.0 * bound:
                return None
            # The exact exponent is <= 0, so top <= bound, and every other one is below top - 4
            # bounds < 0: only the top one can need the clamp (one store, not a pass over n_sv).
            exponent[index] = min(top, 0.0)
        else:  # no largest exponent at hand: one clamp is cheaper than finding it (the same values)
            np.minimum(exponent, 0.0, out=exponent)
        np.exp(exponent, out=exponent)
        return exponent @ self.coef, index

    def _sum_chunk(self, augmented, block, sums_out) -> None:
        np.matmul(augmented, self._support_augmented_t, out=block)  # -gamma d2
        _kernel_in_place(block, block.max(axis=1))
        np.matmul(block, self.coef, out=sums_out)

    def _score_chunk(self, augmented, block, sums_out, nearest_out) -> None:
        n_support = self._support_augmented_t.shape[1]
        if block.shape[1] >= n_support:  # every support vector in one tile: most bundles
            np.matmul(augmented, self._support_augmented_t, out=block)  # -gamma d2
            np.argmax(block, axis=1, out=nearest_out)
            _kernel_in_place(block, block[np.arange(len(block)), nearest_out])
            np.matmul(block, self.coef, out=sums_out)
        else:
            self._score_tiles(augmented, block, sums_out, nearest_out)

    def _score_tiles(self, augmented, block, sums_out, nearest_out) -> None:
        """One tile of support vectors at a time; the nearest one and the sums carried across tiles."""
        n_rows, tile = block.shape
        rows = np.arange(n_rows)
        best = np.full(n_rows, -np.inf)
        nearest_out[:] = 0  # what one argmax returns for a row whose exponents are all -inf
        sums_out[:] = 0.0
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
            sums_out += part @ self.coef[start:stop]


_THREAD_WORKSPACE = threading.local()


def workspace(rows: int, columns: int, width: int) -> tuple[np.ndarray, np.ndarray]:
    """This thread's kernel block (rows, columns) and row operand (rows, width), reused across calls.

    A fresh block per call cost page faults whenever glibc had given the memory back (measured with
    the 4 MiB block of the time: 10,000 rows x 953 x 50 scored in 54 ms with fresh arrays, 46 ms
    without the faults).
    Per thread, so concurrent scoring threads never share one; each holds at most one block of
    KERNEL_BLOCK_BYTES (more only for an expansion built with a larger ``block_bytes``) and one row
    operand of MAX_CHUNK_ROWS x (f + 2) floats for the widest bundle it scored. The scorer also
    reuses the block for nearest distances once the kernel is done with it.
    """
    held = _THREAD_WORKSPACE.__dict__
    block, operand = held.get("block"), held.get("operand")
    if block is None or block.size < rows * columns:
        block = held["block"] = np.empty(rows * columns)
    if operand is None or operand.size < rows * width:
        operand = held["operand"] = np.empty(rows * width)
    return block[: rows * columns].reshape(rows, columns), operand[: rows * width].reshape(rows, width)


def _kernel_in_place(exponent: np.ndarray, row_max: np.ndarray) -> None:
    """exp(min(exponent, 0)) in place; ``row_max`` (rows,) is each row's largest exponent."""
    # d2 >= 0, but rounding can make it slightly negative: clamp, skipping the pass over the
    # block when no exponent is positive (the common case; the result is the same).
    if (row_max > 0).any():
        np.minimum(exponent, 0.0, out=exponent)
    np.exp(exponent, out=exponent)
