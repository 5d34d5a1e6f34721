"""Every bad input gets its status and RFC 9457 problem details, never a 5xx.

Statuses (RFC 9110 section 15.5): 400 Bad Request (malformed JSON), 404 Not Found,
405 Method Not Allowed (with an Allow header, section 15.5.6), 413 Content Too Large
(section 15.5.14), 422 Unprocessable Content (section 15.5.21). JSON syntax: RFC 8259
(no NaN/Infinity literals, section 6; UTF-8, section 8.1). The TestClient re-raises any
exception that reaches the last-resort handler, so these tests also prove bad input never
gets there.
"""

from __future__ import annotations

import json

import pytest
from fastapi import FastAPI
from hypothesis import given, settings
from hypothesis import strategies as st

from service.problems import install_problem_handlers

from .conftest import TestClient, assert_problem

_GOOD = {"sepal_length_cm": 5.1, "sepal_width_cm": 3.5, "petal_length_cm": 1.4, "petal_width_cm": 0.2}


@pytest.fixture
def client(shared_client):
    return shared_client


def _post(client, body: bytes | str, path: str = "/score/iris"):
    return client.post(path, content=body.encode() if isinstance(body, str) else body)


@pytest.mark.parametrize(
    "body, mentions",
    [
        ('{"records": [{"sepal_length_cm": 5.1', "not valid JSON"),
        ('{"records": [{"sepal_length_cm": NaN}]}', "NaN"),
        ('{"records": [{"sepal_length_cm": Infinity}]}', "Infinity"),
        ('{"records": [{"sepal_length_cm": -Infinity}]}', "Infinity"),
        ('{"records": [{"sepal_length_cm": 1e400}]}', "64-bit float"),  # > 1.8e308, IEEE 754 binary64 max
        ('{"records": [{"sepal_length_cm": ' + "9" * 400 + "}]}", "64-bit float"),
        ('{"records": [{"sepal_length_cm": 5.1, "sepal_length_cm": 6.0}]}', "appears twice"),
        ("", "empty"),
        ("   ", "empty"),
    ],
)
def test_malformed_json_is_400(client, body, mentions):
    problem = assert_problem(_post(client, body), 400)
    assert mentions in problem["detail"]


def test_body_that_is_not_utf8_is_400(client):
    problem = assert_problem(_post(client, '{"records": [{"caf\u00e9": 1}]}'.encode("latin-1")), 400)
    assert "UTF-8" in problem["detail"]


def test_absurd_nesting_is_400_whether_shallow_or_deep(client):
    # 40 levels passes the JSON parser but not the service's depth limit; 100000 levels
    # would overflow a recursive parser and must still be a clean 400.
    for depth in (40, 100_000):
        body = '{"records": [{"sepal_length_cm": ' + "[" * depth + "]" * depth + "}]}"
        assert "nested too deeply" in assert_problem(_post(client, body), 400)["detail"]


@pytest.mark.parametrize(
    "document, pointer",
    [
        ([], "/"),
        ("records", "/"),
        ({}, "/records"),
        ({"records": {"sepal_length_cm": 5.1}}, "/records"),
        ({"records": "all of them"}, "/records"),
        ({"records": []}, "/records"),
        ({"records": [1.5]}, "/records/0"),
        ({"records": [_GOOD, None]}, "/records/1"),
        ({"records": [_GOOD], "explain": True}, "/explain"),
    ],
)
def test_wrong_shape_is_422_with_a_pointer(client, document, pointer):
    problem = assert_problem(client.post("/score/iris", json=document), 422)
    assert problem["problems"][0]["pointer"] == pointer  # RFC 6901 JSON pointer to the offending member


def test_body_over_the_size_limit_is_413(make_client, shared_store):
    client = make_client(shared_store.root, max_body_bytes=1024)
    body = json.dumps({"records": [_GOOD] * 40})  # about 4 KiB
    problem = assert_problem(client.post("/score/iris", content=body.encode()), 413)
    assert problem["limit_bytes"] == 1024


@pytest.mark.parametrize(
    "value, reason",
    [
        (None, "null"),
        (True, "not_a_number"),  # RFC 8259 section 3: true is a literal, not a number
        ("5.1", "not_a_number"),
        ({"cm": 5.1}, "not_a_number"),
        ([5.1], "not_a_number"),
        (100.0, "out_of_range"),
        (-3.0, "out_of_range"),
    ],
)
def test_each_bad_value_refuses_its_record(client, value, reason):
    bad = dict(_GOOD, sepal_length_cm=value)
    body = client.post("/score/iris", json={"records": [_GOOD, bad]}).json()
    assert [result["status"] for result in body["results"]] == ["scored", "refused"]
    [problem] = body["results"][1]["problems"]
    assert (problem["feature"], problem["reason"]) == ("sepal_length_cm", reason)
    assert len(problem["allowed"]) == 2


def test_missing_and_unknown_features_refuse_the_record(client):
    record = {key: value for key, value in _GOOD.items() if key != "petal_width_cm"} | {"petal_colour": 2.0}
    body = client.post("/score/iris", json={"records": [_GOOD, record]}).json()
    reasons = {(p["feature"], p["reason"]) for p in body["results"][1]["problems"]}
    assert reasons == {("petal_width_cm", "missing"), ("petal_colour", "unknown_feature")}


@pytest.mark.parametrize(
    "method, path",
    [
        ("POST", "/score/no-such-model"),
        ("POST", "/score/iris/versions/9.9.9"),
        ("POST", "/score/bad$name"),
        ("POST", "/score/iris/versions/..hidden"),
        ("GET", "/models/no-such-model"),
        ("GET", "/models/iris/versions/9.9.9"),
        ("GET", "/models/iris/versions/9.9.9/schema"),
        ("GET", "/no/such/route"),
        ("GET", "/models/"),
    ],
)
def test_unknown_model_version_or_route_is_404(client, method, path):
    assert_problem(client.request(method, path, json={"records": [_GOOD]}), 404)


def test_wrong_method_is_405_with_allow_header(client):
    response = client.get("/score/iris")
    assert_problem(response, 405)
    assert response.headers["allow"] == "POST"  # RFC 9110 section 15.5.6: MUST send Allow


def test_framework_validation_errors_become_problem_details():
    # The service's own routes validate bodies themselves; this checks the handler FastAPI uses
    # for its request validation (a query parameter that is not an integer).
    app = FastAPI()
    install_problem_handlers(app)

    @app.get("/count")
    def count(n: int) -> dict:
        return {"n": n}

    problem = assert_problem(TestClient(app).get("/count", params={"n": "many"}), 422)
    assert problem["problems"][0]["pointer"] == "/query/n"


def test_an_unexpected_exception_is_a_bare_500_problem():
    app = FastAPI()
    install_problem_handlers(app)

    @app.get("/boom")
    def boom() -> dict:
        raise RuntimeError("secret internals")

    response = TestClient(app, raise_server_exceptions=False).get("/boom")
    problem = assert_problem(response, 500)
    assert "secret internals" not in response.text and problem["type"] == "about:blank"


_json_values = st.recursive(
    st.none() | st.booleans() | st.floats(allow_nan=False, allow_infinity=False) | st.integers() | st.text(max_size=8),
    lambda children: st.lists(children, max_size=4) | st.dictionaries(st.text(max_size=8), children, max_size=4),
    max_leaves=20,
)
_records = st.lists(
    st.dictionaries(st.sampled_from([*_GOOD, "other"]), _json_values | st.floats(0, 8), max_size=5), max_size=5
)


@settings(max_examples=120, deadline=None)
@given(document=st.one_of(_json_values, st.fixed_dictionaries({"records": _records})))
def test_no_json_document_gets_a_5xx(shared_client, document):
    client = shared_client
    response = client.post("/score/iris", json=document)
    assert response.status_code in (200, 400, 413, 422)
    if response.status_code != 200:
        assert_problem(response, response.status_code)


@settings(max_examples=120, deadline=None)
@given(body=st.binary(max_size=64))
def test_no_byte_string_gets_a_5xx(shared_client, body):
    response = _post(shared_client, body)
    assert response.status_code in (200, 400, 413, 422)
    if response.status_code != 200:
        assert_problem(response, response.status_code)
