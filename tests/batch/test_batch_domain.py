"""Rows outside the model's domain in file outputs: refused as outside_domain with their domain columns
kept, or answered with ``--flag-outside``; the same columns in CSV and Parquet.

Reference for the verdict: the bundle's own scorer (``Bundle.score``), whose domain model is checked
against scikit-learn's OneClassSVM in tests/bundle; here the file layout is under test.
"""

from __future__ import annotations

import itertools

import numpy as np
import pyarrow as pa
import pyarrow.csv as pcsv
import pyarrow.parquet as pq
import pytest

from model_store.cli import main

from .conftest import FEATURES


@pytest.fixture(scope="module")
def outside_row(iris_calibrated):
    """A corner of the allowed ranges that the domain model calls outside, and an ordinary iris row."""
    bundle, _, X = iris_calibrated
    corners = np.array(list(itertools.product(*[feature.allowed for feature in bundle.manifest.features])))
    scores = bundle.score(corners)
    if scores.domain_verdict is None:
        pytest.fail("the iris fixture bundle has no domain model")
    picked = np.flatnonzero(scores.domain_verdict == "outside")
    assert len(picked), "no corner of the allowed box is outside the domain"
    return corners[picked[0]], float(scores.domain_score[picked[0]]), X[0]


def _table(rows):
    return pa.table({name: [float(row[j]) for row in rows] for j, name in enumerate(FEATURES)})


@pytest.mark.parametrize("out_name", ["out.parquet", "out.csv"])
def test_an_outside_row_is_refused_and_keeps_its_domain_columns(tmp_path, iris_calibrated, outside_row, out_name):
    bundle, _, _ = iris_calibrated
    corner, domain_score, ordinary = outside_row
    pq.write_table(_table([ordinary, corner]), tmp_path / "in.parquet")
    assert main(["score", bundle.source, str(tmp_path / "in.parquet"), "--out", str(tmp_path / out_name)]) == 0
    if out_name.endswith(".parquet"):
        rows = pq.read_table(tmp_path / out_name).to_pylist()
    else:
        rows = pcsv.read_csv(tmp_path / out_name).to_pylist()
    assert [row["status"] for row in rows] == ["scored", "refused"]
    assert rows[1]["domain_verdict"] == "outside" and rows[1]["label"] in (None, "")
    assert abs(float(rows[1]["domain_score"]) - domain_score) <= 1e-12 * max(1.0, abs(domain_score))
    assert "outside" in rows[1]["problems"]


def test_flag_outside_answers_the_row_and_flags_it(tmp_path, iris_calibrated, outside_row):
    bundle, _, _ = iris_calibrated
    corner, _, _ = outside_row
    pq.write_table(_table([corner]), tmp_path / "in.parquet")
    assert main(["score", bundle.source, str(tmp_path / "in.parquet"), "--out", str(tmp_path / "o.parquet"),
                 "--flag-outside"]) == 0
    [row] = pq.read_table(tmp_path / "o.parquet").to_pylist()
    assert row["status"] == "scored" and row["domain_verdict"] == "outside"
    assert row["label"] == bundle.score(corner[None, :]).labels[0]
