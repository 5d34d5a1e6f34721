"""The domain model from the command line: export with a holdout, the refusal report, CSV columns, the choice.

Reference library: scikit-learn. Data: the breast-cancer data shipped with scikit-learn (W. N. Street,
W. H. Wolberg, O. L. Mangasarian, 1993, UCI Breast Cancer Wisconsin (Diagnostic)), split 70/30.
"""

from __future__ import annotations

import csv
import json

import joblib
import numpy as np
import pytest
from sklearn.datasets import load_breast_cancer
from sklearn.model_selection import train_test_split
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler
from sklearn.svm import SVC

from model_store import load_bundle
from model_store.cli import main
from model_store.store import Store


def _write(path, X, y, names):
    with open(path, "w", newline="") as handle:
        writer = csv.writer(handle)
        writer.writerow([*names, "diagnosis"])
        writer.writerows([[*row, label] for row, label in zip(X.tolist(), y.tolist())])
    return path


@pytest.fixture
def cancer_files(tmp_path):
    data = load_breast_cancer()
    names = [name.replace(" ", "_") for name in data.feature_names]
    X_ref, X_hold, y_ref, y_hold = train_test_split(data.data, data.target, test_size=0.3, stratify=data.target,
                                                    random_state=0)
    model = make_pipeline(StandardScaler(), SVC()).fit(X_ref, y_ref)
    joblib.dump(model, tmp_path / "model.joblib")
    return {
        "model": tmp_path / "model.joblib",
        "reference": _write(tmp_path / "reference.csv", X_ref, y_ref, names),
        "holdout": _write(tmp_path / "holdout.csv", X_hold, y_hold, names),
        "names": names, "X_hold": X_hold, "y_hold": y_hold, "fitted": model,
    }


def _export(files, out, *extra):
    return main(["export", str(files["model"]), "--reference", str(files["reference"]), "--target", "diagnosis",
                 "--name", "cancer", "--version", "1", "--out", str(out), *extra])


def test_export_with_a_holdout_records_it_and_prints_the_refusal_report(cancer_files, tmp_path, capsys):
    assert _export(cancer_files, tmp_path / "b", "--holdout", str(cancer_files["holdout"])) == 0
    printed = capsys.readouterr().out
    bundle = load_bundle(tmp_path / "b")
    report = bundle.manifest.refusal_report
    assert report.holdout.rows == len(cancer_files["X_hold"]) and report.refuse_rate == 0.01
    assert f"holdout      {report.holdout.rows} rows: range 0.0 %" in printed
    accuracy = np.mean(cancer_files["fitted"].predict(cancer_files["X_hold"]) == cancer_files["y_hold"])
    assert bundle.manifest.training["holdout_metrics"]["accuracy"] == pytest.approx(accuracy)
    assert bundle.manifest.domain.calibration.source == "cross-fitting"


def test_export_warns_in_one_line_when_the_holdout_refusals_exceed_twice_the_target(cancer_files, tmp_path, capsys):
    # An allowed range that cuts off the upper quarter of a feature refuses far more than 2 %.
    info = tmp_path / "info.json"
    limit = float(np.quantile(cancer_files["X_hold"][:, 0], 0.75))
    info.write_text(json.dumps({cancer_files["names"][0]: {"allowed": [0, limit]}}))
    assert _export(cancer_files, tmp_path / "b", "--holdout", str(cancer_files["holdout"]),
                   "--feature-info", str(info)) == 0
    warnings = [line for line in capsys.readouterr().err.splitlines() if line.startswith("warning:")]
    assert len(warnings) == 1
    assert "the ranges refuse most" in warnings[0] and "--margin" in warnings[0]


def test_refuse_rate_outside_its_range_is_refused_with_the_fix(cancer_files, tmp_path, capsys):
    assert _export(cancer_files, tmp_path / "b", "--refuse-rate", "0.7") != 0
    assert "--refuse-rate 0.7" in capsys.readouterr().err
    assert not (tmp_path / "b").exists()




def test_score_writes_domain_columns_and_refuses_outside_rows_unless_flagged(cancer_files, tmp_path):
    assert _export(cancer_files, tmp_path / "b", "--holdout", str(cancer_files["holdout"])) == 0
    bundle = load_bundle(tmp_path / "b")
    low = np.array([feature.allowed[0] for feature in bundle.manifest.features])
    high = np.array([feature.allowed[1] for feature in bundle.manifest.features])
    rows = np.vstack([cancer_files["X_hold"][:10], (low + high) / 2 + 0.45 * (high - low) * np.sign(np.arange(30) % 2 - 0.5)])
    expected = bundle.score(rows)
    assert expected.in_range.all() and expected.domain_verdict[-1] == "outside"
    _write(tmp_path / "in.csv", rows, np.zeros(len(rows), int), cancer_files["names"])
    for flag, outside_status in (([], "refused"), (["--flag-outside"], "scored")):
        out = tmp_path / f"out{len(flag)}.csv"
        assert main(["score", str(tmp_path / "b"), str(tmp_path / "in.csv"), "--out", str(out), *flag]) == 0
        with open(out, newline="") as handle:
            written = list(csv.DictReader(handle))
        assert [row["domain_verdict"] for row in written] == expected.domain_verdict.tolist()
        assert [float(row["domain_score"]) for row in written] == expected.domain_score.tolist()
        outside = expected.domain_verdict == "outside"
        assert {row["status"] for row, odd in zip(written, outside) if odd} == {outside_status}
        assert {row["status"] for row, odd in zip(written, outside) if not odd} == {"scored"}


def test_the_outside_domain_choice_is_made_with_a_reason_and_kept_in_the_history(cancer_files, tmp_path, capsys):
    assert _export(cancer_files, tmp_path / "b") == 0
    store = tmp_path / "store"
    assert main(["publish", str(tmp_path / "b"), "--store", str(store), "--actor", "ci"]) == 0
    assert main(["outside-domain", "cancer", "flag", "--store", str(store), "--actor", "ci"]) != 0
    assert "reason must not be empty" in capsys.readouterr().err
    assert main(["outside-domain", "cancer", "flag", "--reason", "pilot", "--store", str(store), "--actor", "ci"]) == 0
    assert Store(store).outside_action("cancer") == "flag"
    assert main(["outside-domain", "cancer", "refuse", "--reason", "end of pilot", "--store", str(store),
                 "--actor", "ci"]) == 0
    actions = [(entry["action"], entry["reason"]) for entry in Store(store).history("cancer")]
    assert actions[-2:] == [("outside-domain-flag", "pilot"), ("outside-domain-refuse", "end of pilot")]
    assert Store(store).outside_action("cancer") == "refuse"
    capsys.readouterr()
    assert main(["outside-domain", "cancer", "--store", str(store)]) == 0
    assert "refused (outside_domain)" in capsys.readouterr().out


def test_export_names_the_dataset_size_when_the_estimate_exceeds_the_bound_within_chance(tmp_path, capsys):
    # 40 iris rows (Fisher 1936, shipped with scikit-learn): a 1 % budget is 0.4 rows, so the
    # estimate rests on a row or two. Reference for "within chance": scipy's Poisson upper tail.
    from scipy.stats import poisson
    from sklearn.datasets import load_iris

    X, y = load_iris(return_X_y=True)
    keep = np.random.default_rng(0).permutation(len(X))[:40]
    joblib.dump(make_pipeline(StandardScaler(), SVC()).fit(X[keep], y[keep]), tmp_path / "model.joblib")
    _write(tmp_path / "reference.csv", X[keep], y[keep], ["a", "b", "c", "d"])
    assert main(["export", str(tmp_path / "model.joblib"), "--reference", str(tmp_path / "reference.csv"),
                 "--target", "diagnosis", "--name", "iris", "--version", "1", "--out", str(tmp_path / "b")]) == 0
    warnings = [line for line in capsys.readouterr().err.splitlines() if line.startswith("warning:")]
    sample = load_bundle(tmp_path / "b").manifest.refusal_report.out_of_sample
    refused = round(sample.estimate.refused_total * sample.rows)
    assert sample.estimate.refused_total > 2 * 0.01 and poisson.sf(refused - 1, 2 * 0.01 * sample.rows) >= 0.05
    assert len(warnings) == 1 and "40 rows are too few to tell" in warnings[0], warnings


def test_inspect_shows_the_out_of_sample_estimate_and_the_margin(cancer_files, tmp_path, capsys):
    assert _export(cancer_files, tmp_path / "b") == 0
    capsys.readouterr()
    assert main(["inspect", str(tmp_path / "b")]) == 0
    printed = capsys.readouterr().out
    sample = load_bundle(tmp_path / "b").manifest.refusal_report.out_of_sample
    assert (f"new rows     estimated out of sample: range {100 * sample.estimate.refused_range:.1f} %, domain "
            f"{100 * sample.estimate.refused_domain:.1f} %, refused in total {100 * sample.estimate.refused_total:.1f} %"
            in printed)
    assert f"margin       {sample.margin:.4g} x each feature's span (chosen" in printed
