"""Parquet in and out: a file or a directory of parts, one output part per input part, stable schema.

Reference values: scikit-learn's predict / predict_proba on the iris rows (R. A. Fisher, 1936);
the Parquet format itself is read back with pyarrow (Apache Parquet file format: footer
row counts, key-value metadata).
"""

from __future__ import annotations

import json

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from model_store.cli import main
from model_store.result_columns import result_names

from .conftest import FEATURES, iris_table, numeric_parquet_parts, read_csv_rows, write_csv


def _score(*arguments) -> int:
    return main(["score", *map(str, arguments)])


def test_a_directory_of_parts_gives_one_output_part_per_input_part(tmp_path, iris_calibrated):
    bundle, _, X = iris_calibrated
    parts = numeric_parquet_parts(tmp_path / "in", iris_table(X, 900), parts=3)
    assert _score(bundle.source, parts, "--out", tmp_path / "out.parquet", "--keep", "id") == 0
    written = sorted(path.name for path in (tmp_path / "out.parquet").iterdir())
    assert written == ["part-00000.parquet", "part-00001.parquet", "part-00002.parquet"]
    for index, name in enumerate(written):
        assert pq.read_metadata(tmp_path / "out.parquet" / name).num_rows == \
            pq.read_metadata(parts / f"part-{index:03d}.parquet").num_rows


def test_every_part_has_the_kept_columns_then_the_csv_result_columns(tmp_path, iris_calibrated):
    bundle, _, X = iris_calibrated
    parts = numeric_parquet_parts(tmp_path / "in", iris_table(X, 300), parts=3)
    assert _score(bundle.source, parts, "--out", tmp_path / "out.parquet", "--keep", "id") == 0
    schemas = [pq.read_schema(path) for path in sorted((tmp_path / "out.parquet").iterdir())]
    assert all(schema.equals(schemas[0]) for schema in schemas)
    assert schemas[0].names == ["id", *result_names(bundle)]
    source = write_csv(tmp_path / "in.csv", iris_table(X, 5))
    assert _score(bundle.source, source, "--out", tmp_path / "out.csv", "--keep", "id") == 0
    assert list(read_csv_rows(tmp_path / "out.csv")[0]) == schemas[0].names  # the same names, same order


def test_rows_are_numbered_across_parts_and_match_scikit_learn(tmp_path, iris_calibrated):
    bundle, model, X = iris_calibrated
    folder = tmp_path / "in"
    folder.mkdir()
    for index, (start, stop) in enumerate([(0, 50), (50, 120), (120, 150)]):
        pq.write_table(pa.table({name: X[start:stop, j] for j, name in enumerate(FEATURES)}),
                       folder / f"p{index}.parquet")
    assert _score(bundle.source, folder, "--out", tmp_path / "out.parquet") == 0
    table = pq.read_table(tmp_path / "out.parquet")
    assert table["row"].to_pylist() == list(range(1, 151))
    assert table["label"].to_pylist() == model.predict(X).tolist()  # scikit-learn reference
    probabilities = np.column_stack([table[f"probability[{c}]"].to_numpy() for c in bundle.classes])
    np.testing.assert_allclose(probabilities, model.predict_proba(X), rtol=0, atol=1e-9)


def test_refused_rows_have_nulls_in_every_score_column_and_say_why(tmp_path, iris_calibrated):
    bundle, _, X = iris_calibrated
    table = pa.table({"id": ["a", "b", "c", "d"],
                      **{name: pa.array([X[0, j]] * 4, pa.float64()) for j, name in enumerate(FEATURES)}})
    values = table["sepal_width_cm"].to_pylist()
    values[1], values[2], values[3] = None, float("nan"), 1e6
    table = table.set_column(2, "sepal_width_cm", pa.array(values, pa.float64()))
    pq.write_table(table, tmp_path / "in.parquet")
    assert _score(bundle.source, tmp_path / "in.parquet", "--out", tmp_path / "out.parquet", "--keep", "id") == 0
    out = pq.read_table(tmp_path / "out.parquet").to_pylist()
    assert [row["status"] for row in out] == ["scored", "refused", "refused", "refused"]
    assert [row["problems"] for row in out[1:]] == [
        "sepal_width_cm: null", "sepal_width_cm=nan: not finite",
        f"sepal_width_cm=1000000.0 outside [{bundle.manifest.features[1].allowed[0]:g}, "
        f"{bundle.manifest.features[1].allowed[1]:g}]"]
    assert all(row["label"] is None and row["nearest_distance"] is None for row in out[1:])
    assert [row["id"] for row in out] == ["a", "b", "c", "d"]


def test_text_columns_in_parquet_follow_the_csv_number_grammar(tmp_path, iris_calibrated):
    bundle, _, X = iris_calibrated
    columns = {name: [repr(float(X[0, j]))] * 3 for j, name in enumerate(FEATURES)}
    columns["petal_length_cm"] = [repr(float(X[0, 2])), "1_0", "nan"]
    pq.write_table(pa.table(columns), tmp_path / "in.parquet")
    assert _score(bundle.source, tmp_path / "in.parquet", "--out", tmp_path / "out.csv") == 0
    rows = read_csv_rows(tmp_path / "out.csv")
    assert [r["problems"] for r in rows] == ["", "petal_length_cm='1_0': not a number", "petal_length_cm='nan': not finite"]


def test_kept_columns_keep_their_parquet_type(tmp_path, iris_calibrated):
    bundle, _, X = iris_calibrated
    table = pa.table({"pallet": pa.array([7, 8], pa.int32()),
                      **{name: X[:2, j] for j, name in enumerate(FEATURES)}})
    pq.write_table(table, tmp_path / "in.parquet")
    assert _score(bundle.source, tmp_path / "in.parquet", "--out", tmp_path / "out.parquet", "--keep", "pallet") == 0
    out = pq.read_table(tmp_path / "out.parquet")
    assert out.schema.field("pallet").type == pa.int32() and out["pallet"].to_pylist() == [7, 8]


def test_the_output_records_model_name_version_and_digest(tmp_path, iris_calibrated):
    bundle, _, X = iris_calibrated
    parts = numeric_parquet_parts(tmp_path / "in", iris_table(X, 40), parts=2)
    assert _score(bundle.source, parts, "--out", tmp_path / "out.parquet") == 0
    for path in (tmp_path / "out.parquet").iterdir():
        metadata = pq.read_schema(path).metadata
        assert metadata[b"rbfgate.model"].decode() == bundle.name
        assert metadata[b"rbfgate.version"].decode() == bundle.version
        assert metadata[b"rbfgate.digest"].decode() == bundle.digest
    assert _score(bundle.source, parts, "--out", tmp_path / "out.csv") == 0
    sidecar = json.loads((tmp_path / "out.csv.json").read_text())
    assert (sidecar["model"], sidecar["version"], sidecar["digest"]) == (bundle.name, bundle.version, bundle.digest)
    assert sidecar["rows"] == 40 and sidecar["scored"] + sidecar["refused"] == 40


def test_a_feature_column_of_an_unusable_type_names_the_part_and_column(tmp_path, iris_calibrated, capsys):
    bundle, _, X = iris_calibrated
    folder = tmp_path / "in"
    folder.mkdir()
    pq.write_table(pa.table({name: X[:5, j] for j, name in enumerate(FEATURES)}), folder / "a.parquet")
    bad = pa.table({**{name: X[:5, j] for j, name in enumerate(FEATURES[:3])}, FEATURES[3]: [True] * 5})
    pq.write_table(bad, folder / "b.parquet")
    assert _score(bundle.source, folder, "--out", tmp_path / "out.parquet") == 2
    err = capsys.readouterr().err
    assert "b.parquet" in err and "'petal_width_cm'" in err and "bool" in err and err.count("\n") == 1
    assert not (tmp_path / "out.parquet").exists()
    assert [p.name for p in tmp_path.iterdir()] == ["in"]  # no staging directory left behind


@pytest.mark.parametrize("layout, message", [
    ("missing-feature", "feature column 'petal_width_cm' not found"),
    ("mixed", "mixes CSV and Parquet parts"),
    ("empty", "no .csv or .parquet part files"),
    ("nested", "holds the folder"),
])
def test_unusable_inputs_are_one_line_errors(tmp_path, iris_calibrated, capsys, layout, message):
    bundle, _, X = iris_calibrated
    folder = tmp_path / "in"
    folder.mkdir()
    if layout == "missing-feature":
        pq.write_table(pa.table({name: X[:3, j] for j, name in enumerate(FEATURES[:3])}), folder / "a.parquet")
    elif layout == "mixed":
        pq.write_table(pa.table({name: X[:3, j] for j, name in enumerate(FEATURES)}), folder / "a.parquet")
        write_csv(folder / "b.csv", {name: list(X[:3, j]) for j, name in enumerate(FEATURES)})
    elif layout == "nested":
        (folder / "date=2026-12-01").mkdir()
    assert _score(bundle.source, folder, "--out", tmp_path / "out.parquet") == 2
    err = capsys.readouterr().err
    assert message in err and "Traceback" not in err


def test_a_parquet_output_is_never_written_over(tmp_path, iris_calibrated, capsys):
    bundle, _, X = iris_calibrated
    source = write_csv(tmp_path / "in.csv", iris_table(X, 10))
    (tmp_path / "out.parquet").mkdir()
    (tmp_path / "out.parquet" / "old.txt").write_text("keep me")
    assert _score(bundle.source, source, "--out", tmp_path / "out.parquet") == 2
    assert "already exists" in capsys.readouterr().err
    assert (tmp_path / "out.parquet" / "old.txt").read_text() == "keep me"


def test_a_csv_input_written_as_parquet_holds_the_same_results_as_the_csv_output(tmp_path, iris_calibrated):
    bundle, _, X = iris_calibrated
    source = write_csv(tmp_path / "in.csv", iris_table(X, 500))
    assert _score(bundle.source, source, "--out", tmp_path / "out.csv", "--keep", "id") == 0
    assert _score(bundle.source, source, "--out", tmp_path / "out.parquet", "--keep", "id") == 0
    from_csv = read_csv_rows(tmp_path / "out.csv")
    from_parquet = pq.read_table(tmp_path / "out.parquet").to_pylist()
    assert len(from_csv) == len(from_parquet) == 500
    for text_row, typed_row in zip(from_csv, from_parquet):
        for name, value in typed_row.items():
            if isinstance(value, float):
                assert float(text_row[name]) == value  # Arrow's CSV writer round-trips doubles exactly
            else:
                assert text_row[name] == ("" if value is None else str(value))
