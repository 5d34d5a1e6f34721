"""Run every benchmark and write the results table, plot and raw numbers.

    python3 -m tests.benchmarks.run --out tests/benchmarks/results            # full run, about 25 minutes
    python3 -m tests.benchmarks.run --out /tmp/bench --quick                  # smaller sizes, a few minutes
    python3 -m tests.benchmarks.run --out tests/benchmarks/results --only scorer,switch

Writes OUT/benchmark.md (the tables), OUT/benchmark.png (the plot) and
OUT/benchmark.json (every number), and prints the ratios. Fitted models are
cached in OUT/cache (ignored by git), so a rerun skips the fits (the first
full run spends about 5 minutes fitting). Needs the ``bench`` extra
(``pip install -e '.[bench]'``: scikit-learn, matplotlib) and wrk, which is
installed with apt-get when it is missing.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import tempfile
import time
from dataclasses import dataclass, field
from pathlib import Path

from .machine import describe_machine, measure_limits
from .models import cached_model, prepare_cache_dir

__all__ = ["Plan", "main", "run"]

_PARTS = ("scorer", "service", "switch")


@dataclass(frozen=True)
class Plan:
    """What to measure. The defaults are the full run; ``quick()`` is the smaller one."""

    models: list[tuple[int, int]] = field(default_factory=lambda: [
        (1000, 10), (1000, 50), (10000, 10), (10000, 50), (50000, 10), (50000, 50)])
    scorer_batches: list[int] = field(default_factory=lambda: [1, 100, 10000])
    scorer_budget: float = 1.5
    service_model: tuple[int, int] = (1000, 10)
    service_workers: list[int] = field(default_factory=lambda: [1, 2])
    service_batches: list[int] = field(default_factory=lambda: [1, 100, 1000])
    connections: int = 8
    load_seconds: float = 10.0
    load_rounds: int = 2
    large_bundle: tuple[int, int] = (100_000, 50)
    load_runs: int = 5
    switches: int = 4

    @classmethod
    def quick(cls) -> "Plan":
        return cls(models=[(1000, 10), (1000, 50), (10000, 10)], scorer_budget=0.3, service_workers=[1],
                   service_batches=[1, 1000], load_seconds=3.0, load_rounds=2, load_runs=2, switches=2)


def run(out: Path, plan: Plan, parts: tuple[str, ...] = _PARTS, log=print) -> dict:
    """Measure ``parts`` and write the results under ``out``; return every number."""
    out.mkdir(parents=True, exist_ok=True)
    cache = prepare_cache_dir(out / "cache")
    results: dict = {"started": time.strftime("%Y-%m-%d %H:%M:%S"), "plan": plan.__dict__, "parts": list(parts)}
    load_at_start = os.getloadavg()[0]
    log("machine and its limits (BLAS dgemm, numpy exp) ...")
    results["machine"] = describe_machine()
    feature_counts = tuple(sorted({count for _, count in plan.models})) or (10,)
    limits = {"1": measure_limits(1, feature_counts), "default": measure_limits(None, feature_counts)}
    results["limits"] = {key: value.to_dict() for key, value in limits.items()}
    for value in limits.values():
        thin = ", ".join(f"{rate:.1f} (f = {count})" for count, rate in value.thin_gflops.items())
        log(f"  {value.threads} thread(s): dgemm {value.dgemm_gflops:.1f} GFLOP/s (square), {thin} GFLOP/s "
            f"(scorer's shape), exp {value.exp_per_second / 1e9:.2f} G/s, block {value.block_bytes >> 10} KiB")
    with tempfile.TemporaryDirectory(prefix="rbfgate-bench-") as work:
        workdir = Path(work)
        if "scorer" in parts:
            from .scorer_bench import bench_model

            log("scorer: scikit-learn decision_function vs rbfgate load_bundle(...).score(X) ...")
            rows = []
            for rows_fitted, features in plan.models:
                model = cached_model(cache, rows_fitted, features, log=log)
                rows += bench_model(model, plan.scorer_batches, limits["1"], budget=plan.scorer_budget, log=log)
            results["scorer"] = [row.to_dict() for row in rows]
        if "service" in parts:
            from .service_bench import bench_service

            log("service: rbfgate serve vs the reference FastAPI endpoint, wrk, alternated A B A B ...")
            model = cached_model(cache, *plan.service_model, log=log)
            service = bench_service(model, workdir, workers_list=plan.service_workers,
                                    batch_sizes=plan.service_batches, connections=plan.connections,
                                    seconds=plan.load_seconds, rounds=plan.load_rounds, log=log)
            results["service_model"] = {"n_support": model.n_support, "features": model.features}
            results["service"] = [row.to_dict() for row in service]
        if "switch" in parts:
            from .switch_bench import measure_load, measure_switch, prepare_large_bundles

            log("load and switch figures ...")
            large = prepare_large_bundles(cache, *plan.large_bundle, log=log)
            results["load"] = []
            for threads in (1, None):
                load = measure_load(large[0], plan.load_runs, threads)
                log(f"  {load.n_support} x {load.features}, {load.blas_threads} BLAS thread(s): load "
                    f"{load.load_seconds:.3f} s + self-test {load.self_test_seconds:.3f} s, "
                    f"RSS +{load.rss_delta_bytes / 2**20:.0f} MiB")
                results["load"].append(load.to_dict())
            small = cached_model(cache, *plan.service_model, log=log)
            small_versions = _second_version(small.bundle_path, cache)
            # The service follows the store by polling it (--poll-interval, default 1 s): the default and a
            # shorter interval show how much of the switch time is the poll and how much the load.
            results["switch"] = [
                measure_switch(f"{label}-poll-{poll:g}", versions, workdir, switches=plan.switches,
                               poll_seconds=poll, log=log).to_dict()
                for label, versions in (("large", large), ("small", small_versions))
                for poll in (1.0, 0.25)
            ]
    results["finished"] = time.strftime("%Y-%m-%d %H:%M:%S")
    results["load_average"] = [load_at_start, os.getloadavg()[0]]
    from .report import print_summary, write_markdown, write_plot

    (out / "benchmark.json").write_text(json.dumps(results, indent=1) + "\n")
    write_markdown(results, out / "benchmark.md")
    write_plot(results, out / "benchmark.png")
    print_summary(results, log)
    log(f"wrote {out / 'benchmark.md'}, {out / 'benchmark.png'} and {out / 'benchmark.json'}")
    from .readme_figures import README, RESULTS, figures_block, replace_block

    if out.resolve() == RESULTS.parent and results.get("scorer"):  # the committed results: the README quotes them
        README.write_text(replace_block(README.read_text(encoding="utf-8"), figures_block(results)), encoding="utf-8")
        log(f"updated the performance figures in {README}")
    return results


def _second_version(bundle_path: Path, cache: Path) -> tuple[Path, Path]:
    """The cached bundle and a copy under another version (same arrays, another digest)."""
    from model_store.bundle import load_bundle, write_bundle

    second = cache / f"{bundle_path.parent.name}-second-version"
    if not second.exists():
        bundle = load_bundle(bundle_path)
        document = {key: value for key, value in bundle.document.items() if key != "files"}
        document["version"] = bundle.version + "-b"
        arrays = {name: _load_array(bundle_path / name) for name in bundle.manifest.files}
        write_bundle(second, document, arrays)
    return bundle_path, second


def _load_array(path: Path):
    import numpy as np

    return np.load(path, allow_pickle=False)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python3 -m tests.benchmarks.run", description=__doc__.split("\n")[0])
    parser.add_argument("--out", type=Path, default=Path("tests/benchmarks/results"), help="results folder")
    parser.add_argument("--quick", action="store_true", help="smaller sizes and shorter loads (a smoke run)")
    parser.add_argument("--only", default=",".join(_PARTS), help=f"comma-separated parts of {', '.join(_PARTS)}")
    args = parser.parse_args(argv)
    parts = tuple(part.strip() for part in args.only.split(",") if part.strip())
    unknown = sorted(set(parts) - set(_PARTS))
    if unknown:
        parser.error(f"--only: unknown part {unknown[0]!r}; choose from {', '.join(_PARTS)}")
    run(args.out, Plan.quick() if args.quick else Plan(), parts, log=lambda text: print(text, flush=True))
    return 0


if __name__ == "__main__":
    sys.exit(main())
