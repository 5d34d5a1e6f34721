"""What this machine can do: BLAS dgemm and numpy exp throughput, measured in the same run.

These are the ceilings against which the scorer's achieved rate is read: per
(row, support vector) pair the scorer does one product term of length f + 2
(2 (f + 2) floating-point operations in dgemm), one exp, and a few cheap
passes over the kernel block. The product and the exp are timed on arrays of the
scorer's own kernel block (``model_store.kernel.KERNEL_BLOCK_BYTES``, sized by the
core's cache), for each feature count of the plan: a larger array would measure
the next cache level, a slower rate than the scorer meets, and the scorer would
seem to beat its floor.
"""

from __future__ import annotations

import os
import platform
from contextlib import contextmanager
from dataclasses import asdict, dataclass

import numpy as np

from .timing import median_seconds

__all__ = ["MachineLimits", "blas_threads", "describe_machine", "measure_limits"]


@dataclass(frozen=True)
class MachineLimits:
    """Measured throughputs at one BLAS thread setting.

    dgemm_gflops:        square 1024 x 1024 x 1024 product, 1e9 flop/s
    thin_gflops:         {features (as text): 1e9 flop/s} for the scorer's shape, (rows x (f + 2)) @
                         ((f + 2) x 1,024 support vectors) into one kernel block
    exp_per_second:      np.exp in place on one kernel block of float64, values per second
    block_bytes:         that kernel block's size
    """

    threads: str
    dgemm_gflops: float
    thin_gflops: dict[str, float]
    exp_per_second: float
    block_bytes: int

    def to_dict(self) -> dict:
        return asdict(self)


@contextmanager
def blas_threads(limit: int | None):
    """Limit BLAS (and OpenMP) threads inside the block; None keeps the default."""
    if limit is None:
        yield
        return
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=limit):
        yield


def measure_limits(threads: int | None, features: tuple[int, ...] = (10, 50), budget: float = 1.0) -> MachineLimits:
    """The machine's rates at ``threads`` BLAS threads, the product for each of ``features``."""
    from model_store.kernel import KERNEL_BLOCK_BYTES

    rng = np.random.default_rng(1)
    columns = 1024  # one tile of support vectors; the block holds as many rows as fit
    rows = max(2, KERNEL_BLOCK_BYTES // (8 * columns))
    with blas_threads(threads):
        square = rng.normal(size=(1024, 1024))
        out = np.empty_like(square)
        seconds = median_seconds(lambda: np.matmul(square, square, out=out), budget=budget)
        dgemm = 2 * 1024**3 / seconds / 1e9
        thin = {}
        block_out = np.empty((rows, columns))
        for count in features:
            left, right = rng.normal(size=(rows, count + 2)), rng.normal(size=(count + 2, columns))
            seconds = median_seconds(lambda: np.matmul(left, right, out=block_out), budget=budget)
            thin[str(count)] = 2 * rows * (count + 2) * columns / seconds / 1e9
        block = -rng.random(size=rows * columns)
        work = np.empty_like(block)

        def exp_in_place():
            np.copyto(work, block)
            np.exp(work, out=work)

        copy_seconds = median_seconds(lambda: np.copyto(work, block), budget=budget / 2)
        seconds = median_seconds(exp_in_place, budget=budget) - copy_seconds
    return MachineLimits(
        threads="1" if threads == 1 else f"default ({_default_threads()})",
        dgemm_gflops=dgemm,
        thin_gflops=thin,
        exp_per_second=len(block) / seconds,
        block_bytes=rows * columns * 8,
    )


def describe_machine() -> dict:
    """CPU model, core count, one core's L2 cache (None when unknown), memory, library versions and the BLAS in use."""
    import sklearn
    from threadpoolctl import threadpool_info

    cpu = platform.processor() or platform.machine()
    try:
        with open("/proc/cpuinfo", encoding="utf-8") as info:
            for line in info:
                if line.startswith("model name"):
                    cpu = line.split(":", 1)[1].strip()
                    break
    except OSError:
        pass
    memory = None
    try:
        with open("/proc/meminfo", encoding="utf-8") as info:
            memory = round(int(info.readline().split()[1]) / 2**20, 1)
    except (OSError, ValueError, IndexError):
        pass
    blas = [f"{entry.get('internal_api')} {entry.get('version')} ({entry.get('architecture')}, "
            f"{entry.get('num_threads')} threads) for {entry.get('prefix')}"
            for entry in threadpool_info() if entry.get("user_api") == "blas"]
    from model_store.cpu_cache import data_cache_bytes

    return {
        "cpu": cpu,
        "cores": os.cpu_count(),
        "l2_cache_bytes": data_cache_bytes(2),
        "memory_gib": memory,
        "python": platform.python_version(),
        "numpy": np.__version__,
        "scikit_learn": sklearn.__version__,
        "blas": blas,
        "openblas_num_threads_env": os.environ.get("OPENBLAS_NUM_THREADS"),
    }


def _default_threads() -> int:
    from threadpoolctl import threadpool_info

    counts = [entry["num_threads"] for entry in threadpool_info() if entry.get("user_api") == "blas"]
    return max(counts) if counts else 1
