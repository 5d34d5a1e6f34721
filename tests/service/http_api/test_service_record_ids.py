"""Record ids over HTTP: ``"id"`` (a string or an integer, at most 128 characters) is not a feature; it
is echoed on its record's result, scored or refused, and beside the record index in the flat problem
list of an all-refused answer. A bad id refuses only its own record.

The limit of 128 characters and the types come from the service's contract (README, "Scoring");
they are the project's own rule, so the tests name them rather than cite a standard.
"""

from __future__ import annotations

import pytest

from model_store.refusal import MAX_ID_LENGTH

from .cases import GOOD_RECORD

_OUT_OF_RANGE = {**GOOD_RECORD, "petal_length_cm": 50.0}


def _results(response, status=200):
    assert response.status_code == status, response.text
    return response.json()["results"]


def test_a_thousand_records_with_ids_come_back_with_the_same_ids_in_order(shared_client):
    ids = [f"pallet-{index:04d}" if index % 3 else index for index in range(1000)]  # strings and integers
    refused = {index for index in range(1000) if index % 7 == 0}
    records = [{**(_OUT_OF_RANGE if index in refused else GOOD_RECORD), "id": ids[index]} for index in range(1000)]
    results = _results(shared_client.post("/score/iris", json={"records": records}))
    assert [result["id"] for result in results] == ids
    assert {index for index, result in enumerate(results) if result["status"] == "refused"} == refused


def test_an_all_refused_answer_lists_each_problem_with_its_record_id(shared_client):
    records = [{**_OUT_OF_RANGE, "id": f"r{index}"} for index in range(5)]
    body = shared_client.post("/score/iris", json={"records": records}).json()
    assert [result["id"] for result in body["results"]] == [f"r{index}" for index in range(5)]
    assert [(problem["record"], problem["id"]) for problem in body["problems"]] == [(i, f"r{i}") for i in range(5)]


def test_an_id_is_not_a_feature_and_does_not_change_the_scores(shared_client):
    plain, with_id = _results(shared_client.post("/score/iris", json={"records": [GOOD_RECORD, {**GOOD_RECORD, "id": 1}]}))
    assert {key: value for key, value in with_id.items() if key != "id"} == plain
    assert "id" not in plain  # no id sent, none echoed


def test_an_id_of_exactly_128_characters_is_accepted(shared_client):
    record_id = "x" * MAX_ID_LENGTH
    [result] = _results(shared_client.post("/score/iris", json={"records": [{**GOOD_RECORD, "id": record_id}]}))
    assert (result["status"], result["id"]) == ("scored", record_id)


def test_an_id_longer_than_128_characters_refuses_that_record_only(shared_client):
    records = [{**GOOD_RECORD, "id": "x" * (MAX_ID_LENGTH + 1)}, {**GOOD_RECORD, "id": "ok"}]
    long_one, ok = _results(shared_client.post("/score/iris", json={"records": records}))
    assert long_one["status"] == "refused" and "id" not in long_one
    [problem] = long_one["problems"]
    assert (problem["feature"], problem["reason"], problem["allowed"]) == ("id", "invalid_id", None)
    assert (ok["status"], ok["id"]) == ("scored", "ok")


@pytest.mark.parametrize("record_id", [True, None, 1.5, "", ["a"], {"a": 1}, 10**MAX_ID_LENGTH])
def test_an_id_that_is_not_a_short_string_or_integer_is_refused(shared_client, record_id):
    [result] = _results(shared_client.post("/score/iris", json={"records": [{**GOOD_RECORD, "id": record_id}]}), 422)
    assert [problem["reason"] for problem in result["problems"]] == ["invalid_id"]


def test_a_refused_record_keeps_its_id_beside_its_feature_problems(shared_client):
    records = [GOOD_RECORD, {**_OUT_OF_RANGE, "id": 42}]
    _, refused = _results(shared_client.post("/score/iris", json={"records": records}))
    assert (refused["id"], [problem["feature"] for problem in refused["problems"]]) == (42, ["petal_length_cm"])


def test_an_id_holding_a_lone_surrogate_is_refused_not_a_server_error(shared_client):
    # RFC 8259 section 8.2: "\\ud800" is valid JSON syntax but no Unicode character, so UTF-8 cannot echo it.
    body = '{"records": [{"sepal_length_cm": 5.1, "sepal_width_cm": 3.5, "petal_length_cm": 1.4, ' \
           '"petal_width_cm": 0.2, "id": "\\ud800"}]}'
    # I-JSON (RFC 7493 section 2.1) forbids it, so the body is refused at the boundary, like a lone
    # surrogate anywhere else in a body (service/body.py), with a 400 naming it.
    response = shared_client.post("/score/iris", content=body.encode("ascii"), headers={"Content-Type": "application/json"})
    assert response.status_code == 400, response.text
    assert response.headers["content-type"] == "application/problem+json"
    assert "unpaired UTF-16 surrogate \\ud800" in response.json()["detail"]
