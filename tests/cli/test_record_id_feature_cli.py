"""A feature named ``id`` is refused at export and train: over HTTP ``"id"`` is the caller's record id.

The refusal is one line on stderr naming the feature and the fix, exit 2, and nothing is written.
Data: the invented demo pallets (model_store/demo.py) and iris (Fisher 1936, shipped with scikit-learn).
"""

from __future__ import annotations

import joblib
from csv_files import write_csv
from sklearn.datasets import load_iris
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler
from sklearn.svm import SVC

from model_store.cli import main
from model_store.demo import FEATURES, TARGET, generate


def _expect_refusal(capsys, exit_code, out):
    assert exit_code == 2
    message = capsys.readouterr().err.strip()
    assert len(message.splitlines()) == 1
    assert "'id'" in message and "reserved" in message and "rename" in message
    assert not out.exists()


def test_train_refuses_a_feature_named_id_before_fitting(tmp_path, capsys):
    values, labels = generate(120, seed=3)
    header = ["id", *FEATURES[1:], TARGET]
    data = write_csv(tmp_path / "pallets.csv", header, [[*row, label] for row, label in zip(values.tolist(), labels)])
    out = tmp_path / "bundle"
    exit_code = main(["train", str(data), "--target", TARGET, "--name", "p", "--version", "1", "--out", str(out),
                      "--sigma", "1", "--C", "1", "--calibration", "none"])
    _expect_refusal(capsys, exit_code, out)


def test_export_refuses_a_feature_named_id(tmp_path, capsys):
    X, y = load_iris(return_X_y=True)
    model_path = tmp_path / "iris.joblib"
    joblib.dump(make_pipeline(StandardScaler(), SVC()).fit(X, y), model_path)
    reference = write_csv(tmp_path / "iris.csv", ["id", "b", "c", "d"], X.tolist())
    out = tmp_path / "bundle"
    exit_code = main(["export", str(model_path), "--reference", str(reference), "--name", "iris", "--version", "1",
                      "--out", str(out)])
    _expect_refusal(capsys, exit_code, out)
