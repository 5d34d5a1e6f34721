"""``rbfgate export``: what it accepts, what it refuses (exit 2), and that it never half-writes.

Reference library: scikit-learn. Data: the iris data shipped with scikit-learn
(R. A. Fisher, 1936, UCI Iris).
"""

from __future__ import annotations

import csv
import json

import joblib
import numpy as np
import pytest
from sklearn.calibration import CalibratedClassifierCV
from sklearn.datasets import load_iris
from sklearn.decomposition import PCA
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler
from sklearn.svm import SVC

import model_store.exporter
from model_store import load_bundle
from model_store.cli import main

FEATURES = ["sepal_length", "sepal_width", "petal_length", "petal_width"]


@pytest.fixture
def iris_csv(tmp_path):
    X, y = load_iris(return_X_y=True)
    path = tmp_path / "iris.csv"
    with open(path, "w", newline="") as handle:
        writer = csv.writer(handle)
        writer.writerow([*FEATURES, "species"])
        writer.writerows([[*row, label] for row, label in zip(X.tolist(), y.tolist())])
    return path, X, y


def _dump(model, tmp_path, name="model.joblib"):
    path = tmp_path / name
    joblib.dump(model, path)
    return path


def _export(model_path, csv_path, out, *extra):
    return main(["export", str(model_path), "--reference", str(csv_path), "--name", "iris", "--version", "1",
                 "--out", str(out), "--target", "species", *extra])


def test_export_writes_a_bundle_that_scores_like_scikit_learn(tmp_path, iris_csv):
    path, X, y = iris_csv
    model = make_pipeline(StandardScaler(), SVC(C=2.0)).fit(X, y)
    assert _export(_dump(model, tmp_path), path, tmp_path / "out") == 0
    bundle = load_bundle(tmp_path / "out")
    np.testing.assert_array_equal(bundle.score(X).labels, model.predict(X))  # scikit-learn reference
    assert bundle.feature_names == FEATURES
    assert bundle.manifest.training["reference"]["rows"] == len(X)


def test_export_takes_feature_names_from_the_model_when_it_has_them(tmp_path, iris_csv):
    import pandas as pd

    path, X, y = iris_csv
    reordered = list(reversed(FEATURES))
    frame = pd.DataFrame(X, columns=FEATURES)[reordered]
    model = make_pipeline(StandardScaler(), SVC()).fit(frame, y)
    assert _export(_dump(model, tmp_path), path, tmp_path / "out") == 0
    bundle = load_bundle(tmp_path / "out")
    assert bundle.feature_names == reordered
    np.testing.assert_array_equal(bundle.score(frame.to_numpy()).labels, model.predict(frame))  # scikit-learn reference


@pytest.mark.parametrize(
    "model, message",
    [
        (SVC(kernel="linear"), "kernel is 'linear'"),
        (SVC(kernel="poly"), "kernel is 'poly'"),
        (CalibratedClassifierCV(SVC(), ensemble=True, cv=3), "ensemble=True"),
        (make_pipeline(StandardScaler(), PCA(n_components=3), SVC()), "pipeline steps"),
    ],
    ids=["linear", "poly", "ensemble", "extra-step"],
)
def test_export_refuses_unsupported_models_with_exit_2_and_writes_nothing(tmp_path, iris_csv, capsys, model, message):
    path, X, y = iris_csv
    model.fit(X, y)
    assert _export(_dump(model, tmp_path), path, tmp_path / "out") == 2
    assert message in capsys.readouterr().err
    assert not (tmp_path / "out").exists()


def test_export_refuses_an_unfitted_model(tmp_path, iris_csv, capsys):
    path, _, _ = iris_csv
    assert _export(_dump(SVC(), tmp_path), path, tmp_path / "out") == 2
    assert "not fitted" in capsys.readouterr().err
    assert not (tmp_path / "out").exists()


def test_export_refuses_a_file_that_is_not_a_model(tmp_path, iris_csv, capsys):
    path, _, _ = iris_csv
    garbage = tmp_path / "garbage.joblib"
    garbage.write_bytes(b"this is not a pickle")
    assert _export(garbage, path, tmp_path / "out") == 2
    assert "not a readable joblib model file" in capsys.readouterr().err


def test_export_refuses_a_pickled_object_that_is_not_an_estimator(tmp_path, iris_csv, capsys):
    path, _, _ = iris_csv
    assert _export(_dump({"not": "a model"}, tmp_path), path, tmp_path / "out") == 2
    assert "expected an SVC or NuSVC" in capsys.readouterr().err


def test_export_names_the_row_and_column_of_a_bad_reference_value(tmp_path, iris_csv, capsys):
    path, X, y = iris_csv
    lines = path.read_text().splitlines()
    fields = lines[5].split(",")
    fields[2] = "n/a"
    lines[5] = ",".join(fields)
    path.write_text("\n".join(lines) + "\n")
    model = make_pipeline(StandardScaler(), SVC()).fit(X, y)
    assert _export(_dump(model, tmp_path), path, tmp_path / "out") == 2
    err = capsys.readouterr().err
    assert "row 5" in err and "'petal_length'" in err and "'n/a'" in err
    assert not (tmp_path / "out").exists()


def test_export_refuses_an_existing_output_directory(tmp_path, iris_csv, capsys):
    path, X, y = iris_csv
    (tmp_path / "out").mkdir()
    (tmp_path / "out" / "keep.txt").write_text("mine")
    model = SVC().fit(X, y)
    assert _export(_dump(model, tmp_path), path, tmp_path / "out") == 2
    assert "already exists" in capsys.readouterr().err
    assert (tmp_path / "out" / "keep.txt").read_text() == "mine"


@pytest.mark.parametrize("bad", ["../escape", "a/b", ".hidden", "x" * 65, ""])
def test_export_refuses_unsafe_names(tmp_path, iris_csv, capsys, bad):
    path, X, y = iris_csv
    model = SVC().fit(X, y)
    code = main(["export", str(_dump(model, tmp_path)), "--reference", str(path), "--name", bad, "--version", "1",
                 "--out", str(tmp_path / "out"), "--target", "species"])
    assert code == 2
    assert "model name" in capsys.readouterr().err
    assert not (tmp_path / "out").exists()


def test_export_removes_the_output_and_exits_1_when_the_bundle_disagrees_with_scikit_learn(
    tmp_path, iris_csv, capsys, monkeypatch
):
    path, X, y = iris_csv
    model = SVC().fit(X, y)
    original = model_store.exporter._golden

    def skewed(parts, inputs):
        golden = original(parts, inputs)
        golden["decisions"][0][0] += 1e-6  # what a scorer bug would look like against scikit-learn
        return golden

    monkeypatch.setattr(model_store.exporter, "_golden", skewed)
    assert _export(_dump(model, tmp_path), path, tmp_path / "out") == 1
    assert "golden vector 0" in capsys.readouterr().err
    assert not (tmp_path / "out").exists()
    assert not any(tmp_path.glob(".out.*")), "the staging directory must be cleaned up too"


def test_export_applies_feature_info_units_and_bounds(tmp_path, iris_csv):
    path, X, y = iris_csv
    info = tmp_path / "info.json"
    info.write_text(json.dumps({"sepal_length": {"unit": "cm", "bounds": [4.5, 100]},
                                "petal_width": {"allowed": [0, 3]}}))
    model = SVC().fit(X, y)
    assert _export(_dump(model, tmp_path), path, tmp_path / "out", "--feature-info", str(info)) == 0
    features = {feature.name: feature for feature in load_bundle(tmp_path / "out").manifest.features}
    assert features["sepal_length"].unit == "cm"
    assert features["sepal_length"].allowed[0] == 4.5  # margin-widened 4.3 - 0.18 clipped up to the bound
    assert features["petal_width"].allowed == (0.0, 3.0)


def test_export_refuses_feature_info_for_an_unknown_feature(tmp_path, iris_csv, capsys):
    path, X, y = iris_csv
    info = tmp_path / "info.json"
    info.write_text(json.dumps({"wingspan": {"unit": "cm"}}))
    assert _export(_dump(SVC().fit(X, y), tmp_path), path, tmp_path / "out", "--feature-info", str(info)) == 2
    assert "'wingspan'" in capsys.readouterr().err
