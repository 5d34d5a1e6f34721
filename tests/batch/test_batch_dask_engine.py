"""``--engine dask``: the same results as the local engine, on a real LocalCluster of 2 worker processes.

Results must be identical between engines: labels and every text column equal, numbers within
1e-12 (the scorer's sums may differ in the last bits between BLAS thread counts, see
model_store/scoring.py). The killed-worker test sends SIGKILL to a real worker process while it
holds a scoring task (POSIX signals; Dask reschedules the tasks of a worker that died).
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pyarrow.parquet as pq
import pytest

from model_store.cli import main

from .conftest import iris_table, numeric_parquet_parts, read_csv_rows, write_csv

REPO = Path(__file__).resolve().parents[2]


def assert_same_results(local, other) -> None:
    """Tables (pyarrow) equal in names, text and nulls; floats within 1e-12 x max(1, |value|)."""
    assert local.schema.equals(other.schema, check_metadata=False)
    for name in local.column_names:
        a, b = local[name].to_pylist(), other[name].to_pylist()
        if local.schema.field(name).type.id == 12:  # float64
            assert [x is None for x in a] == [y is None for y in b], name
            x = np.array([v for v in a if v is not None])
            y = np.array([v for v in b if v is not None])
            assert np.all(np.abs(x - y) <= 1e-12 * np.maximum(1.0, np.abs(x))), name
        else:
            assert a == b, name


def _score(*arguments) -> int:
    return main(["score", *map(str, arguments)])


def _both_engines(bundle, parts, tmp_path, scheduler):
    """The Parquet output tables of --engine local and of --engine dask on the same parts."""
    assert _score(bundle.source, parts, "--out", tmp_path / "local.parquet", "--keep", "id") == 0
    assert _score(bundle.source, parts, "--out", tmp_path / "dask.parquet", "--keep", "id", "--engine", "dask",
                  "--scheduler", scheduler) == 0
    return pq.read_table(tmp_path / "local.parquet"), pq.read_table(tmp_path / "dask.parquet")


def test_dask_and_local_give_the_same_results_on_parquet_parts(tmp_path, iris_calibrated, dask_cluster):
    bundle, _, X = iris_calibrated
    cluster, _ = dask_cluster
    parts = numeric_parquet_parts(tmp_path / "in", iris_table(X, 40_000), parts=8)
    local, dask = _both_engines(bundle, parts, tmp_path, cluster.scheduler_address)
    assert local.num_rows == 40_000 and set(local["status"].to_pylist()) == {"scored", "refused"}
    assert_same_results(local, dask)
    assert sorted(p.name for p in (tmp_path / "dask.parquet").iterdir()) == [f"part-{i:05d}.parquet" for i in range(8)]


def test_csv_parts_are_numbered_across_parts_on_the_cluster(tmp_path, iris_calibrated, dask_cluster):
    bundle, _, X = iris_calibrated
    cluster, _ = dask_cluster
    columns = iris_table(X, 3_000)
    folder = tmp_path / "in"
    folder.mkdir()
    for index, (start, stop) in enumerate([(0, 1000), (1000, 1700), (1700, 3000)]):
        write_csv(folder / f"part-{index}.csv", {name: values[start:stop] for name, values in columns.items()})
    (folder / "part-1.csv").write_text((folder / "part-1.csv").read_text() + "\n\n")  # blank lines: not counted
    assert _score(bundle.source, folder, "--out", tmp_path / "local.csv", "--keep", "id") == 0
    assert _score(bundle.source, folder, "--out", tmp_path / "dask.csv", "--keep", "id", "--engine", "dask",
                  "--scheduler", cluster.scheduler_address) == 0
    local, dask = read_csv_rows(tmp_path / "local.csv"), read_csv_rows(tmp_path / "dask.csv")
    assert [r["row"] for r in dask] == [str(i) for i in range(1, 3001)]
    assert [(r["id"], r["status"], r["label"], r["problems"]) for r in dask] == \
        [(r["id"], r["status"], r["label"], r["problems"]) for r in local]


def test_each_worker_verified_the_bundle_once_and_runs_one_blas_thread(tmp_path, iris_calibrated, dask_cluster):
    bundle, _, X = iris_calibrated
    cluster, client = dask_cluster
    parts = numeric_parquet_parts(tmp_path / "in", iris_table(X, 4_000), parts=8)
    assert _score(bundle.source, parts, "--out", tmp_path / "o.parquet", "--engine", "dask",
                  "--scheduler", cluster.scheduler_address) == 0

    def worker_state():
        from threadpoolctl import threadpool_info

        from model_store import bundle_transport

        return sorted(bundle_transport._verified), sorted({pool["num_threads"] for pool in threadpool_info()})

    states = client.run(worker_state)
    assert len(states) == 2
    for verified, threads in states.values():
        assert bundle.digest in verified
        assert threads == [1]


def test_a_bad_part_fails_the_run_with_one_line_and_leaves_no_output(tmp_path, iris_calibrated, dask_cluster, capsys):
    bundle, _, X = iris_calibrated
    cluster, _ = dask_cluster
    parts = numeric_parquet_parts(tmp_path / "in", iris_table(X, 2_000), parts=4)
    (parts / "part-002.parquet").write_bytes(b"PAR1 this is not a Parquet file PAR1")
    assert _score(bundle.source, parts, "--out", tmp_path / "o.parquet", "--engine", "dask",
                  "--scheduler", cluster.scheduler_address) == 2
    err = capsys.readouterr().err
    assert "part-002.parquet" in err and "Traceback" not in err and err.count("\n") == 1
    assert sorted(p.name for p in tmp_path.iterdir()) == ["in"]


def test_an_unreachable_scheduler_is_a_one_line_error(tmp_path, iris_calibrated, capsys, monkeypatch):
    import model_store.dask_engine

    bundle, _, X = iris_calibrated
    monkeypatch.setattr(model_store.dask_engine, "_CONNECT_SECONDS", 2)
    source = write_csv(tmp_path / "in.csv", iris_table(X, 10))
    assert _score(bundle.source, source, "--out", tmp_path / "o.csv", "--engine", "dask",
                  "--scheduler", "tcp://127.0.0.1:9") == 2  # port 9 (discard): nothing listens there
    err = capsys.readouterr().err
    assert "cannot reach a Dask scheduler" in err and err.count("\n") == 1


def test_without_a_scheduler_a_local_cluster_of_the_given_size_runs(tmp_path, iris_calibrated):
    bundle, _, X = iris_calibrated
    source = write_csv(tmp_path / "in.csv", iris_table(X, 500))
    assert _score(bundle.source, source, "--out", tmp_path / "local.csv", "--keep", "id") == 0
    assert _score(bundle.source, source, "--out", tmp_path / "dask.csv", "--keep", "id", "--engine", "dask",
                  "--workers", "2") == 0
    assert (tmp_path / "local.csv").read_text() .count("\n") == (tmp_path / "dask.csv").read_text().count("\n")
    assert [r["label"] for r in read_csv_rows(tmp_path / "local.csv")] == \
        [r["label"] for r in read_csv_rows(tmp_path / "dask.csv")]


def test_a_worker_killed_mid_run_still_gives_the_complete_output(tmp_path, iris_calibrated, dask_cluster):
    bundle, _, X = iris_calibrated
    cluster, client = dask_cluster
    parts = numeric_parquet_parts(tmp_path / "in", iris_table(X, 160_000), parts=16)
    assert _score(bundle.source, parts, "--out", tmp_path / "local.parquet", "--keep", "id") == 0
    pids = client.run(os.getpid)
    run = subprocess.Popen(
        [sys.executable, "-m", "model_store", "score", bundle.source, str(parts), "--out", str(tmp_path / "o.parquet"),
         "--keep", "id", "--engine", "dask", "--scheduler", cluster.scheduler_address],
        cwd=REPO, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    killed = None
    deadline = time.monotonic() + 120
    try:
        while killed is None and time.monotonic() < deadline and run.poll() is None:
            for address, keys in client.processing().items():
                if any(str(key).startswith("rbfgate-score-") for key in keys) and address in pids:
                    assert not (tmp_path / "o.parquet").exists()  # mid-run: the output is not there yet
                    os.kill(pids[address], signal.SIGKILL)
                    killed = address
                    break
            time.sleep(0.005)
        out, err = run.communicate(timeout=300)
    finally:
        if run.poll() is None:
            run.kill()
    assert killed is not None, "the run ended before a worker could be killed"
    assert run.returncode == 0, err
    assert "Traceback" not in err
    client.wait_for_workers(2, timeout=60)  # the nanny restarted the killed worker
    assert_same_results(pq.read_table(tmp_path / "local.parquet"), pq.read_table(tmp_path / "o.parquet"))
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".")]


@pytest.mark.slow
def test_a_million_rows_in_eight_parts_are_identical_between_engines(tmp_path, iris_calibrated, dask_cluster):
    bundle, _, X = iris_calibrated
    cluster, _ = dask_cluster
    parts = numeric_parquet_parts(tmp_path / "in", iris_table(X, 1_000_000), parts=8)
    local, dask = _both_engines(bundle, parts, tmp_path, cluster.scheduler_address)
    assert local.num_rows == 1_000_000 and local["status"].to_pylist().count("refused") > 1000
    assert_same_results(local, dask)
