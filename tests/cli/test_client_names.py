"""Export warns about names a generated typed client cannot keep apart: one line each on stderr,
and the same line in the manifest's ``training.notes``.

What each warning says about openapi-python-client (a generator of the OpenAPI community, not ours)
is checked by running it on the bundle's per-model document. Data: iris (R. A. Fisher, 1936,
shipped with scikit-learn), with invented feature names and labels.
"""

from __future__ import annotations

import json
import subprocess
import sys

import joblib
import numpy as np
import pytest
from conftest import export_model  # tests/conftest.py
from csv_files import write_csv
from sklearn.datasets import load_iris
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler
from sklearn.svm import SVC

from model_store import load_bundle
from model_store.api_document import api_document
from model_store.cli import main
from model_store.client_names import client_name_warnings, normalised


def _iris(labels):
    X, y = load_iris(return_X_y=True)
    named = np.array(labels, dtype=object)[y]
    return make_pipeline(StandardScaler(), SVC()).fit(X, named), X, named


def test_export_warns_once_per_clashing_group_on_stderr_and_in_the_notes(tmp_path, capsys):
    model, X, labels = _iris(["Setosa", "setosa", "virginica"])
    joblib.dump(model, tmp_path / "iris.joblib")
    header = ["petal-length", "petal.length", "ID", "width", "species"]
    reference = write_csv(tmp_path / "iris.csv", header, [[*row, label] for row, label in zip(X.tolist(), labels)])
    code = main(["export", str(tmp_path / "iris.joblib"), "--reference", str(reference), "--target", "species",
                 "--name", "iris", "--version", "1", "--out", str(tmp_path / "bundle")])
    assert code == 0
    # 150 iris rows may also draw the refusal estimate's warning (within chance of the bound): set aside.
    warned = [line for line in capsys.readouterr().err.splitlines()
              if line.startswith("warning: ") and not line.startswith("warning: the refusal policy is estimated")]
    assert [line.split(" are one name ")[0] for line in warned] == [
        "warning: feature 'petal-length' and feature 'petal.length'",
        "warning: feature 'ID' and the record id 'id'",
        "warning: class 'Setosa' and class 'setosa'",
    ]
    notes = load_bundle(tmp_path / "bundle").manifest.training["notes"]
    assert [f"warning: {note}" for note in notes if note in {line[9:] for line in warned}] == warned


def test_names_that_stay_distinct_give_no_warning():
    features = ["sepal_length_cm", "sepal_width_cm", "petal_length_cm", "petal_width_cm"]
    assert client_name_warnings(features, ["setosa", "versicolor", "virginica"]) == []
    assert client_name_warnings(features, [-1, 1]) == []  # integer labels are enum values, not member names


def test_the_normalised_name_folds_case_and_joins_runs_of_other_characters():
    assert {normalised(name) for name in ("a-b", "a_b", "A.B", "a -- b", "_a_b_")} == {"a_b"}
    assert normalised("x%") == normalised("x") == "x"


def _generate(bundle, workdir) -> tuple[int, str]:
    """Run openapi-python-client on the bundle's document; (exit code, the generated package path)."""
    (workdir / "document.json").write_text(json.dumps(api_document(bundle.manifest, bundle.digest)))
    (workdir / "config.json").write_text(json.dumps({"package_name_override": "client", "post_hooks": []}))
    done = subprocess.run(
        [sys.executable, "-m", "openapi_python_client", "generate", "--path", str(workdir / "document.json"),
         "--meta", "none", "--config", str(workdir / "config.json"), "--output-path", str(workdir / "client")],
        capture_output=True, text=True, timeout=300)
    return done.returncode, workdir / "client"


@pytest.mark.parametrize(("features", "kept"), [
    (["a-b", "a_b", "ID", "d"], True),   # retried with case kept: ab / a_b, ID / id
    (["a-b", "a.b", "c", "d"], False),   # both ab even then
])
def test_what_a_feature_warning_says_about_the_generator_holds(tmp_path, features, kept):
    model, X, labels = _iris(["x", "y", "z"])
    bundle = export_model(model, X, tmp_path / "bundle", y=labels, name="iris", version="1", features=features)
    warnings = client_name_warnings(bundle.feature_names, bundle.classes)
    assert warnings and all(("openapi-python-client 0.29 keeps them apart" in line) == kept for line in warnings)
    code, package = _generate(bundle, tmp_path)
    assert code == 0 and (package / "models" / "record.py").exists() == kept


@pytest.mark.parametrize(("labels", "kept"), [
    (["1-a", "1_a", "dog"], True),    # members VALUE_0, VALUE_1: by position, not by name
    (["Cat", "cat", "dog"], False),   # both CAT
    (["a-b", "a.b", "dog"], False),   # both A_B
])
def test_what_a_label_warning_says_about_the_generator_holds(tmp_path, labels, kept):
    model, X, named = _iris(labels)
    bundle = export_model(model, X, tmp_path / "bundle", y=named, name="iris", version="1")
    [warning] = client_name_warnings(bundle.feature_names, bundle.classes)
    assert ("openapi-python-client 0.29 keeps them apart" in warning) == kept
    code, package = _generate(bundle, tmp_path)
    enum = package / "models" / "label.py"
    complete = code == 0 and enum.exists() and all(json.dumps(label) in enum.read_text() for label in labels)
    assert complete == kept
