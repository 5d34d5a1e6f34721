"""libsvm's one-vs-one arithmetic: the pairwise coefficient layout, the vote and scikit-learn's
ovr-shaped decision, for a batch (numpy) and for one row (Python floats).

With k classes there is one pair (i, j) per i < j, p = k(k-1)/2 in all, in that order. libsvm's
decision of pair (i, j) is the kernel expansion over the support vectors of classes i and j with
the coefficients ``pairwise_coefficients`` lays out, plus the pair's intercept; scikit-learn's
multiclass ``decision_function`` (``decision_function_shape="ovr"``) turns the p pairwise values
into k per-class values with ``sklearn.utils.multiclass._ovr_decision_function``, and libsvm's
label is the class with most votes. The one-row functions make the same IEEE 754 operations in the
same order as the batch ones (tests/bundle/test_single_row.py compares them bit for bit, and
tests/bundle/test_sklearn_reference.py the batch ones with scikit-learn's).
"""

from __future__ import annotations

import functools

import numpy as np

__all__ = ["libsvm_vote", "libsvm_vote_one", "ovr_decision", "ovr_decision_one", "pairwise_coefficients"]


def pairwise_coefficients(dual_coef: np.ndarray, boundaries: np.ndarray, pairs) -> np.ndarray:
    """(n_sv, n_pairs): column (i, j) holds dual_coef_[j - 1] on class i's support
    vectors and dual_coef_[i] on class j's, zero elsewhere (libsvm's one-vs-one layout)."""
    coef = np.zeros((dual_coef.shape[1], len(pairs)))
    for column, (i, j) in enumerate(pairs):
        rows_i = slice(boundaries[i], boundaries[i + 1])
        rows_j = slice(boundaries[j], boundaries[j + 1])
        coef[rows_i, column] = dual_coef[j - 1, rows_i]
        coef[rows_j, column] = dual_coef[i, rows_j]
    return coef


def libsvm_vote(pairwise: np.ndarray, pairs, n_classes: int) -> np.ndarray:
    """(n,) libsvm's label index from (n, k(k-1)/2) pairwise decisions: pair (i, j) votes i when > 0."""
    wins = pairwise > 0
    _, _, first, second = _pair_layout(tuple(pairs), n_classes)
    votes = wins @ first + (~wins) @ second  # counts, exact in float64 (BLAS products)
    return np.argmax(votes, axis=1)  # first maximum: libsvm gives ties to the lowest index


def ovr_decision(pairwise: np.ndarray, pairs, n_classes: int) -> np.ndarray:
    """scikit-learn's ``_ovr_decision_function(dec < 0, -dec, n_classes)``, same operation order.

    scikit-learn loops over the pairs (i, j) in order, adding pair k's value to class i's sum and
    subtracting it from class j's. Every pair (i, c) with i < c comes before every pair (c, j), so
    class c first receives all its subtractions in pair order, then all its additions in pair order:
    ``np.subtract.at`` then ``np.add.at`` (each applied index by index, in order) make the same
    operations on each sum without a loop of numpy calls per pair (digits, 10 classes: 0.75 ms of
    a 10-row batch's 0.9 ms, before). Votes are counts, the same in any order.
    """
    first_index, second_index, first, second = _pair_layout(tuple(pairs), n_classes)
    confidence = np.zeros((n_classes, len(pairwise)))
    by_pair = pairwise.T
    np.subtract.at(confidence, second_index, by_pair)
    np.add.at(confidence, first_index, by_pair)
    wins = pairwise >= 0
    votes = wins @ first + (~wins) @ second  # counts, exact in float64
    confidence = confidence.T
    return votes + confidence / (3 * (np.abs(confidence) + 1))


@functools.lru_cache(maxsize=64)
def _pair_layout(pairs: tuple[tuple[int, int], ...], n_classes: int
                 ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Each pair's first and second class (p,) and the (p, k) float one-hot matrices marking them,
    p = k(k-1)/2; built once per class count (read-only, shared by every scorer)."""
    first_index = np.array([i for i, _ in pairs], dtype=np.intp)
    second_index = np.array([j for _, j in pairs], dtype=np.intp)
    first = np.zeros((len(pairs), n_classes))
    second = np.zeros((len(pairs), n_classes))
    first[np.arange(len(pairs)), first_index] = 1.0
    second[np.arange(len(pairs)), second_index] = 1.0
    for array in (first_index, second_index, first, second):
        array.setflags(write=False)
    return first_index, second_index, first, second


# One row's vote and ovr-shaped decision in Python floats: the same IEEE operations, per class in
# the same pair order, as the functions above, whose numpy calls cost more than one row's
# arithmetic (digits, 10 classes and 45 pairs, one BLAS thread: a single row took 878 us with a
# numpy loop per pair, 89 us with these).


def libsvm_vote_one(pairwise: list[float], pairs, n_classes: int) -> int:
    """``libsvm_vote`` of one row, its pairwise decisions as floats."""
    votes = [0] * n_classes
    for (i, j), value in zip(pairs, pairwise):
        if value > 0:
            votes[i] += 1
        else:
            votes[j] += 1
    return votes.index(max(votes))  # the first maximum, as np.argmax


def ovr_decision_one(pairwise: list[float], pairs, n_classes: int) -> list[float]:
    """``ovr_decision`` of one row, its pairwise decisions as floats."""
    votes = [0.0] * n_classes
    confidence = [0.0] * n_classes
    for (i, j), value in zip(pairs, pairwise):
        confidence[i] += value
        confidence[j] -= value
        if value >= 0:
            votes[i] += 1
        else:
            votes[j] += 1
    return [vote + total / (3 * (abs(total) + 1)) for vote, total in zip(votes, confidence)]
