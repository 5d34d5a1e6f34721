"""Scorer benchmark: scikit-learn's decision_function against ``load_bundle(...).score(X)``.

Both score the same fitted StandardScaler + SVC pipeline on the same rows.
For every model (support vectors x features), batch size and BLAS thread
setting the three callables are timed alternately (sklearn, rbfgate with
one BLAS thread, rbfgate with the default threads) and the medians kept.
scikit-learn's decision_function runs libsvm's single-threaded C loop, so
the BLAS setting does not change it.

Identical results (the claim being timed): for every timed batch, rbfgate's
decisions are within GOLDEN_TOLERANCE x max(1, |scikit-learn|) of
scikit-learn's decision_function, and on a check batch of up to 1,000 rows
the labels equal scikit-learn's predict.
"""

from __future__ import annotations

from contextlib import nullcontext
from dataclasses import asdict, dataclass

import numpy as np

from model_store.bundle import GOLDEN_TOLERANCE, load_bundle

from .machine import MachineLimits, blas_threads
from .models import CachedModel
from .timing import alternate, median_seconds

__all__ = ["ScorerResult", "bench_model"]

_CHECK_ROWS = 1000


@dataclass(frozen=True)
class ScorerResult:
    """One (model, batch size) measurement; seconds are medians per call (wall, unless named cpu).

    operations:     rows x support vectors x features (the multiply-adds of the distances)
    kernel_rate_*:  rows x support vectors / second achieved by rbfgate
    floor_seconds:  rows x support vectors x (2 (f + 2) / dgemm flop rate + 1 / exp rate), one BLAS thread:
                    the time if rbfgate ran at the machine's measured dgemm and exp limits and did nothing else
    support_bytes:  bytes of the (n_sv, f) float64 support-vector matrix
    stream_seconds: the memory-bandwidth floor of a single row: time to read that matrix once, measured in
                    the same run as one BLAS matrix-vector product (support vectors @ ones(f), one thread,
                    median), which reads every value once for two flops,
                    far below the machine's flop rate, so memory decides its time
    """

    n_support: int
    features: int
    rows: int
    operations: int
    sklearn_seconds: float
    rbfgate_1thread_seconds: float
    rbfgate_default_seconds: float
    ratio_1thread: float
    ratio_default: float
    sklearn_cpu_seconds: float
    rbfgate_1thread_cpu_seconds: float
    ratio_cpu_1thread: float
    kernel_rate_1thread: float
    floor_seconds: float
    labels_equal: bool
    max_decision_error: float
    support_bytes: int = 0
    stream_seconds: float = 0.0

    @property
    def identical(self) -> bool:
        return self.labels_equal and self.max_decision_error <= 1.0

    def to_dict(self) -> dict:
        return {**asdict(self), "identical": self.identical}


def bench_model(model: CachedModel, batch_sizes: list[int], limits_1thread: MachineLimits, *, budget: float,
                log=print) -> list[ScorerResult]:
    """Time ``model`` at each batch size; ``budget`` is seconds per callable per batch size."""
    import joblib

    pipeline = joblib.load(model.joblib_path)
    bundle = load_bundle(model.bundle_path)
    rng = np.random.default_rng([7, model.rows, model.features])
    rows = rng.normal(size=(max(batch_sizes + [_CHECK_ROWS]), model.features))
    check = rows[:_CHECK_ROWS]
    labels_equal = np.array_equal(np.asarray(pipeline.predict(check)), bundle.score(check).labels.astype(np.int64))
    stream_seconds = _stream_seconds(bundle.support_vectors, budget)
    results = []
    for size in batch_sizes:
        batch = rows[:size]
        reference = pipeline.decision_function(batch)
        outputs = {}

        def rbfgate(threads, batch=batch):
            outputs[threads] = bundle.score(batch).decision

        sklearn_time, one_time, default_time = alternate(
            [lambda: pipeline.decision_function(batch), lambda: rbfgate(1), lambda: rbfgate(None)],
            budget=budget, least=3, settings=[nullcontext, lambda: blas_threads(1), nullcontext],
        )
        sklearn_seconds, one_seconds, default_seconds = sklearn_time.wall, one_time.wall, default_time.wall
        error = max(_tolerance_used(outputs[1], reference), _tolerance_used(outputs[None], reference))
        pairs = size * model.n_support
        floor = pairs * (2 * (model.features + 2) / (limits_1thread.thin_gflops[str(model.features)] * 1e9)
                         + 1 / limits_1thread.exp_per_second)
        result = ScorerResult(
            n_support=model.n_support,
            features=model.features,
            rows=size,
            operations=pairs * model.features,
            sklearn_seconds=sklearn_seconds,
            rbfgate_1thread_seconds=one_seconds,
            rbfgate_default_seconds=default_seconds,
            ratio_1thread=sklearn_seconds / one_seconds,
            ratio_default=sklearn_seconds / default_seconds,
            sklearn_cpu_seconds=sklearn_time.cpu,
            rbfgate_1thread_cpu_seconds=one_time.cpu,
            ratio_cpu_1thread=sklearn_time.cpu / max(one_time.cpu, 1e-9),
            kernel_rate_1thread=pairs / one_seconds,
            floor_seconds=floor,
            labels_equal=bool(labels_equal),
            max_decision_error=error,
            support_bytes=int(bundle.support_vectors.nbytes),
            stream_seconds=stream_seconds,
        )
        log(f"  {model.n_support:>6} SV x {model.features:>2} features, {size:>6} rows: sklearn "
            f"{_ms(sklearn_seconds)}, rbfgate {_ms(one_seconds)} (1 thread) / {_ms(default_seconds)} (default) "
            f"-> x{result.ratio_1thread:.1f} / x{result.ratio_default:.1f}, identical {result.identical}")
        results.append(result)
    return results


def _stream_seconds(support_vectors: np.ndarray, budget: float) -> float:
    """Median time of one pass over ``support_vectors`` (n_sv, f): a one-thread BLAS matrix-vector product."""
    matrix = np.ascontiguousarray(support_vectors, dtype=np.float64)
    ones, out = np.ones(matrix.shape[1]), np.empty(matrix.shape[0])
    with blas_threads(1):
        return median_seconds(lambda: np.matmul(matrix, ones, out=out), budget=budget, least=5)


def _tolerance_used(got: np.ndarray, reference: np.ndarray) -> float:
    """max |got - reference| / (GOLDEN_TOLERANCE max(1, |reference|)): <= 1 means within tolerance."""
    allowed = GOLDEN_TOLERANCE * np.maximum(1.0, np.abs(reference))
    return float(np.max(np.abs(np.asarray(got) - reference) / allowed))


def _ms(seconds: float) -> str:
    return f"{seconds * 1e3:.3f} ms"
