"""The service benchmark's bodies and answer checks (default suite: no server, no load).

The column-form body must hold the record-form body's rows, and ``check_agreement`` must reject a
column-form answer that is short, refused a row, disagrees with the reference, or differs in any
value from rbfgate's own record-form answer for the same rows.
"""

from __future__ import annotations

import copy
import json
import re
from types import SimpleNamespace

import numpy as np
import pytest

from .service_bench import _write_bodies, check_agreement, rows_of_columns

_HEAD = {"model": "svc", "version": "1.0.0", "bundle_sha256": "ab" * 32}


def _nearest(distance, label, index):
    return {"distance": distance, "similarity": 1.0 - distance, "label": label, "index": index, "percentile": 0.25}


def _answers():
    reference = {"results": [{"label": 1, "decision": 0.75}, {"label": 0, "decision": -1.5}]}
    rbfgate = {**_HEAD, "results": [
        {"status": "scored", "label": 1, "decision": 0.75, "probability": None,
         "nearest_support": _nearest(0.5, 1, 7), "domain": {"verdict": "typical", "score": 0.125}},
        {"status": "scored", "label": 0, "decision": -1.5, "probability": None,
         "nearest_support": _nearest(0.25, 0, 3), "domain": {"verdict": "unusual", "score": 2.5}},
    ]}
    columns = {**_HEAD, "refused": [], "columns": {
        "status": ["scored", "scored"], "label": [1, 0], "decision": [0.75, -1.5], "probability": None,
        "nearest_support": {"distance": [0.5, 0.25], "similarity": [0.5, 0.75], "label": [1, 0], "index": [7, 3],
                            "percentile": [0.25, 0.25]},
        "domain": {"verdict": ["typical", "unusual"], "score": [0.125, 2.5]},
    }}
    return {"rbfgate": rbfgate, "reference": reference}, columns


def test_rows_of_columns_reads_nested_and_null_columns_row_by_row():
    _, columns = _answers()
    rows = rows_of_columns(columns["columns"], 2)
    assert rows[1] == {"status": "scored", "label": 0, "decision": -1.5, "probability": None,
                       "nearest_support": _nearest(0.25, 0, 3), "domain": {"verdict": "unusual", "score": 2.5}}


def test_agreeing_answers_pass():
    answers, columns = _answers()
    check_agreement(answers, columns, 2)
    check_agreement(answers, None, 2)  # the single-record case has no column form


def _spoiled(change):
    answers, columns = _answers()
    change(answers, columns)
    return answers, columns


@pytest.mark.parametrize("change, message", [
    # one ulp off in a diagnostic: within any tolerance, but not the record form's value
    (lambda a, c: c["columns"]["nearest_support"].__setitem__("distance", [0.5, float(np.nextafter(0.25, 1.0))]),
     "differs from the record form"),
    # one ulp off in the decision: still within GOLDEN_TOLERANCE of the reference
    (lambda a, c: c["columns"].__setitem__("decision", [0.75, float(np.nextafter(-1.5, 0.0))]),
     "differs from the record form"),
    (lambda a, c: c["columns"].__setitem__("label", [1]), "/columns/label has 1 entries for 2 rows"),
    (lambda a, c: c["columns"]["domain"].__setitem__("score", [0.125, 2.5, 0.0]), "/columns/domain/score has 3 entries"),
    (lambda a, c: c["columns"].__setitem__("status", ["scored", "refused"]), "differs from the record form"),
    (lambda a, c: c.__setitem__("refused", [{"row": 1, "problem_count": 1, "problems": None}]), "refused rows"),
    (lambda a, c: c.pop("refused"), "refused rows"),
    (lambda a, c: c.__setitem__("bundle_sha256", "cd" * 32), "answered the members"),
    (lambda a, c: c.__setitem__("refusals", []), "answered the members"),
    (lambda a, c: c.__setitem__("columns", []), "not an object of columns"),
    # both of rbfgate's forms agree with each other but not with the reference
    (lambda a, c: (a["rbfgate"]["results"][0].__setitem__("label", 0), c["columns"].__setitem__("label", [0, 0])),
     "disagrees with the reference"),
    (lambda a, c: (a["rbfgate"]["results"][1].__setitem__("decision", -1.25),
                   c["columns"].__setitem__("decision", [0.75, -1.25])), "decision -1.25 vs -1.5"),
    (lambda a, c: a["rbfgate"]["results"].pop(), "rbfgate returned 1 results for 2 records"),
])
def test_a_column_form_answer_that_does_not_agree_is_rejected(change, message):
    answers, columns = _spoiled(change)
    with pytest.raises(RuntimeError, match=re.escape(message)):
        check_agreement(answers, columns, 2)


def test_a_refused_record_form_answer_is_rejected_even_without_a_column_form():
    answers, _ = _answers()
    answers["rbfgate"] = copy.deepcopy(answers["rbfgate"])
    answers["rbfgate"]["results"][0]["status"] = "refused"
    with pytest.raises(RuntimeError, match="disagrees with the reference"):
        check_agreement(answers, None, 2)


def test_the_column_form_body_holds_the_record_form_rows(tmp_path):
    reference = np.array([[0.1, 1.0], [9.0, 9.0], [0.3, 3.0], [0.7, 1e-5]])
    bundle = SimpleNamespace(feature_names=["a", "b"], score=lambda X: SimpleNamespace(
        in_range=np.array([True, False, True, True]), domain_verdict=np.array(["typical", "typical", "outside", "unusual"])))
    bodies = _write_bodies(tmp_path, bundle, reference, [1, 3])
    assert set(bodies[1]) == {"records"}  # the single-record case stays the record form
    assert set(bodies[3]) == {"records", "columns"}
    records = json.loads(bodies[3]["records"].read_text())["records"]
    columns = json.loads(bodies[3]["columns"].read_text())
    assert records == [{"a": 0.1, "b": 1.0}, {"a": 0.7, "b": 1e-5}, {"a": 0.1, "b": 1.0}]  # answered rows, repeated
    assert list(columns) == ["columns"]
    assert columns["columns"] == {"a": [0.1, 0.7, 0.1], "b": [1.0, 1e-5, 1.0]}
    assert rows_of_columns(columns["columns"], 3) == records
