"""Scores do not depend on how rows are batched, chunked or ordered.

What is bitwise and what is not (measured with numpy 2.x on OpenBLAS 0.3, 2 cores):
OpenBLAS picks its dgemm code path by matrix size (small-matrix kernels, different
blocking; numpy would even use gemv for a single row), so the same row multiplied inside
a 1-row, 7-row or 10,000-row block can differ in the last bits. Measured on iris, wine and breast cancer:
decisions, one-vs-one decisions and probabilities differ by at most ~2.5e-14 relative
between batch sizes. Therefore:

- labels, label indices, nearest-support index and label, nearest distance and similarity
  (recomputed exactly per row from the chosen support vector), percentiles and the range
  check are bitwise identical for any batch size;
- decisions and probabilities agree within BATCH_TOLERANCE = 1e-12 x max(1, |value|),
  40x the largest difference seen and 1000x inside GOLDEN_TOLERANCE (1e-9).

A label could only differ for a row whose decision is within ~1e-14 of a tie; no such row
occurs here (common practice: ties at that level are measure-zero events).
"""

from __future__ import annotations

import numpy as np
import pytest

from model_store.kernel import MAX_CHUNK_ROWS
from model_store.scoring import KERNEL_BLOCK_BYTES

from .reference import assert_close

BATCH_TOLERANCE = 1e-12
EXACT = ("labels", "label_index", "nearest_index", "nearest_label", "nearest_distance",
         "nearest_similarity", "nearest_percentile", "range_excess")
CLOSE = ("decision", "pairwise_decision", "probabilities")


def _rows(X: np.ndarray, count: int, seed: int) -> np.ndarray:
    """``count`` rows drawn uniformly in a box 10% wider than the data."""
    rng = np.random.default_rng(seed)
    low, high = X.min(axis=0), X.max(axis=0)
    span = high - low
    return rng.uniform(low - 0.1 * span, high + 0.1 * span, size=(count, X.shape[1]))


def _concatenate(parts, field):
    values = [getattr(part, field) for part in parts]
    return None if values[0] is None else np.concatenate(values)


def assert_same_scores(ours, reference, what: str) -> None:
    for field in EXACT:
        got, want = getattr(ours, field), getattr(reference, field)
        assert np.array_equal(got, want), f"{what}: {field} differs"
    for field in CLOSE:
        got, want = getattr(ours, field), getattr(reference, field)
        if want is None:
            assert got is None, f"{what}: {field}"
        else:
            assert_close(got, want, f"{what}: {field}", tolerance=BATCH_TOLERANCE)


class _Concatenated:
    def __init__(self, parts):
        for field in EXACT + CLOSE:
            setattr(self, field, _concatenate(parts, field))


@pytest.mark.parametrize("fixture", ["cancer_standard", "wine_sigmoid"])
def test_batch_sizes_1_7_and_10000_give_the_same_results(fixture, request):
    bundle, _, X = request.getfixturevalue(fixture)
    rows = _rows(X, 10_000, seed=1)
    whole = bundle.score(rows)
    for size in (1, 7):
        parts = [bundle.score(rows[start:start + size]) for start in range(0, len(rows), size)]
        assert_same_scores(_Concatenated(parts), whole, f"batch size {size}")


def test_tiny_chunks_give_the_same_results_as_one_chunk(wine_sigmoid, monkeypatch):
    bundle, _, X = wine_sigmoid
    rows = _rows(X, 1_000, seed=2)
    scorer = bundle.scorer.kernel  # the classifier's kernel expansion
    assert scorer.rows_per_chunk >= len(rows)  # one chunk by default at this size
    whole = bundle.score(rows)
    chunk_sizes = []
    original = scorer._score_chunk

    def spy(rows_of_chunk, *outputs):
        chunk_sizes.append(len(rows_of_chunk))
        original(rows_of_chunk, *outputs)

    monkeypatch.setattr(scorer, "_score_chunk", spy)
    monkeypatch.setattr(scorer, "rows_per_chunk", 3)
    chunked = bundle.score(rows)
    assert max(chunk_sizes) == 3 and len(chunk_sizes) == 334  # 333 chunks of 3 and one of 1
    assert_same_scores(chunked, whole, "chunks of 3 rows")


def test_kernel_block_stays_within_the_bound(cancer_standard, wine_sigmoid, iris_raw):
    # README, Exactness, and model_store/scoring.py: the kernel block (rows x support vectors,
    # float64) stays under KERNEL_BLOCK_BYTES (512 KiB to 4 MiB, by the core's L2 cache) whatever
    # the batch size, holding as many rows as fit, up to MAX_CHUNK_ROWS (1,024).
    assert 512 * 1024 <= KERNEL_BLOCK_BYTES <= 4 * 1024 * 1024 and MAX_CHUNK_ROWS == 1024
    for bundle, _, _ in (cancer_standard, wine_sigmoid, iris_raw):
        scorer = bundle.scorer.kernel
        block_bytes = scorer.rows_per_chunk * len(scorer.support_vectors) * 8
        assert block_bytes <= KERNEL_BLOCK_BYTES
        as_many_as_fit = block_bytes + len(scorer.support_vectors) * 8 > KERNEL_BLOCK_BYTES
        assert as_many_as_fit or scorer.rows_per_chunk == MAX_CHUNK_ROWS


def test_row_order_does_not_change_any_row(wine_sigmoid):
    bundle, _, X = wine_sigmoid
    rows = _rows(X, 2_000, seed=3)
    order = np.random.default_rng(4).permutation(len(rows))
    forward, shuffled = bundle.score(rows), bundle.score(rows[order])
    for field in EXACT + CLOSE:
        value = getattr(forward, field)
        if value is not None:
            expected = value[order]
            got = getattr(shuffled, field)
            if field in EXACT:
                assert np.array_equal(got, expected), field
            else:
                assert_close(got, expected, field, tolerance=BATCH_TOLERANCE)


def test_empty_batch_gives_empty_results(wine_sigmoid):
    # The scorer never refuses, not even zero rows.
    bundle, _, X = wine_sigmoid
    scores = bundle.score(np.empty((0, X.shape[1])))
    assert scores.labels.shape == (0,)
    assert scores.decision.shape == (0, 3)
    assert scores.probabilities.shape == (0, 3)
    assert scores.range_excess.shape == (0, X.shape[1])


def test_threads_scoring_at_once_get_the_results_of_one_thread(wine_sigmoid):
    # The kernel reuses one work buffer per thread (model_store.kernel.workspace); the service scores
    # on several threads at once, and BLAS releases the GIL, so a shared buffer would mix rows.
    from concurrent.futures import ThreadPoolExecutor

    bundle, _, X = wine_sigmoid
    scorer = bundle.scorer.kernel
    batches = [_rows(X, 3 * scorer.rows_per_chunk + 5, seed=20 + index) for index in range(4)]
    alone = [bundle.score(batch) for batch in batches]
    with ThreadPoolExecutor(max_workers=4) as pool:
        for _ in range(5):
            together = list(pool.map(bundle.score, batches))
            for index, (got, want) in enumerate(zip(together, alone)):
                assert_same_scores(got, want, f"batch {index} scored beside others")
