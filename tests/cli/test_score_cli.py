"""``rbfgate score``, ``inspect`` and ``verify`` on a bundle exported from scikit-learn.

Reference: scikit-learn's predict / decision_function / predict_proba of the
fitted model on the iris data shipped with scikit-learn (R. A. Fisher, 1936).
"""

from __future__ import annotations

import csv
import json
import math
import subprocess
import sys

import numpy as np
import pytest

import model_store.csv_source
from model_store.cli import main

FEATURES = ["sepal_length_cm", "sepal_width_cm", "petal_length_cm", "petal_width_cm"]


def _write(path, header, rows):
    with open(path, "w", newline="") as handle:
        writer = csv.writer(handle)
        writer.writerow(header)
        writer.writerows(rows)
    return path


def _read(path):
    with open(path, newline="") as handle:
        return list(csv.DictReader(handle))


def test_score_matches_scikit_learn_row_by_row(tmp_path, iris_calibrated, capsys):
    bundle, model, X = iris_calibrated
    source = _write(tmp_path / "in.csv", ["id", *FEATURES], [[f"r{i}", *row] for i, row in enumerate(X.tolist())])
    assert main(["score", bundle.source, str(source), "--out", str(tmp_path / "out.csv")]) == 0
    rows = _read(tmp_path / "out.csv")
    assert [row["row"] for row in rows] == [str(i) for i in range(1, len(X) + 1)]
    assert [row["label"] for row in rows] == model.predict(X).tolist()  # scikit-learn reference
    probabilities = np.array([[float(row[f"probability[{c}]"]) for c in bundle.classes] for row in rows])
    np.testing.assert_allclose(probabilities, model.predict_proba(X), rtol=0, atol=1e-9)
    decisions = np.array([[float(row[f"decision[{c}]"]) for c in bundle.classes] for row in rows])
    inner = model.calibrated_classifiers_[0].estimator  # the pipeline whose decision_function was calibrated
    np.testing.assert_allclose(decisions, inner.decision_function(X), rtol=0, atol=1e-9)  # scikit-learn reference
    assert f"{len(X)} scored, 0 refused" in capsys.readouterr().err


def test_score_refuses_bad_rows_and_scores_the_rest_in_order(tmp_path, iris_calibrated, capsys):
    bundle, _, X = iris_calibrated
    good = X[0].tolist()
    high = bundle.manifest.features[2].allowed[1]
    rows = [
        good,
        [good[0], "", good[2], good[3]],
        [good[0], "abc", good[2], good[3]],
        [good[0], "nan", good[2], good[3]],
        [good[0], "inf", good[2], good[3]],
        [good[0], good[1], high + 1.0, good[3]],
        good,
    ]
    source = _write(tmp_path / "in.csv", FEATURES, rows)
    assert main(["score", bundle.source, str(source), "--out", str(tmp_path / "out.csv")]) == 0
    out = _read(tmp_path / "out.csv")
    assert [row["status"] for row in out] == ["scored", "refused", "refused", "refused", "refused", "refused", "scored"]
    problems = [row["problems"] for row in out]
    assert problems[1] == "sepal_width_cm: missing"
    assert problems[2] == "sepal_width_cm='abc': not a number"
    assert "not finite" in problems[3] and "not finite" in problems[4]
    assert problems[5].startswith(f"petal_length_cm={high + 1.0} outside [")
    assert out[1]["label"] == "" and out[1]["nearest_distance"] == ""
    assert "2 scored, 5 refused" in capsys.readouterr().err


def test_score_refuses_a_row_with_more_fields_than_the_header(tmp_path, iris_calibrated):
    bundle, _, X = iris_calibrated
    source = tmp_path / "in.csv"
    row = ",".join(map(str, X[0]))
    source.write_text(",".join(FEATURES) + "\n" + row + "\n" + row + ",7\n")
    assert main(["score", bundle.source, str(source), "--out", str(tmp_path / "out.csv")]) == 0
    out = _read(tmp_path / "out.csv")
    assert [r["status"] for r in out] == ["scored", "refused"]
    assert "more than the header" in out[1]["problems"]


def test_score_results_do_not_depend_on_the_chunk_size(tmp_path, iris_calibrated, monkeypatch):
    bundle, _, X = iris_calibrated
    source = _write(tmp_path / "in.csv", FEATURES, X.tolist())
    assert main(["score", bundle.source, str(source), "--out", str(tmp_path / "whole.csv")]) == 0
    monkeypatch.setattr(model_store.csv_source, "BLOCK_BYTES", 128)  # blocks of about 7 rows
    assert main(["score", bundle.source, str(source), "--out", str(tmp_path / "chunked.csv")]) == 0
    whole, chunked = _read(tmp_path / "whole.csv"), _read(tmp_path / "chunked.csv")
    exact = ["row", "status", "label", "nearest_distance", "nearest_label", "nearest_percentile", "problems"]
    assert [[row[key] for key in exact] for row in whole] == [[row[key] for key in exact] for row in chunked]
    # BLAS picks its kernel by matrix size, so kernel sums may differ in the last bits
    # (see model_store/scoring.py); they agree far inside the 1e-9 golden tolerance.
    numeric = [key for key in whole[0] if key.startswith(("decision", "probability"))]
    np.testing.assert_allclose([[float(r[k]) for k in numeric] for r in chunked],
                               [[float(r[k]) for k in numeric] for r in whole], rtol=1e-12, atol=1e-14)


def test_score_refuses_a_file_without_a_feature_column_and_writes_nothing(tmp_path, iris_calibrated, capsys):
    bundle, _, X = iris_calibrated
    source = _write(tmp_path / "in.csv", FEATURES[:3], X[:, :3].tolist())
    assert main(["score", bundle.source, str(source), "--out", str(tmp_path / "out.csv")]) == 2
    assert "feature column 'petal_width_cm' not found" in capsys.readouterr().err
    assert list(tmp_path.iterdir()) == [source]


def test_score_leaves_an_existing_output_untouched_when_it_fails(tmp_path, iris_calibrated, monkeypatch):
    bundle, _, X = iris_calibrated
    monkeypatch.setattr(model_store.csv_source, "BLOCK_BYTES", 128)  # rows are written before the bad byte
    out = tmp_path / "out.csv"
    out.write_text("previous results\n")
    source = tmp_path / "in.csv"
    good = b"".join(b",".join(str(v).encode() for v in row) + b"\n" for row in X.tolist()) * 20  # past 8 KiB
    source.write_bytes(b",".join(f.encode() for f in FEATURES) + b"\n" + good + b"\xff\xfe,1,1,1\n")
    assert main(["score", bundle.source, str(source), "--out", str(out)]) == 2
    assert out.read_text() == "previous results\n"
    assert [p.name for p in tmp_path.iterdir() if p.name.startswith(".")] == []


@pytest.mark.parametrize("target", ["missing-folder/out.csv", "."], ids=["missing-folder", "a-directory"])
def test_score_refuses_an_unusable_output_path_with_one_line(tmp_path, iris_calibrated, capsys, target):
    bundle, _, X = iris_calibrated
    source = _write(tmp_path / "in.csv", FEATURES, X[:3].tolist())
    assert main(["score", bundle.source, str(source), "--out", str(tmp_path / target)]) == 2
    err = capsys.readouterr().err
    assert "--out" in err and "Traceback" not in err


def test_score_output_follows_the_umask_not_a_private_mode(tmp_path, iris_calibrated):
    import os

    bundle, _, X = iris_calibrated
    source = _write(tmp_path / "in.csv", FEATURES, X[:3].tolist())
    previous = os.umask(0o022)
    try:
        assert main(["score", bundle.source, str(source), "--out", str(tmp_path / "o.csv")]) == 0
    finally:
        os.umask(previous)
    assert (tmp_path / "o.csv").stat().st_mode & 0o777 == 0o644


def test_score_names_the_exact_line_of_a_byte_that_is_not_utf8(tmp_path, iris_calibrated, capsys):
    bundle, _, X = iris_calibrated
    lines = [",".join(FEATURES)] + [",".join(map(str, row)) for row in X.tolist()] * 40  # about 100 KB
    lines[5001] = "\udcff"
    source = tmp_path / "in.csv"
    source.write_bytes("\n".join(lines).encode("utf-8", "surrogateescape") + b"\n")
    assert main(["score", bundle.source, str(source), "--out", str(tmp_path / "o.csv")]) == 2
    assert "line 5002 is not UTF-8" in capsys.readouterr().err
    assert not (tmp_path / "o.csv").exists()


@pytest.mark.parametrize("text", ["1_0", "\u0661.\u0663", "0x10", "1e", "--1"])
def test_score_refuses_text_that_float_would_take_but_is_not_a_plain_number(tmp_path, iris_calibrated, text):
    """Python's float() accepts '1_0' and Arabic-Indic digits; a CSV number is ASCII decimal."""
    bundle, _, X = iris_calibrated
    row = [str(value) for value in X[0]]
    row[1] = text
    source = tmp_path / "in.csv"
    source.write_text(",".join(FEATURES) + "\n" + ",".join(row) + "\n", encoding="utf-8")
    assert main(["score", bundle.source, str(source), "--out", str(tmp_path / "o.csv")]) == 0
    assert _read(tmp_path / "o.csv")[0]["status"] == "refused"


def test_score_skips_blank_lines_and_counts_data_rows(tmp_path, iris_calibrated):
    bundle, _, X = iris_calibrated
    row = ",".join(map(str, X[0]))
    source = tmp_path / "in.csv"
    source.write_text(",".join(FEATURES) + "\r\n" + row + "\r\n\r\n" + row + "\r\n")
    assert main(["score", bundle.source, str(source), "--out", str(tmp_path / "o.csv")]) == 0
    assert [(r["row"], r["status"]) for r in _read(tmp_path / "o.csv")] == [("1", "scored"), ("2", "scored")]


def test_score_reports_a_missing_bundle(tmp_path, capsys):
    source = _write(tmp_path / "in.csv", FEATURES, [[1, 2, 3, 4]])
    assert main(["score", str(tmp_path / "nothing"), str(source), "--out", str(tmp_path / "o.csv")]) == 2
    assert "no such bundle" in capsys.readouterr().err


def test_inspect_json_reports_kernel_width_in_raw_units(iris_calibrated, capsys):
    bundle, model, _ = iris_calibrated
    assert main(["inspect", bundle.source, "--json"]) == 0
    description = json.loads(capsys.readouterr().out)
    assert description["digest"] == bundle.digest
    assert description["classes"] == ["setosa", "versicolor", "virginica"]
    gamma = description["kernel"]["gamma"]
    sigma = description["kernel"]["sigma"]
    assert math.isclose(gamma, 1 / (2 * sigma**2), rel_tol=1e-12)  # Schoelkopf & Smola, Learning with Kernels, 2002
    scaler = model.calibrated_classifiers_[0].estimator.named_steps["standardscaler"]
    widths = [feature["kernel_width_raw"] for feature in description["features"]]
    np.testing.assert_allclose(widths, sigma * scaler.scale_, rtol=1e-12)


def test_inspect_text_lists_every_feature(iris_calibrated, capsys):
    bundle, _, _ = iris_calibrated
    assert main(["inspect", bundle.source]) == 0
    out = capsys.readouterr().out
    assert all(name in out for name in FEATURES) and bundle.digest in out


def test_inspect_refuses_max_records_without_openapi_instead_of_ignoring_it(iris_calibrated, capsys):
    bundle, _, _ = iris_calibrated
    assert main(["inspect", bundle.source, "--max-records", "50"]) == 2
    [line] = capsys.readouterr().err.splitlines()
    assert "--max-records 50" in line and "add --openapi" in line


def test_inspect_openapi_sets_max_records_as_the_request_limit(iris_calibrated, capsys):
    bundle, _, _ = iris_calibrated
    assert main(["inspect", bundle.source, "--openapi", "--max-records", "50"]) == 0
    document = json.loads(capsys.readouterr().out)
    assert document["components"]["schemas"]["ScoreRequest"]["properties"]["records"]["maxItems"] == 50


def test_verify_passes_a_sound_bundle_and_names_a_damaged_file(tmp_path, iris_calibrated, capsys):
    import shutil

    bundle, _, _ = iris_calibrated
    copy = tmp_path / "copy"
    shutil.copytree(bundle.source, copy)
    assert main(["verify", str(copy)]) == 0
    target = copy / "dual_coef.npy"
    data = bytearray(target.read_bytes())
    data[-1] ^= 0x01
    target.write_bytes(bytes(data))
    assert main(["verify", str(copy)]) == 1
    assert "dual_coef.npy" in capsys.readouterr().err


def test_console_script_runs_without_a_traceback(tmp_path):
    result = subprocess.run([sys.executable, "-m", "model_store", "verify", str(tmp_path / "missing")],
                            capture_output=True, text=True, timeout=60)
    assert result.returncode == 2
    assert "Traceback" not in result.stderr and "no such bundle" in result.stderr


@pytest.mark.parametrize("command", [["score"], ["inspect"], ["export", "m.joblib"], ["train", "d.csv"]])
def test_missing_arguments_are_a_usage_error(command):
    with pytest.raises(SystemExit) as exit_info:
        main(command)
    assert exit_info.value.code == 2


def test_pack_writes_the_single_file_form_with_the_same_digest(tmp_path, iris_calibrated, capsys):
    bundle, _, X = iris_calibrated
    out = tmp_path / "iris.tar"
    assert main(["pack", bundle.source, "--out", str(out)]) == 0
    from model_store import load_bundle

    packed = load_bundle(out)
    assert packed.digest == bundle.digest  # the digest is the canonical manifest's SHA-256
    assert packed.score(X).labels.tolist() == bundle.score(X).labels.tolist()
    assert main(["pack", bundle.source, "--out", str(out)]) == 2  # never overwrites
    assert "already exists" in capsys.readouterr().err


def test_score_matches_csv_columns_by_name_in_any_order(tmp_path, iris_calibrated):
    # The same rule as Bundle.score on a DataFrame: features by header name, extra columns ignored.
    bundle, model, X = iris_calibrated
    order = [2, 0, 3, 1]
    header = ["note", *[FEATURES[i] for i in order]]
    source = _write(tmp_path / "in.csv", header, [["x", *row] for row in X[:, order].tolist()])
    assert main(["score", bundle.source, str(source), "--out", str(tmp_path / "out.csv")]) == 0
    rows = _read(tmp_path / "out.csv")
    assert [row["label"] for row in rows] == model.predict(X).tolist()  # scikit-learn on the fitted order
    probabilities = np.array([[float(row[f"probability[{c}]"]) for c in bundle.classes] for row in rows])
    np.testing.assert_allclose(probabilities, model.predict_proba(X), rtol=0, atol=1e-9)
