"""``score_frame``: pandas and Dask DataFrames scored by column name, with the file command's results.

Reference: scikit-learn's predict / predict_proba on iris (R. A. Fisher, 1936, shipped with
scikit-learn), and ``rbfgate score`` on the same rows written as a file.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest

from model_store.cli import main
from model_store.errors import InputError
from model_store.frames import score_frame
from model_store.result_columns import result_names

from .conftest import FEATURES, iris_table, numeric_parquet_parts


def _frame(X: np.ndarray) -> pd.DataFrame:
    return pd.DataFrame(X, columns=FEATURES)


def test_columns_are_matched_by_name_not_position(iris_calibrated):
    bundle, model, X = iris_calibrated
    shuffled = _frame(X)[["petal_width_cm", "sepal_length_cm", "petal_length_cm", "sepal_width_cm"]]
    shuffled.insert(0, "note", "extra columns are ignored")
    results = score_frame(bundle, shuffled)
    assert results["label"].tolist() == model.predict(X).tolist()  # scikit-learn reference
    probabilities = results[[f"probability[{c}]" for c in bundle.classes]].to_numpy()
    np.testing.assert_allclose(probabilities, model.predict_proba(X), rtol=0, atol=1e-9)


def test_results_keep_the_index_and_the_file_columns_without_row(iris_calibrated):
    bundle, _, X = iris_calibrated
    frame = _frame(X[:5]).set_index(pd.Index([10, 20, 30, 40, 50], name="pallet"))
    frame["site"] = list("abcde")
    results = score_frame(bundle, frame, keep=["site"])
    assert list(results.index) == [10, 20, 30, 40, 50]
    assert list(results.columns) == ["site", *result_names(bundle, with_row=False)]


def test_a_frame_gets_the_same_results_and_refusals_as_the_file_command(tmp_path, iris_calibrated):
    bundle, _, X = iris_calibrated
    parts = numeric_parquet_parts(tmp_path / "in", iris_table(X, 2_000), parts=1)
    assert main(["score", bundle.source, str(parts), "--out", str(tmp_path / "o.parquet"), "--keep", "id"]) == 0
    from_file = pq.read_table(tmp_path / "o.parquet").to_pandas().drop(columns=["row"])
    # Arrow-backed columns keep nulls apart from NaN, as the Parquet file does.
    from_frame = score_frame(bundle, pq.read_table(parts).to_pandas(types_mapper=pd.ArrowDtype), keep=["id"])
    assert from_frame["problems"].fillna("").tolist() == from_file["problems"].fillna("").tolist()
    assert from_frame["status"].tolist() == from_file["status"].tolist()
    scored = from_file["status"] == "scored"
    assert from_frame["label"][scored].tolist() == from_file["label"][scored].tolist()
    np.testing.assert_allclose(from_frame["probability[setosa]"][scored], from_file["probability[setosa]"][scored],
                               rtol=1e-12, atol=1e-12)


def test_missing_values_and_text_are_refused_with_the_file_reasons(iris_calibrated):
    bundle, _, X = iris_calibrated
    frame = _frame(X[:4])
    frame["sepal_width_cm"] = pd.array([X[0, 1], None, np.nan, X[3, 1]], dtype="Float64")
    frame["petal_length_cm"] = [repr(float(X[0, 2])), repr(float(X[1, 2])), repr(float(X[2, 2])), "abc"]
    problems = score_frame(bundle, frame)["problems"].tolist()
    assert problems[0] is None or pd.isna(problems[0])
    assert problems[1:] == ["sepal_width_cm: null", "sepal_width_cm: null", "petal_length_cm='abc': not a number"]


def test_a_dask_frame_is_scored_on_the_cluster_with_the_pandas_results(iris_calibrated, dask_cluster):
    import dask.dataframe as dd

    bundle, _, X = iris_calibrated
    _, client = dask_cluster
    frame = _frame(np.repeat(X, 20, axis=0))
    frame.iloc[::13, 2] = np.nan
    expected = score_frame(bundle, frame)
    lazy = score_frame(bundle, dd.from_pandas(frame, npartitions=6))
    got = client.compute(lazy).result()
    assert got["status"].tolist() == expected["status"].tolist()
    assert got["label"].tolist() == expected["label"].tolist()
    np.testing.assert_allclose(got["decision[virginica]"], expected["decision[virginica]"], rtol=1e-12, atol=1e-12)


def test_a_frame_without_a_feature_column_is_refused_by_name(iris_calibrated):
    bundle, _, X = iris_calibrated
    with pytest.raises(InputError, match="no column 'petal_width_cm'"):
        score_frame(bundle, _frame(X).drop(columns=["petal_width_cm"]))
