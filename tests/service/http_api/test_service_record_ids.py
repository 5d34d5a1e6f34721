"""Record ids over HTTP: ``"id"`` (a string of at most 128 characters, or an integer) is not a feature;
it is echoed on its record's result, scored or refused, and beside the record index in the flat
problem list of an all-refused answer. A bad id refuses only its own record, with a message naming
the rule it breaks and its limit.

The limit of 128 characters and the types come from the service's contract (README, "Scoring"),
the project's own rule. The integer limit is RFC 8259 section 6: integers in
[-(2**53)+1, (2**53)-1] are exact in every implementation that uses IEEE 754 doubles. Control
characters are Unicode general category Cc, read from Python's ``unicodedata`` (the Unicode
Character Database).
"""

from __future__ import annotations

import unicodedata

import pytest

from model_store.record_ids import ID_CONTROL_RANGES, MAX_ID_LENGTH, id_problem

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


@pytest.mark.parametrize("record_id", [True, None, 1.5, "", ["a"], {"a": 1}, 10**MAX_ID_LENGTH, 2**53])
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


_EXACT = 2**53 - 1  # RFC 8259 section 6


@pytest.mark.parametrize("text, echoed", [("-1.0", -1), ("7.0", 7), ("1e2", 100)])
def test_an_integral_number_with_a_fraction_part_is_the_integer_it_equals(shared_client, text, echoed):
    # JSON's data model does not tell 7 from 7.0 (RFC 8259 section 6), and JSON Schema 2020-12
    # counts 7.0 as an "integer" (validation section 6.1.1), so the published schema admits it.
    body = '{"records": [{"sepal_length_cm": 5.1, "sepal_width_cm": 3.5, "petal_length_cm": 1.4, ' \
           f'"petal_width_cm": 0.2, "id": {text}}}]}}'
    response = shared_client.post("/score/iris", content=body.encode(), headers={"Content-Type": "application/json"})
    [result] = _results(response)
    assert (result["status"], result["id"]) == ("scored", echoed)
    assert type(result["id"]) is int


@pytest.mark.parametrize("record_id", [_EXACT, -_EXACT, 0])
def test_an_integer_id_within_the_exactly_representable_range_is_scored(shared_client, record_id):
    [result] = _results(shared_client.post("/score/iris", json={"records": [{**GOOD_RECORD, "id": record_id}]}))
    assert (result["status"], result["id"]) == ("scored", record_id)


@pytest.mark.parametrize("record_id", [_EXACT + 1, -_EXACT - 1, 10**40])
def test_an_integer_id_beyond_2_to_the_53_is_refused_with_the_limit_in_its_message(shared_client, record_id):
    [result] = _results(shared_client.post("/score/iris", json={"records": [{**GOOD_RECORD, "id": record_id}]}), 422)
    [problem] = result["problems"]
    assert problem["reason"] == "invalid_id"
    assert str(_EXACT) in problem["message"] and "RFC 8259 section 6" in problem["message"]


@pytest.mark.parametrize("character", ["\x00", "\t", "\n", "\x1f", "\x7f", "\x85", "\x9f"])
def test_an_id_holding_a_control_character_is_refused_naming_the_character(shared_client, character):
    assert unicodedata.category(character) == "Cc"
    record = {**GOOD_RECORD, "id": f"pallet{character}7"}
    [problem] = _results(shared_client.post("/score/iris", json={"records": [record]}), 422)[0]["problems"]
    assert problem["reason"] == "invalid_id"
    assert f"U+{ord(character):04X} at character 7" in problem["message"] and "Cc" in problem["message"]


@pytest.mark.parametrize("character", ["\u00a0", "\u2028", "\u200b", "\u00e9"])
def test_an_id_holding_other_characters_outside_category_cc_is_scored(shared_client, character):
    assert unicodedata.category(character) != "Cc"  # Zs, Zl, Cf, Ll
    [result] = _results(shared_client.post("/score/iris", json={"records": [{**GOOD_RECORD, "id": f"p{character}"}]}))
    assert result["status"] == "scored"


def test_the_control_ranges_are_exactly_unicode_category_cc():
    cc = [code for code in range(0x110000) if unicodedata.category(chr(code)) == "Cc"]
    ranged = [code for low, high in ID_CONTROL_RANGES for code in range(low, high + 1)]
    assert ranged == cc


def test_an_id_too_long_says_the_limit_in_its_message(shared_client):
    record = {**GOOD_RECORD, "id": "x" * (MAX_ID_LENGTH + 1)}
    [problem] = _results(shared_client.post("/score/iris", json={"records": [record]}), 422)[0]["problems"]
    assert problem["message"] == id_problem("x" * (MAX_ID_LENGTH + 1))
    assert f"{MAX_ID_LENGTH + 1} characters" in problem["message"] and f"at most {MAX_ID_LENGTH}" in problem["message"]
