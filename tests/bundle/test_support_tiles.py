"""Bundles with many support vectors are scored in tiles of support vectors; tiles change nothing.

The scorer splits the support vectors into tiles once a bundle has more than
KERNEL_BLOCK_BYTES / (8 x MIN_CHUNK_ROWS) of them (1,024 at 512 KiB, 8,192 at 4 MiB). The test
bundles are far smaller, so these tests shrink the tile to a few support
vectors and compare with one tile and with scikit-learn (the reference):

- the nearest support vector is the first one at the smallest distance, as one
  argmax over all of them gives (tiles are compared strictly, so a tie keeps the
  earlier tile), hence nearest index, distance, label and percentile are bitwise equal;
- decisions become sums of per-tile sums, a different summation order: they agree
  with one tile within 1e-12 x max(1, |value|) (the batch-size tolerance of
  test_batch_sizes) and with scikit-learn within GOLDEN_TOLERANCE.
"""

from __future__ import annotations

import numpy as np
import pytest
from model_store.scoring import KERNEL_BLOCK_BYTES, MIN_CHUNK_ROWS

from .reference import assert_close, probe_rows, sklearn_decisions

BATCH_TOLERANCE = 1e-12
EXACT = ("labels", "label_index", "nearest_index", "nearest_label", "nearest_distance", "nearest_percentile")


def _tiled(monkeypatch, scorer, tile: int) -> None:
    monkeypatch.setattr(scorer.kernel, "support_per_tile", tile)
    monkeypatch.setattr(scorer.kernel, "rows_per_chunk", 5)


def test_small_bundles_use_one_tile(cancer_standard, wine_sigmoid):
    for bundle, _, _ in (cancer_standard, wine_sigmoid):
        scorer = bundle.scorer.kernel
        assert len(scorer.support_vectors) <= KERNEL_BLOCK_BYTES // (8 * MIN_CHUNK_ROWS)
        assert scorer.support_per_tile == len(scorer.support_vectors)


@pytest.mark.parametrize("fixture", ["cancer_standard", "wine_sigmoid"])
def test_tiles_of_seven_support_vectors_give_the_same_scores(fixture, request, monkeypatch):
    bundle, model, X = request.getfixturevalue(fixture)
    rows = probe_rows(X, seed=5)
    whole = bundle.score(rows)
    _tiled(monkeypatch, bundle.scorer, 7)
    tiled = bundle.score(rows)
    for field in EXACT:
        assert np.array_equal(getattr(tiled, field), getattr(whole, field)), field
    assert_close(tiled.decision, whole.decision, "decision, tiles vs one tile", tolerance=BATCH_TOLERANCE)
    if whole.probabilities is not None:
        assert_close(tiled.probabilities, whole.probabilities, "probabilities", tolerance=BATCH_TOLERANCE)
    decision, _ = sklearn_decisions(model, rows)  # scikit-learn's decision_function: the reference
    assert_close(tiled.decision, decision, "decision, tiles vs scikit-learn")


def test_a_tie_between_tiles_keeps_the_earlier_support_vector(cancer_standard, monkeypatch):
    # A row placed exactly on a support vector that also appears in a later tile: an argmax over
    # all support vectors returns the first occurrence, and so must the tiles.
    bundle, _, _ = cancer_standard
    scorer = bundle.scorer
    first = 3
    duplicate = scorer.support_vectors.copy()
    duplicate[20] = duplicate[first]  # same point in tile 0 (index 3) and tile 2 (index 20) of size 8
    monkeypatch.setattr(scorer.kernel, "support_vectors", duplicate)
    augmented = scorer.kernel._support_augmented_t.copy()
    augmented[:, 20] = augmented[:, first]
    monkeypatch.setattr(scorer.kernel, "_support_augmented_t", augmented)
    raw = scorer.center + scorer.scale * duplicate[first]
    whole = scorer.score(np.vstack([raw, raw]))
    _tiled(monkeypatch, scorer, 8)
    tiled = scorer.score(np.vstack([raw, raw]))
    assert whole.nearest_index.tolist() == [first, first]
    assert tiled.nearest_index.tolist() == [first, first]


def test_more_than_1024_support_vectors_at_the_smallest_block_give_the_same_scores(tmp_path, monkeypatch):
    # The smallest kernel block the machine rule gives (512 KiB, model_store.kernel.block_bytes_for)
    # tiles every bundle of more than 1,024 support vectors: a real one here, not a shrunken tile.
    # digits, all ten classes (E. Alpaydin, C. Kaynak, UCI; scikit-learn's load_digits): with
    # C = 1e-3 nearly every row is a support vector. Reference: one tile (a block large enough for
    # all of them) and scikit-learn's decision_function.
    from sklearn.datasets import load_digits
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import StandardScaler
    from sklearn.svm import SVC

    from conftest import export_model
    from model_store.kernel import KernelExpansion

    X, y = load_digits(return_X_y=True)
    model = make_pipeline(StandardScaler(), SVC(C=1e-3)).fit(X, y)
    bundle = export_model(model, X, tmp_path / "bundle", y=y, name="digits-all")
    kernel = bundle.scorer.kernel
    assert len(kernel.support_vectors) > 1024
    smallest = KernelExpansion(kernel.support_vectors, kernel.coef, kernel.gamma, 512 << 10)
    one_tile = KernelExpansion(kernel.support_vectors, kernel.coef, kernel.gamma, 64 << 20)
    assert (smallest.support_per_tile, smallest.rows_per_chunk) == (1024, 64)
    assert one_tile.support_per_tile == len(kernel.support_vectors)
    rows = np.vstack([X, probe_rows(X, seed=11)])
    monkeypatch.setattr(bundle.scorer, "kernel", one_tile)
    whole = bundle.score(rows)
    monkeypatch.setattr(bundle.scorer, "kernel", smallest)
    for size in (7, 100, len(rows)):
        parts = [bundle.score(rows[start:start + size]) for start in range(0, len(rows), size)]
        for field in EXACT:
            got = np.concatenate([getattr(part, field) for part in parts])
            assert np.array_equal(got, getattr(whole, field)), (size, field)
        decision = np.concatenate([part.decision for part in parts])
        assert_close(decision, whole.decision, f"decision, batches of {size}", tolerance=BATCH_TOLERANCE)
    decision, _ = sklearn_decisions(model, rows)
    assert_close(np.concatenate([part.decision for part in parts]), decision, "decision, tiles vs scikit-learn")
