"""Fixtures for the file-scoring tests: tables written as CSV and Parquet, and a Dask cluster.

Reference data: the iris measurements shipped with scikit-learn (R. A. Fisher, 1936), as in
tests/conftest.py, resampled with noise to make tables of any size; some rows are spoiled on
purpose (missing, not a number, not finite, out of range) so that every refusal reason appears.
"""

from __future__ import annotations

import csv
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

FEATURES = ["sepal_length_cm", "sepal_width_cm", "petal_length_cm", "petal_width_cm"]


def iris_table(X: np.ndarray, rows: int, seed: int = 7) -> dict[str, list]:
    """``rows`` records around the iris rows, as text columns plus an ``id``; every 37th row spoiled."""
    rng = np.random.default_rng(seed)
    picked = X[rng.integers(0, len(X), size=rows)] + rng.normal(scale=0.05, size=(rows, X.shape[1]))
    text = {name: [repr(float(value)) for value in picked[:, j]] for j, name in enumerate(FEATURES)}
    spoilers = ["", "abc", "nan", "inf", "1e9", "1_0", " 5.0 "]
    for k, row in enumerate(range(0, rows, 37)):
        text[FEATURES[k % 4]][row] = spoilers[k % len(spoilers)]
    return {"id": [f"pallet-{i:07d}" for i in range(rows)], **text}


def write_csv(path: Path, columns: dict[str, list]) -> Path:
    with open(path, "w", newline="") as handle:
        writer = csv.writer(handle)
        writer.writerow(list(columns))
        writer.writerows(zip(*columns.values()))
    return path


def numeric_parquet_parts(folder: Path, columns: dict[str, list], parts: int) -> Path:
    """The table as ``parts`` Parquet files with float64 features (spoiled text as NaN/null) and a text id."""
    folder.mkdir(parents=True, exist_ok=True)
    n = len(columns["id"])
    bounds = np.linspace(0, n, parts + 1).astype(int)
    numbers = {name: [_number(value) for value in columns[name]] for name in FEATURES}
    for index in range(parts):
        start, stop = bounds[index], bounds[index + 1]
        table = pa.table({"id": pa.array(columns["id"][start:stop], pa.string()),
                          **{name: pa.array(numbers[name][start:stop], pa.float64()) for name in FEATURES}})
        pq.write_table(table, folder / f"part-{index:03d}.parquet")
    return folder


def _number(text: str):
    try:
        return float(text)  # "abc" and "" become nulls; "1_0" -> 10.0 is fine for a numeric column
    except ValueError:
        return None


def read_csv_rows(path: Path) -> list[dict[str, str]]:
    with open(path, newline="") as handle:
        return list(csv.DictReader(handle))


@pytest.fixture(scope="module")
def dask_cluster():
    """A real LocalCluster: 2 single-threaded worker processes (what the brief's engine tests use)."""
    import logging

    from distributed import Client, LocalCluster

    cluster = LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=":0",
                           silence_logs=logging.CRITICAL)
    client = Client(cluster)
    yield cluster, client
    client.close()
    cluster.close()
