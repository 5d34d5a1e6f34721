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

from .cases import BAD_VALUES, GOOD_RECORD, MALFORMED_BODIES, NOT_FOUND, WRONG_SHAPES, assert_problem
from .conftest import TestClient


@pytest.fixture
def client(shared_client):
    return shared_client


def _post(client, body: bytes | str, path: str = "/score/iris"):
    return client.post(path, content=body.encode() if isinstance(body, str) else body)


@pytest.mark.parametrize("body, mentions", MALFORMED_BODIES)
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


@pytest.mark.parametrize("document, pointer", WRONG_SHAPES)
def test_wrong_shape_is_422_with_a_pointer(client, document, pointer):
    problem = assert_problem(client.post("/score/iris", json=document), 422)
    assert problem["problems"][0]["pointer"] == pointer  # RFC 6901 JSON pointer to the offending member


def test_body_over_the_size_limit_is_413(make_client, shared_store):
    client = make_client(shared_store.root, max_body_bytes=1024)
    body = json.dumps({"records": [GOOD_RECORD] * 40})  # about 4 KiB
    problem = assert_problem(client.post("/score/iris", content=body.encode()), 413)
    assert problem["limit_bytes"] == 1024


@pytest.mark.parametrize("value, reason", BAD_VALUES)
def test_each_bad_value_refuses_its_record(client, value, reason):
    bad = dict(GOOD_RECORD, sepal_length_cm=value)
    body = client.post("/score/iris", json={"records": [GOOD_RECORD, bad]}).json()
    assert [result["status"] for result in body["results"]] == ["scored", "refused"]
    [problem] = body["results"][1]["problems"]
    assert (problem["feature"], problem["reason"]) == ("sepal_length_cm", reason)
    assert len(problem["allowed"]) == 2


def test_missing_and_unknown_features_refuse_the_record(client):
    record = {key: value for key, value in GOOD_RECORD.items() if key != "petal_width_cm"} | {"petal_colour": 2.0}
    body = client.post("/score/iris", json={"records": [GOOD_RECORD, record]}).json()
    reasons = {(p["feature"], p["reason"]) for p in body["results"][1]["problems"]}
    assert reasons == {("petal_width_cm", "missing"), ("petal_colour", "unknown_feature")}


@pytest.mark.parametrize("method, path", NOT_FOUND)
def test_unknown_model_version_or_route_is_404(client, method, path):
    assert_problem(client.request(method, path, json={"records": [GOOD_RECORD]}), 404)


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


def test_a_bug_in_the_app_is_logged_counted_and_answered_with_a_bare_500(shared_store):
    from service.app import create_app
    from service.settings import Settings

    logs: list[dict] = []
    app = create_app(Settings(store_root=shared_store.root, poll_seconds=3600.0), environ={}, write_log=logs.append)
    with TestClient(app, raise_server_exceptions=False) as client:
        def broken(name):
            raise RuntimeError("registry internals")

        app.state.services.registry.serving = broken  # simulate a bug, not an input
        response = client.post("/score/iris", json={"records": [GOOD_RECORD]})
        metrics = client.get("/metrics").text
    assert assert_problem(response, 500)["type"] == "about:blank" and "internals" not in response.text
    assert [event["status"] for event in logs if event["event"] == "request"][0] == 500
    assert 'rbfgate_http_requests_total{method="POST",route="/score/{model}",status="500"} 1.0' in metrics


# Text from every Unicode category, surrogates (Cs) included: json.dumps escapes a lone one as
# "\\ud800", which is valid JSON syntax but not Unicode text (RFC 7493 section 2.1).
_any_text = st.text(st.characters(codec=None, categories=None), max_size=8)
_json_values = st.recursive(
    st.none() | st.booleans() | st.floats(allow_nan=False, allow_infinity=False) | st.integers() | _any_text,
    lambda children: st.lists(children, max_size=4) | st.dictionaries(_any_text, children, max_size=4),
    max_leaves=20,
)
_records = st.lists(
    st.dictionaries(st.sampled_from([*GOOD_RECORD, "other"]) | _any_text, _json_values | st.floats(0, 8), max_size=5),
    max_size=5,
)


@settings(max_examples=150, deadline=None)
@given(document=st.one_of(_json_values, st.fixed_dictionaries({"records": _records})))
def test_no_json_document_gets_a_5xx(shared_client, document):
    client = shared_client
    response = _post(client, json.dumps(document))  # ASCII with \\u escapes, so any str can be sent
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


@pytest.mark.parametrize(("path", "document"), [
    ("/models/iris/activate", {"version": "\ud800", "reason": "lone surrogate as the version"}),
    ("/models/iris/activate", {"version": "2.0.0", "reason": "reason \udfff"}),
    ("/models/iris/rollback", {"reason": "\ud800"}),
    ("/models/iris/preview", {"version": "\udbff"}),
    ("/models/iris/preview", {"\ud800": "2.0.0"}),
])
def test_a_lone_surrogate_in_an_operation_body_is_400(make_client, store, tokens, path, document):
    tokens_file, issued = tokens
    client = make_client(store.root, tokens_file=tokens_file)
    response = client.post(path, content=json.dumps(document), headers={"Authorization": f"Bearer {issued['operate']}"})
    assert "unpaired UTF-16 surrogate" in assert_problem(response, 400)["detail"]
    assert store.active("iris").version == "1.0.0"
