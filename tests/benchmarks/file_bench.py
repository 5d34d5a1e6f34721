"""File scoring: ``rbfgate score`` against pandas + the scorer, and the Dask engine against the local one.

    python3 -m tests.benchmarks.file_bench --out tests/benchmarks/results            # 1,000,000 rows
    python3 -m tests.benchmarks.file_bench --out /tmp/bench --rows 100000            # a smaller run

Writes OUT/file-scoring.md and OUT/file-scoring.json. Every figure comes from one run on one
machine, the rivals alternated; the ratios are the claim. Each command runs as its own process
(``os.wait4`` gives its peak RSS), on the same files, with the benchmark model of
``tests.benchmarks.models`` (StandardScaler + SVC, about 1,000 support vectors x 10 features):

- CSV: ``rbfgate score BUNDLE in.csv --out out.csv`` vs a script doing ``pandas.read_csv``,
  ``load_bundle(...).score`` and ``DataFrame.to_csv`` of the same result columns (no refusal checks:
  the rows are all finite, and it scores the 1 % that rbfgate refuses as out of range). Target: rbfgate >= 70 % of the pandas rows/s. Peak RSS at 1/5 of the
  rows and at all of them shows whether memory stays flat (streaming).
- Engines: the same rows in 8 Parquet parts, ``--engine local`` and ``--engine dask`` on a
  LocalCluster of 1 and 2 single-threaded workers (started beforehand, ``--scheduler``; the start-up
  is reported apart), against the scorer alone (``Bundle.score`` on the rows in memory).
"""

from __future__ import annotations

import argparse
import json
import logging
import os
import subprocess
import sys
import tempfile
import textwrap
import time
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np

from .machine import describe_machine
from .models import cached_model, prepare_cache_dir

__all__ = ["FileBenchPlan", "main", "run_file_bench"]

REPO = Path(__file__).resolve().parents[2]
TARGET_RATIO = 0.70

_PANDAS_SCRIPT = textwrap.dedent(
    """
    import sys
    import pandas as pd
    from threadpoolctl import threadpool_limits
    from model_store import load_bundle
    bundle = load_bundle(sys.argv[1])
    frame = pd.read_csv(sys.argv[2])
    with threadpool_limits(limits=1, user_api="blas"):  # as rbfgate score runs it: the fastest setting here
        scores = bundle.score(frame[bundle.feature_names].to_numpy())
    out = pd.DataFrame({"id": frame["id"], "row": range(1, len(frame) + 1), "status": "scored",
                        "label": scores.labels, "decision": scores.decision,
                        "nearest_distance": scores.nearest_distance, "nearest_similarity": scores.nearest_similarity,
                        "nearest_label": scores.nearest_label, "nearest_percentile": scores.nearest_percentile,
                        "problems": ""})
    out.to_csv(sys.argv[3], index=False)
    """
)


@dataclass(frozen=True)
class FileBenchPlan:
    rows: int = 1_000_000
    features: int = 10
    model_rows: int = 1000
    parts: int = 8
    repeats: int = 2
    workers: tuple[int, ...] = (1, 2)


@dataclass(frozen=True)
class Measured:
    """One command: median wall seconds over the repeats, rows per second, the largest peak RSS (MiB)."""

    name: str
    rows: int
    seconds: float
    rows_per_second: float
    peak_rss_mib: float
    runs: list[float]


def run_file_bench(out: Path, plan: FileBenchPlan, log=print) -> dict:
    out.mkdir(parents=True, exist_ok=True)
    model = cached_model(prepare_cache_dir(out / "cache"), plan.model_rows, plan.features, log=log)
    results: dict = {"started": time.strftime("%Y-%m-%d %H:%M:%S"), "plan": asdict(plan),
                     "machine": describe_machine(), "model": {"n_support": model.n_support, "features": plan.features},
                     "load_average": [os.getloadavg()[0]]}
    with tempfile.TemporaryDirectory(prefix="rbfgate-file-bench-") as work:
        work = Path(work)
        log(f"writing {plan.rows:,} rows x {plan.features} features as CSV and as {plan.parts} Parquet parts ...")
        small, full = work / "small.csv", work / "full.csv"
        _write_csv(small, plan.rows // 5, plan.features, seed=1)
        _write_csv(full, plan.rows, plan.features, seed=2)
        parquet = _write_parquet(work / "parts", full, plan.parts)
        bundle = str(model.bundle_path)

        log("CSV: rbfgate score vs pandas read + scorer + pandas write (alternated) ...")
        rbfgate_cmd = [sys.executable, "-m", "model_store", "score", bundle, str(full), "--out", str(work / "r.csv"),
                       "--keep", "id"]
        pandas_cmd = [sys.executable, "-c", _PANDAS_SCRIPT, bundle, str(full), str(work / "p.csv")]
        ours, theirs = _alternate([("rbfgate score (CSV -> CSV)", rbfgate_cmd), ("pandas + scorer", pandas_cmd)],
                                  plan.rows, plan.repeats, log)
        small_cmd = [*rbfgate_cmd[:5], str(small), "--out", str(work / "r-small.csv"), *rbfgate_cmd[8:]]
        small_run = _measure("rbfgate score, 1/5 of the rows", small_cmd, plan.rows // 5, 1, log)
        results["csv"] = [asdict(m) for m in (ours, theirs, small_run)]
        results["csv_ratio"] = ours.rows_per_second / theirs.rows_per_second
        results["same_labels"] = _same_labels(work / "r.csv", work / "p.csv")

        log("engines: the scorer alone, --engine local, --engine dask with 1 and 2 workers ...")
        results["scorer_alone"] = _scorer_alone(model.bundle_path, full, plan.repeats)
        engines = [_measure("--engine local (Parquet -> Parquet)",
                            [sys.executable, "-m", "model_store", "score", bundle, str(parquet), "--out",
                             str(work / "local.parquet"), "--keep", "id"], plan.rows, plan.repeats, log,
                            fresh=work / "local.parquet")]
        for workers in plan.workers:
            engines.append(_dask_run(bundle, parquet, work, workers, plan, log, results))
        results["engines"] = [asdict(m) for m in engines]
    results["load_average"].append(os.getloadavg()[0])
    results["finished"] = time.strftime("%Y-%m-%d %H:%M:%S")
    (out / "file-scoring.json").write_text(json.dumps(results, indent=1) + "\n")
    (out / "file-scoring.md").write_text(render(results))
    log(f"rbfgate score / pandas + scorer: {results['csv_ratio']:.2f} (target >= {TARGET_RATIO:.2f}); "
        f"wrote {out / 'file-scoring.md'}")
    return results


def _write_csv(path: Path, rows: int, features: int, seed: int) -> None:
    rng = np.random.default_rng(seed)
    with open(path, "w") as handle:
        handle.write("id," + ",".join(f"x{j:02d}" for j in range(features)) + "\n")
        for start in range(0, rows, 100_000):
            block = rng.normal(size=(min(100_000, rows - start), features))
            ids = np.char.add("r", np.arange(start, start + len(block)).astype(str))
            text = np.column_stack([ids, block.astype(str)])
            handle.write("\n".join(",".join(line) for line in text) + "\n")


def _write_parquet(folder: Path, source: Path, parts: int) -> Path:
    import pyarrow.csv as pcsv
    import pyarrow.parquet as pq

    table = pcsv.read_csv(source)
    folder.mkdir()
    bounds = np.linspace(0, table.num_rows, parts + 1).astype(int)
    for index in range(parts):
        pq.write_table(table.slice(bounds[index], bounds[index + 1] - bounds[index]), folder / f"part-{index}.parquet")
    return folder


# Started from a small process of its own: Linux carries the resident size of the process that
# forks into the child's ru_maxrss (exec records the old memory's high-water mark), so a child of
# this benchmark, which holds the test data, would report at least the benchmark's own size.
_MEASURE = textwrap.dedent(
    """
    import os, subprocess, sys, time
    started = time.perf_counter()
    child = subprocess.Popen(sys.argv[1:], stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    error = child.stderr.read()
    _, status, usage = os.wait4(child.pid, 0)
    seconds = time.perf_counter() - started
    sys.stderr.write(error.decode(errors="replace")[-2000:])
    print(os.waitstatus_to_exitcode(status), seconds, usage.ru_maxrss)
    """
)


def _run_once(command: list[str], fresh: Path | None = None) -> tuple[float, float]:
    """(wall seconds, peak RSS MiB) of one run of ``command`` as a child process."""
    if fresh is not None and fresh.exists():
        import shutil

        shutil.rmtree(fresh)
    done = subprocess.run([sys.executable, "-c", _MEASURE, *command], cwd=REPO, capture_output=True, text=True)
    code, seconds, max_rss_kib = done.stdout.split()
    if int(code) != 0 or done.returncode != 0:
        raise RuntimeError(f"{' '.join(command[:4])} ... exited {code}: {done.stderr}")
    return float(seconds), int(max_rss_kib) / 1024  # Linux reports ru_maxrss in KiB


def _measure(name, command, rows, repeats, log, fresh=None) -> Measured:
    runs = [_run_once(command, fresh) for _ in range(repeats)]
    return _summarise(name, rows, runs, log)


def _alternate(named, rows, repeats, log) -> list[Measured]:
    runs: dict[str, list] = {name: [] for name, _ in named}
    for _ in range(repeats):
        for name, command in named:
            runs[name].append(_run_once(command))
    return [_summarise(name, rows, runs[name], log) for name, _ in named]


def _summarise(name, rows, runs, log) -> Measured:
    seconds = float(np.median([wall for wall, _ in runs]))
    measured = Measured(name, rows, seconds, rows / seconds, max(rss for _, rss in runs), [wall for wall, _ in runs])
    log(f"  {name}: {seconds:.2f} s, {measured.rows_per_second:,.0f} rows/s, peak RSS {measured.peak_rss_mib:.0f} MiB")
    return measured


def _same_labels(ours: Path, theirs: Path) -> bool:
    """Labels equal on every row rbfgate scored (it refuses the out-of-range rows the pandas script scores)."""
    import pandas as pd

    mine, reference = pd.read_csv(ours), pd.read_csv(theirs)
    scored = mine["status"] == "scored"
    return bool(scored.sum() > 0.9 * len(mine)) and mine["label"][scored].tolist() == reference["label"][scored].tolist()


def _scorer_alone(bundle_path: Path, source: Path, repeats: int) -> dict:
    """Bundle.score on the rows already in memory, in 1 BLAS thread and in the default threads."""
    import pandas as pd
    from threadpoolctl import threadpool_limits

    from model_store import load_bundle

    bundle = load_bundle(bundle_path)
    X = pd.read_csv(source)[bundle.feature_names].to_numpy()
    figures = {}
    for label, limit in (("1 thread", 1), ("default threads", None)):
        with threadpool_limits(limits=limit):
            times = []
            for _ in range(repeats):
                started = time.perf_counter()
                bundle.score(X)
                times.append(time.perf_counter() - started)
        figures[label] = {"seconds": float(np.median(times)), "rows_per_second": len(X) / float(np.median(times))}
    return figures


def _dask_run(bundle, parquet, work, workers, plan, log, results) -> Measured:
    from distributed import Client, LocalCluster

    started = time.perf_counter()
    cluster = LocalCluster(n_workers=workers, threads_per_worker=1, processes=True, dashboard_address=":0",
                           silence_logs=logging.CRITICAL)
    client = Client(cluster)
    results.setdefault("cluster_start_seconds", {})[str(workers)] = time.perf_counter() - started
    try:
        target = work / f"dask-{workers}.parquet"
        return _measure(f"--engine dask, {workers} worker{'s' if workers > 1 else ''}",
                        [sys.executable, "-m", "model_store", "score", bundle, str(parquet), "--out", str(target),
                         "--keep", "id", "--engine", "dask", "--scheduler", cluster.scheduler_address],
                        plan.rows, plan.repeats, log, fresh=target)
    finally:
        client.close()
        cluster.close()


def render(results: dict) -> str:
    """The markdown table of one run (file-scoring.md)."""
    machine = results["machine"]
    csv_rows = {row["name"]: row for row in results["csv"]}
    ours, theirs = results["csv"][0], results["csv"][1]
    small = results["csv"][2]
    met = "yes" if results["csv_ratio"] >= TARGET_RATIO else "**no**"
    lines = [
        "# rbfgate file-scoring benchmark",
        "",
        f"Run {results['started']} to {results['finished']} with `python3 -m tests.benchmarks.file_bench`. Machine: "
        f"{machine['cpu']}, {machine['cores']} cores; Python {machine['python']}, numpy {machine['numpy']}; BLAS: "
        f"{'; '.join(machine['blas'])}. Load average (1 min) {results['load_average'][0]:.2f} at the start, "
        f"{results['load_average'][1]:.2f} at the end (a shared machine). Model: StandardScaler + SVC, "
        f"{results['model']['n_support']} support vectors x {results['model']['features']} features. Medians of "
        f"{results['plan']['repeats']} runs, each command a process of its own; rivals alternated.",
        "",
        "## Targets",
        "",
        "| target | measured | met |",
        "| --- | --- | --- |",
        f"| `rbfgate score` on {ours['rows']:,} rows x {results['model']['features']} features >= "
        f"{TARGET_RATIO:.0%} of the rows/s of pandas read + scorer + pandas write | {results['csv_ratio']:.0%} "
        f"({ours['rows_per_second']:,.0f} vs {theirs['rows_per_second']:,.0f} rows/s) | {met} |",
        f"| flat memory: peak RSS at {small['rows']:,} rows vs {ours['rows']:,} rows | {small['peak_rss_mib']:.0f} MiB "
        f"vs {ours['peak_rss_mib']:.0f} MiB (pandas: {theirs['peak_rss_mib']:.0f} MiB) | "
        f"{'yes' if ours['peak_rss_mib'] <= 1.5 * small['peak_rss_mib'] else '**no**'} |",
        f"| same labels as pandas + scorer (on the rows rbfgate scored; it refuses out-of-range rows) | "
        f"{'all scored rows' if results['same_labels'] else 'differ'} | "
        f"{'yes' if results['same_labels'] else '**no**'} |",
        "",
        "## CSV file scoring",
        "",
        "| command | rows | wall (s) | rows/s | peak RSS (MiB) |",
        "| --- | ---: | ---: | ---: | ---: |",
        *(f"| {name} | {row['rows']:,} | {row['seconds']:.2f} | {row['rows_per_second']:,.0f} | "
          f"{row['peak_rss_mib']:.0f} |" for name, row in csv_rows.items()),
        "",
        "## Engines on the same rows in Parquet parts",
        "",
        f"The scorer alone (`Bundle.score` on the rows in memory): "
        + ", ".join(f"{label} {figure['rows_per_second']:,.0f} rows/s" for label, figure in results["scorer_alone"].items())
        + ". Overhead = the engine's time / the scorer's time at the same BLAS threads (1 thread per Dask worker, the "
        "default threads for the local engine); a LocalCluster start-up (reported apart) is not in the engine times: "
        + ", ".join(f"{workers} worker(s) {seconds:.1f} s" for workers, seconds in results["cluster_start_seconds"].items())
        + ".",
        "",
        "| engine | wall (s) | rows/s | x scorer alone | peak RSS of the client (MiB) |",
        "| --- | ---: | ---: | ---: | ---: |",
    ]
    alone = results["scorer_alone"]
    for row in results["engines"]:
        reference = alone["default threads" if "local" in row["name"] else "1 thread"]["seconds"]
        lines.append(f"| {row['name']} | {row['seconds']:.2f} | {row['rows_per_second']:,.0f} | "
                     f"{row['seconds'] / reference:.2f} | {row['peak_rss_mib']:.0f} |")
    lines.append("")
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python3 -m tests.benchmarks.file_bench", description=__doc__.split("\n")[0])
    parser.add_argument("--out", type=Path, default=Path("tests/benchmarks/results"))
    parser.add_argument("--rows", type=int, default=FileBenchPlan.rows)
    parser.add_argument("--repeats", type=int, default=FileBenchPlan.repeats)
    args = parser.parse_args(argv)
    run_file_bench(args.out, FileBenchPlan(rows=args.rows, repeats=args.repeats), log=lambda text: print(text, flush=True))
    return 0


if __name__ == "__main__":
    sys.exit(main())
