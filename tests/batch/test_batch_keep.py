"""``--keep COLUMN[,COLUMN]`` copies input columns to the output, first, for scored and refused rows alike."""

from __future__ import annotations

import pyarrow.parquet as pq
import pytest

from model_store.cli import main

from .conftest import FEATURES, iris_table, numeric_parquet_parts, read_csv_rows, write_csv


def test_a_thousand_ids_come_back_in_order_with_refused_rows_among_them(tmp_path, iris_calibrated):
    bundle, _, X = iris_calibrated
    columns = iris_table(X, 1000)
    source = write_csv(tmp_path / "in.csv", columns)
    assert main(["score", bundle.source, str(source), "--out", str(tmp_path / "o.csv"), "--keep", "id"]) == 0
    rows = read_csv_rows(tmp_path / "o.csv")
    assert [row["id"] for row in rows] == columns["id"]
    assert {row["status"] for row in rows} == {"scored", "refused"}


def test_kept_columns_come_first_in_the_order_given(tmp_path, iris_calibrated):
    bundle, _, X = iris_calibrated
    columns = {"site": ["north", "south"], **{name: [repr(float(v)) for v in X[:2, j]] for j, name in
                                              enumerate(FEATURES)}, "id": ["a", "b"]}
    source = write_csv(tmp_path / "in.csv", columns)
    assert main(["score", bundle.source, str(source), "--out", str(tmp_path / "o.csv"),
                 "--keep", "id,site,petal_width_cm"]) == 0
    rows = read_csv_rows(tmp_path / "o.csv")
    assert list(rows[0])[:4] == ["id", "site", "petal_width_cm", "row"]
    assert [(r["id"], r["site"], r["petal_width_cm"]) for r in rows] == [
        ("a", "north", columns["petal_width_cm"][0]), ("b", "south", columns["petal_width_cm"][1])]


def test_kept_text_is_copied_exactly_even_with_commas_quotes_and_line_breaks(tmp_path, iris_calibrated):
    bundle, _, X = iris_calibrated
    ids = ['a,b', 'say "hi"', "two\nlines", ""]
    columns = {"id": ids, **{name: [repr(float(X[0, j]))] * 4 for j, name in enumerate(FEATURES)}}
    source = write_csv(tmp_path / "in.csv", columns)
    assert main(["score", bundle.source, str(source), "--out", str(tmp_path / "o.csv"), "--keep", "id"]) == 0
    assert [row["id"] for row in read_csv_rows(tmp_path / "o.csv")] == ids


def test_kept_columns_lead_every_parquet_part_too(tmp_path, iris_calibrated):
    bundle, _, X = iris_calibrated
    columns = iris_table(X, 200)
    parts = numeric_parquet_parts(tmp_path / "in", columns, parts=2)
    assert main(["score", bundle.source, str(parts), "--out", str(tmp_path / "o.parquet"), "--keep", "id"]) == 0
    table = pq.read_table(tmp_path / "o.parquet")
    assert table.column_names[0] == "id" and table["id"].to_pylist() == columns["id"]


@pytest.mark.parametrize("keep, message", [
    ("pallet", "--keep column 'pallet' not found"),
    ("status", "'status' is also a result column"),
    ("id,id", "'id' is given twice"),
    ("id,", "an empty column name"),
])
def test_unusable_keep_lists_are_one_line_errors(tmp_path, iris_calibrated, capsys, keep, message):
    bundle, _, X = iris_calibrated
    source = write_csv(tmp_path / "in.csv", iris_table(X, 5))
    assert main(["score", bundle.source, str(source), "--out", str(tmp_path / "o.csv"), "--keep", keep]) == 2
    err = capsys.readouterr().err
    assert message in err and err.count("\n") == 1
    assert not (tmp_path / "o.csv").exists()
