"""``rbfgate score`` reads CSV as Python's csv module reads it, at Arrow's speed.

Reference: Python's ``csv`` module (RFC 4180 quoting: quoted commas, quotes and line breaks)
plus the reading rules the README states (blank lines skipped and not counted, rows numbered
from 1, more fields than the header refused as malformed, fewer fields leave features
missing) and the refusal policy as the service applies it: ``check_records(..., from_text)``, then
the domain verdict (``apply_outside_policy``). Generated files mix all of these and are read in
blocks far smaller than the file, so records cross block boundaries.
"""

from __future__ import annotations

import csv
import io

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import model_store.csv_source
from model_store.cli import main
from model_store.domain_policy import apply_outside_policy
from model_store.refusal import Problem, check_records, from_text

from .conftest import FEATURES, read_csv_rows

_GOOD = {"sepal_length_cm": "5.1", "sepal_width_cm": " 3.5", "petal_length_cm": "+1.4", "petal_width_cm": "2."}
_BAD = ["", "abc", "nan", "1e9", "-0", "1_0", "\u0661"]
_ID = st.sampled_from(["p1", "with,comma", 'with "quote"', "two\nlines", "crlf\r\ninside", "", "  "])
_BLANK = st.sampled_from(["", "   ", ",,,,", " , ,\t, ,"])


@st.composite
def _csv_file(draw):
    header = draw(st.permutations(["id", *FEATURES]))
    newline = draw(st.sampled_from(["\n", "\r\n"]))
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator=newline)
    writer.writerow(header)
    for _ in range(draw(st.integers(0, 40))):
        kind = draw(st.sampled_from(["row"] * 6 + ["short", "long", "blank"]))
        if kind == "blank":
            buffer.write(draw(_BLANK) + newline)
            continue
        fields = [draw(_ID) if name == "id" else draw(st.sampled_from([_GOOD[name]] * 12 + _BAD)) for name in header]
        if kind == "short":
            fields = fields[: draw(st.integers(1, len(fields) - 1))]
        elif kind == "long":
            fields = fields + ["7"] * draw(st.integers(1, 3))
        writer.writerow(fields)
    return buffer.getvalue()


def _reference(text: str, bundle) -> list[tuple[str, str, str, str]]:
    """(row, status, problems, id) per data row, read with Python's csv module."""
    reader = csv.reader(io.StringIO(text, newline=""))
    header = [name.strip() for name in next(reader)]
    out, number = [], 0
    for fields in reader:
        if not any(field.strip() for field in fields):
            continue
        number += 1
        record = dict(zip(header, fields))
        if len(fields) > len(header):
            problems = Problem("(row)", len(fields), "malformed_row", None).describe()
        else:
            # The record policy as the service applies it: ranges first, then the domain verdict.
            checked = check_records(bundle.manifest.features, [record], from_text, allow_extra=True)
            scores = bundle.scorer.score(checked.values) if len(checked.accepted) else None
            apply_outside_policy(checked, scores, "refuse")
            problems = "; ".join(p.describe() for p in checked.problems.get(0, []))
        out.append((str(number), "refused" if problems else "scored", problems, record.get("id", "")))
    return out


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(text=_csv_file(), block=st.sampled_from([128, 197, 512, 4096]))  # Arrow needs the header in one block
def test_generated_files_are_read_as_pythons_csv_module_reads_them(tmp_path_factory, iris_calibrated, text, block):
    bundle, _, _ = iris_calibrated
    folder = tmp_path_factory.mktemp("csv")
    source = folder / "in.csv"
    source.write_bytes(text.encode("utf-8"))
    original = model_store.csv_source.BLOCK_BYTES
    model_store.csv_source.BLOCK_BYTES = block
    try:
        assert main(["score", bundle.source, str(source), "--out", str(folder / "out.csv"), "--keep", "id"]) == 0
    finally:
        model_store.csv_source.BLOCK_BYTES = original
    got = [(r["row"], r["status"], r["problems"], r["id"]) for r in read_csv_rows(folder / "out.csv")]
    assert got == _reference(text, bundle)


def test_scored_rows_get_the_scorers_numbers_in_input_order(tmp_path, iris_calibrated, monkeypatch):
    bundle, model, X = iris_calibrated
    monkeypatch.setattr(model_store.csv_source, "BLOCK_BYTES", 256)
    lines = ["id," + ",".join(FEATURES)] + [f"r{i},{','.join(map(repr, row))}" for i, row in enumerate(X.tolist())]
    lines.insert(30, "")
    lines.insert(60, "short,1.0")
    (tmp_path / "in.csv").write_text("\n".join(lines) + "\n")
    assert main(["score", bundle.source, str(tmp_path / "in.csv"), "--out", str(tmp_path / "o.csv"), "--keep", "id"]) == 0
    rows = [r for r in read_csv_rows(tmp_path / "o.csv") if r["status"] == "scored"]
    assert [r["id"] for r in rows] == [f"r{i}" for i in range(len(X))]
    assert [r["label"] for r in rows] == model.predict(X).tolist()  # scikit-learn reference
    np.testing.assert_allclose([[float(r[f"probability[{c}]"]) for c in bundle.classes] for r in rows],
                               model.predict_proba(X), rtol=0, atol=1e-9)


def test_a_header_without_data_rows_gives_an_output_with_only_the_header(tmp_path, iris_calibrated, capsys):
    bundle, _, _ = iris_calibrated
    (tmp_path / "in.csv").write_text(",".join(FEATURES) + "\n")
    assert main(["score", bundle.source, str(tmp_path / "in.csv"), "--out", str(tmp_path / "o.csv")]) == 0
    assert read_csv_rows(tmp_path / "o.csv") == []
    assert "0 scored, 0 refused" in capsys.readouterr().err


@pytest.mark.parametrize("content, message", [
    (b"", "the file is empty"),
    (b"a,a\n1,2\n", "appears more than once"),
])
def test_unusable_headers_are_one_line_errors(tmp_path, iris_calibrated, capsys, content, message):
    bundle, _, _ = iris_calibrated
    (tmp_path / "in.csv").write_bytes(content)
    assert main(["score", bundle.source, str(tmp_path / "in.csv"), "--out", str(tmp_path / "o.csv")]) == 2
    err = capsys.readouterr().err
    assert message in err and err.count("\n") == 1
    assert not (tmp_path / "o.csv").exists()


def test_a_non_utf8_byte_is_named_by_its_line_even_inside_a_short_row(tmp_path, iris_calibrated, capsys):
    bundle, _, X = iris_calibrated
    good = ",".join(map(repr, X[0]))
    (tmp_path / "in.csv").write_bytes((",".join(FEATURES) + "\n" + (good + "\n") * 3).encode() + b"1,\xe9\n")
    assert main(["score", bundle.source, str(tmp_path / "in.csv"), "--out", str(tmp_path / "o.csv")]) == 2
    assert "line 5 is not UTF-8 text (byte 3 of the line)" in capsys.readouterr().err


def test_a_quoted_line_break_survives_a_block_boundary_after_its_carriage_return(tmp_path, iris_calibrated):
    """Found by the test above: Arrow drops the line feed of a quoted CR LF when a block ends
    between the two bytes; the reader never ends a block on a CR."""
    bundle, _, X = iris_calibrated
    ids = [f"line {i}\r\nnext" for i in range(30)]
    columns = {"id": ids, **{name: [repr(float(X[0, j]))] * 30 for j, name in enumerate(FEATURES)}}
    buffer = io.StringIO()
    csv.writer(buffer, lineterminator="\n").writerows([list(columns), *zip(*columns.values())])
    (tmp_path / "in.csv").write_bytes(buffer.getvalue().encode())
    for block in range(100, 140):  # some block boundary falls on every byte of a record
        source = model_store.csv_source.CsvSource(tmp_path / "in.csv", block_bytes=block)
        assert [v for chunk in source.chunks(["id"]) for v in chunk.columns["id"].to_pylist()] == ids, block
