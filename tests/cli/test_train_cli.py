"""``rbfgate train``: a real fit on the demo data, and every bad CSV named by row and column (exit 2)."""

from __future__ import annotations

import csv

import numpy as np
import pytest
from sklearn.calibration import CalibratedClassifierCV
from sklearn.metrics import (
    accuracy_score,
    balanced_accuracy_score,
    brier_score_loss,
    confusion_matrix,
    f1_score,
    log_loss,
)
from sklearn.model_selection import StratifiedKFold, train_test_split
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler
from sklearn.svm import SVC

from model_store import load_bundle
from model_store.cli import main
from model_store.demo import FEATURES, TARGET, generate


def _write(path, header, rows):
    with open(path, "w", newline="") as handle:
        writer = csv.writer(handle)
        writer.writerow(header)
        writer.writerows(rows)
    return path


@pytest.fixture
def demo_csv(tmp_path):
    values, labels = generate(300, seed=3)
    return _write(tmp_path / "pallets.csv", [*FEATURES, TARGET], [[*row, label] for row, label in zip(values.tolist(), labels)])


def _train(data, out, *extra):
    return main(["train", str(data), "--target", TARGET, "--name", "pallets", "--version", "2", "--out", str(out), *extra])


def test_train_with_given_width_and_c_records_holdout_metrics(tmp_path, demo_csv):
    assert _train(demo_csv, tmp_path / "b", "--sigma", "1.5", "--C", "10", "--calibration", "isotonic") == 0
    manifest = load_bundle(tmp_path / "b").manifest
    assert manifest.kernel.gamma == pytest.approx(1 / (2 * 1.5**2), rel=1e-15)  # gamma = 1/(2 sigma^2)
    metrics = manifest.training["holdout_metrics"]
    assert metrics["rows"] == 75  # 25 % of 300, the default --test-size
    assert {"accuracy", "balanced_accuracy", "macro_f1", "log_loss", "brier_score", "confusion_matrix"} <= set(metrics)
    assert np.sum(metrics["confusion_matrix"]["counts"]) == 75
    assert manifest.calibration.method == "isotonic"


@pytest.mark.parametrize("calibration", ["none", "sigmoid"])
def test_train_holdout_metrics_equal_sklearn_metrics_of_the_same_fit(tmp_path, demo_csv, calibration):
    """Reference: the same model refitted with scikit-learn alone (the stratified split and the
    calibration folds made with the same seed), measured with sklearn.metrics on the holdout."""
    args = ("--gamma", "0.2", "--C", "5", "--calibration", calibration, "--seed", "4")
    assert _train(demo_csv, tmp_path / "b", *args) == 0
    recorded = load_bundle(tmp_path / "b").manifest.training["holdout_metrics"]

    values, labels = generate(300, seed=3)
    labels = np.asarray(labels)
    X_train, X_test, y_train, y_test = train_test_split(values, labels, test_size=0.25, stratify=labels, random_state=4)
    model = make_pipeline(StandardScaler(), SVC(C=5.0, gamma=0.2))
    if calibration != "none":
        # rbfgate train's folds: stratified, shuffled with the seed, min(5, rows of the smallest class).
        n_folds = min(5, int(np.unique(y_train, return_counts=True)[1].min()))
        folds = StratifiedKFold(n_splits=n_folds, shuffle=True, random_state=4)
        model = CalibratedClassifierCV(model, method=calibration, ensemble=False, cv=folds)
    model.fit(X_train, y_train)
    predicted = model.predict(X_test)
    classes = model.classes_.tolist()

    assert recorded["rows"] == len(y_test)
    assert recorded["accuracy"] == pytest.approx(accuracy_score(y_test, predicted), abs=1e-12)
    assert recorded["balanced_accuracy"] == pytest.approx(balanced_accuracy_score(y_test, predicted), abs=1e-12)
    assert recorded["macro_f1"] == pytest.approx(f1_score(y_test, predicted, average="macro"), abs=1e-12)
    assert recorded["confusion_matrix"]["labels"] == classes
    assert recorded["confusion_matrix"]["counts"] == confusion_matrix(y_test, predicted, labels=classes).tolist()
    if calibration == "none":
        assert "log_loss" not in recorded and "brier_score" not in recorded
    else:
        probabilities = model.predict_proba(X_test)
        assert recorded["log_loss"] == pytest.approx(log_loss(y_test, probabilities, labels=classes), rel=1e-9)
        # Brier (1950): summed over classes, i.e. scikit-learn's multiclass loss without the 1/2.
        brier = brier_score_loss(y_test, probabilities, labels=classes, scale_by_half=False)
        assert recorded["brier_score"] == pytest.approx(brier, rel=1e-9)


def test_train_searches_a_grid_when_width_and_c_are_not_given(tmp_path, demo_csv):
    assert _train(demo_csv, tmp_path / "b", "--calibration", "none") == 0
    search = load_bundle(tmp_path / "b").manifest.training["search"]
    assert len(search["results"]) == len(search["grid"]["C"]) * len(search["grid"]["gamma"])
    best = max(result["mean"] for result in search["results"])
    chosen = [r for r in search["results"] if r["C"] == search["C"] and r["gamma"] == search["gamma"]]
    assert chosen[0]["mean"] == best


def test_train_refuses_a_missing_target_column(tmp_path, demo_csv, capsys):
    code = main(["train", str(demo_csv), "--target", "verdict", "--name", "p", "--version", "1", "--out", str(tmp_path / "b")])
    assert code == 2
    assert "target column 'verdict' not found" in capsys.readouterr().err
    assert not (tmp_path / "b").exists()


def test_train_names_row_and_column_of_a_non_numeric_value(tmp_path, capsys):
    values, labels = generate(100, seed=1)
    rows = [[*row, label] for row, label in zip(values.tolist(), labels)]
    rows[41][2] = "humid"
    path = _write(tmp_path / "bad.csv", [*FEATURES, TARGET], rows)
    assert _train(path, tmp_path / "b") == 2
    err = capsys.readouterr().err
    assert "row 42" in err and "'humidity_pct'" in err and "'humid'" in err


def test_train_names_row_and_column_of_a_missing_value(tmp_path, capsys):
    values, labels = generate(100, seed=1)
    rows = [[*row, label] for row, label in zip(values.tolist(), labels)]
    rows[9][0] = ""
    path = _write(tmp_path / "bad.csv", [*FEATURES, TARGET], rows)
    assert _train(path, tmp_path / "b") == 2
    err = capsys.readouterr().err
    assert "row 10" in err and "'core_temp_c'" in err and "(empty)" in err


def test_train_refuses_a_single_class(tmp_path, capsys):
    values, _ = generate(50, seed=1)
    path = _write(tmp_path / "one.csv", [*FEATURES, TARGET], [[*row, "release"] for row in values.tolist()])
    assert _train(path, tmp_path / "b") == 2
    assert "only one class" in capsys.readouterr().err


def test_train_refuses_too_few_rows_of_a_class(tmp_path, capsys):
    values, _ = generate(40, seed=1)
    labels = ["release"] * 37 + ["hold"] * 3
    path = _write(tmp_path / "few.csv", [*FEATURES, TARGET], [[*row, label] for row, label in zip(values.tolist(), labels)])
    assert _train(path, tmp_path / "b") == 2
    err = capsys.readouterr().err
    assert "class 'hold' has 3 rows" in err and "row 38" in err and f"'{TARGET}'" in err


def test_train_refuses_sigma_and_gamma_together(tmp_path, demo_csv, capsys):
    with pytest.raises(SystemExit) as exit_info:
        _train(demo_csv, tmp_path / "b", "--sigma", "1", "--gamma", "1")
    assert exit_info.value.code == 2  # argparse's usage error


@pytest.mark.parametrize(
    "flags, message",
    [
        (["--sigma", "0"], "--sigma 0.0 must be a positive finite number"),
        (["--sigma", "1e-200"], "gives gamma = inf"),
        (["--gamma", "inf"], "--gamma inf must be a positive finite number"),
        (["--C", "inf"], "--C inf must be a positive finite number"),
        (["--C", "-1"], "--C -1.0 must be a positive finite number"),
        (["--seed", "-5"], "--seed -5 must be a whole number"),
        (["--test-size", "0.001"], "each side of the split needs at least one row of each of the 3 classes"),
        (["--test-size", "1.5"], "must be a fraction between 0 and 1"),
    ],
    ids=["sigma-zero", "sigma-underflow", "gamma-inf", "c-inf", "c-negative", "seed-negative", "tiny-holdout", "big-holdout"],
)
def test_train_refuses_unusable_settings_with_one_line(tmp_path, demo_csv, capsys, flags, message):
    assert _train(demo_csv, tmp_path / "b", *flags) == 2
    err = capsys.readouterr().err
    assert message in err and "Traceback" not in err and err.count("\n") == 1
    assert not (tmp_path / "b").exists()


def test_train_checks_the_name_before_searching(tmp_path, demo_csv, capsys):
    assert main(["train", str(demo_csv), "--target", TARGET, "--name", "../x", "--version", "1", "--out", str(tmp_path / "b")]) == 2
    assert "model name '../x' is not allowed" in capsys.readouterr().err


def test_train_into_a_path_below_a_file_is_one_line(tmp_path, demo_csv, capsys):
    blocker = tmp_path / "afile"
    blocker.write_text("x")
    assert _train(demo_csv, blocker / "b", "--gamma", "0.1", "--C", "1") == 2
    err = capsys.readouterr().err
    assert str(blocker) in err and "Traceback" not in err


def test_train_refuses_an_empty_file(tmp_path, capsys):
    path = tmp_path / "empty.csv"
    path.write_text("")
    assert _train(path, tmp_path / "b") == 2
    assert "empty" in capsys.readouterr().err


def test_train_refuses_a_missing_file(tmp_path, capsys):
    assert _train(tmp_path / "nope.csv", tmp_path / "b") == 2
    assert "no such file" in capsys.readouterr().err
