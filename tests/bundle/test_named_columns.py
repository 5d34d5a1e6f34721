"""Named tables are scored by feature name, as scikit-learn matches ``feature_names_in_``.

Reference: scikit-learn's own ``predict`` and ``decision_function`` of a pipeline fitted on a
pandas DataFrame, called with the columns in the order it was fitted on. Dataset: wine, shipped
with scikit-learn (M. Forina et al., PARVUS, Genoa, 1988; UCI "Wine"), 13 features.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from conftest import export_model  # tests/conftest.py
from sklearn.datasets import load_wine
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler
from sklearn.svm import SVC

from model_store.errors import InputError

from .reference import assert_close


@pytest.fixture(scope="module")
def wine_frame_model(tmp_path_factory):
    """(bundle, model fitted on a DataFrame, frame in the fitted column order)."""
    frame, y = load_wine(return_X_y=True, as_frame=True)
    model = make_pipeline(StandardScaler(), SVC(C=2.0)).fit(frame, y)
    names = list(frame.columns)
    assert list(model.feature_names_in_) == names
    out = tmp_path_factory.mktemp("wine-frame") / "bundle"
    bundle = export_model(model, frame.to_numpy(), out, y=y.to_numpy(), name="wine", version="1", features=names)
    return bundle, model, frame


def _shuffled(frame: pd.DataFrame) -> pd.DataFrame:
    order = np.random.default_rng(3).permutation(frame.columns.size)
    shuffled = frame[frame.columns[order]]
    assert list(shuffled.columns) != list(frame.columns)
    return shuffled


def _assert_like_sklearn(scores, model, frame):
    assert scores.labels.tolist() == model.predict(frame).tolist()
    assert_close(scores.decision, model.decision_function(frame), "decision_function")


def test_dataframe_with_shuffled_columns_scores_by_name(wine_frame_model):
    bundle, model, frame = wine_frame_model
    # Scored by position (before names were matched) decisions were off by up to 2.4 and 60 % of
    # the labels changed, without an error.
    _assert_like_sklearn(bundle.score(_shuffled(frame)), model, frame)


def test_mapping_of_arrays_scores_by_name(wine_frame_model):
    bundle, model, frame = wine_frame_model
    shuffled = _shuffled(frame)
    columns = {name: shuffled[name].to_numpy() for name in shuffled.columns}
    _assert_like_sklearn(bundle.score(columns), model, frame)


def test_structured_array_scores_by_name(wine_frame_model):
    bundle, model, frame = wine_frame_model
    shuffled = _shuffled(frame)
    records = shuffled.to_records(index=False)
    assert records.dtype.names == tuple(shuffled.columns)
    _assert_like_sklearn(bundle.score(records), model, frame)


def test_columns_the_bundle_does_not_use_are_ignored(wine_frame_model):
    bundle, model, frame = wine_frame_model
    extended = _shuffled(frame).assign(pallet_id=np.arange(len(frame)), note="ok")
    _assert_like_sklearn(bundle.score(extended), model, frame)


def test_missing_feature_is_an_error_naming_it(wine_frame_model):
    bundle, _, frame = wine_frame_model
    with pytest.raises(InputError, match=r"feature 'proline' is missing"):
        bundle.score(frame.drop(columns=["proline"]))
    columns = {name: frame[name].to_numpy() for name in frame.columns if name != "hue"}
    with pytest.raises(InputError, match=r"feature 'hue' is missing"):
        bundle.score(columns)


def test_non_numeric_column_is_an_error_naming_the_feature(wine_frame_model):
    bundle, _, frame = wine_frame_model
    with pytest.raises(InputError, match=r"feature 'hue': not numbers"):
        bundle.score(frame.assign(hue="pale"))


def test_columns_of_unequal_length_are_an_error(wine_frame_model):
    bundle, _, frame = wine_frame_model
    columns = {name: frame[name].to_numpy() for name in frame.columns}
    columns["hue"] = columns["hue"][:-1]
    with pytest.raises(InputError, match="differ in length"):
        bundle.score(columns)


def test_plain_arrays_and_unnamed_frames_stay_positional(wine_frame_model):
    bundle, model, frame = wine_frame_model
    _assert_like_sklearn(bundle.score(frame.to_numpy()), model, frame)
    _assert_like_sklearn(bundle.score(frame.to_numpy().tolist()), model, frame)
    # pd.DataFrame(X) numbers its columns 0, 1, ...: no feature names, read by position (scikit-learn too).
    _assert_like_sklearn(bundle.score(pd.DataFrame(frame.to_numpy())), model, frame)


def test_mixed_column_name_types_are_refused(wine_frame_model):
    bundle, _, frame = wine_frame_model
    mixed = frame.rename(columns={"hue": 7})
    with pytest.raises(InputError, match="mixes string and non-string column names"):
        bundle.score(mixed)


def test_export_refuses_reference_columns_in_another_order_than_the_model_was_fitted_on(tmp_path):
    frame, y = load_wine(return_X_y=True, as_frame=True)
    model = make_pipeline(StandardScaler(), SVC(C=2.0)).fit(frame, y)
    shuffled = _shuffled(frame)
    with pytest.raises(InputError, match="pass the reference columns in the model's order"):
        export_model(model, shuffled.to_numpy(), tmp_path / "bundle", features=list(shuffled.columns))
    assert not (tmp_path / "bundle").exists()


def test_a_feature_given_in_two_columns_is_an_error_naming_it(wine_frame_model):
    bundle, _, frame = wine_frame_model
    doubled = pd.concat([frame, frame[["hue"]]], axis=1)
    with pytest.raises(InputError, match=r"more than one column named 'hue'"):
        bundle.score(doubled)


@pytest.mark.parametrize("values", [
    lambda column: column.astype(np.complex128) + 1j,  # numpy would drop the imaginary part with a warning
    lambda column: np.full(len(column), np.datetime64("2026-12-01T00:00:00")),  # would become seconds since 1970
    lambda column: column.astype("timedelta64[s]"),
], ids=["complex", "datetime64", "timedelta64"])
def test_values_that_are_not_real_numbers_are_an_error_naming_the_feature(wine_frame_model, values):
    bundle, _, frame = wine_frame_model
    with pytest.raises(InputError, match=r"feature 'hue': not numbers"):
        bundle.score(frame.assign(hue=values(frame["hue"].to_numpy())))


def test_a_single_value_instead_of_a_column_is_an_error_saying_how_to_give_it(wine_frame_model):
    bundle, _, frame = wine_frame_model
    one_row = {name: float(frame[name].iloc[0]) for name in frame.columns}
    with pytest.raises(InputError, match=r"feature 'alcohol': expected a 1-D array of values, one per row, "
                                         r"got a single value; wrap it in a list"):
        bundle.score(one_row)
