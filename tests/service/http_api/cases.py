"""Requests and checks shared by the in-process tests and the tests against a real ``rbfgate serve``.

Each ``check_*`` function takes any client with the httpx request API (FastAPI's
TestClient or ``httpx.Client``), so the same specification runs in both settings.

Sources: RFC 9457 (problem details), RFC 6750 (Bearer tokens), RFC 8259 (JSON: no
NaN/Infinity, UTF-8, ``true`` is not a number), RFC 7493 (I-JSON: no unpaired surrogates),
IEEE 754 binary64 (largest finite value about 1.8e308), RFC 6901 (JSON pointers), the issue's role list for the matrix.
"""

from __future__ import annotations

__all__ = [
    "BAD_VALUES",
    "GOOD_RECORD",
    "MALFORMED_BODIES",
    "NOT_FOUND",
    "ROLE_MATRIX",
    "WRONG_SHAPES",
    "assert_problem",
    "bearer",
    "check_bad_inputs",
    "check_role_matrix_with_tokens",
    "check_role_matrix_without_tokens",
]

GOOD_RECORD = {"sepal_length_cm": 5.1, "sepal_width_cm": 3.5, "petal_length_cm": 1.4, "petal_width_cm": 0.2}

# (body, a phrase the 400 detail must contain)
MALFORMED_BODIES = [
    ('{"records": [{"sepal_length_cm": 5.1', "not valid JSON"),
    ('{"records": [{"sepal_length_cm": NaN}]}', "NaN"),
    ('{"records": [{"sepal_length_cm": Infinity}]}', "Infinity"),
    ('{"records": [{"sepal_length_cm": -Infinity}]}', "Infinity"),
    ('{"records": [{"sepal_length_cm": 1e400}]}', "64-bit float"),  # > 1.8e308, IEEE 754 binary64 max
    ('{"records": [{"sepal_length_cm": ' + "9" * 400 + "}]}", "64-bit float"),
    ('{"records": [{"sepal_length_cm": 5.1, "sepal_length_cm": 6.0}]}', "appears twice"),
    # RFC 7493 section 2.1: no unpaired surrogates, as a value, as a member name, or anywhere else.
    ('{"records": [{"sepal_length_cm": "\\ud800"}]}', "unpaired UTF-16 surrogate"),
    ('{"records": [{"\\ud800": 5.1}]}', "unpaired UTF-16 surrogate"),
    ('{"records": [{"sepal_length_cm": ["x\\udfff"]}]}', "unpaired UTF-16 surrogate"),
    ('{"\\udbff": []}', "unpaired UTF-16 surrogate"),
    ("", "empty"),
    ("   ", "empty"),
]

# (document, RFC 6901 pointer the 422 names)
WRONG_SHAPES = [
    ([], ""),  # RFC 6901 section 5: "" is the whole document
    ("records", ""),
    ({}, "/records"),
    ({"records": {"sepal_length_cm": 5.1}}, "/records"),
    ({"records": "all of them"}, "/records"),
    ({"records": []}, "/records"),
    ({"records": [1.5]}, "/records/0"),
    ({"records": [GOOD_RECORD, None]}, "/records/1"),
    ({"records": [GOOD_RECORD], "explain": True}, "/explain"),
]

# (value of sepal_length_cm, refusal reason)
BAD_VALUES = [
    (None, "null"),
    (True, "not_a_number"),  # RFC 8259 section 3: true is a literal name, not a number
    ("5.1", "not_a_number"),
    ({"cm": 5.1}, "not_a_number"),
    ([5.1], "not_a_number"),
    (100.0, "out_of_range"),
    (-3.0, "out_of_range"),
]

# (method, path) answered 404
NOT_FOUND = [
    ("POST", "/score/no-such-model"),
    ("POST", "/score/iris/versions/9.9.9"),
    ("POST", "/score/bad$name"),
    ("POST", "/score/iris/versions/..hidden"),
    ("GET", "/models/no-such-model"),
    ("GET", "/models/iris/versions/9.9.9"),
    ("GET", "/models/iris/versions/9.9.9/schema"),
    ("GET", "/no/such/route"),
    ("GET", "/models/"),
]

# (method, path template) -> (roles allowed with tokens, open without a tokens file, request path, JSON body).
# Order matters: activate, then rollback, then preview run one after another on one store.
ROLE_MATRIX = {
    ("POST", "/score/{model}"): ({"score"}, True, "/score/iris", {"records": [GOOD_RECORD]}),
    ("POST", "/score/{model}/versions/{version}"): ({"score"}, True, "/score/iris/versions/2.0.0", {"records": [GOOD_RECORD]}),
    ("GET", "/models"): ({"score", "operate", "audit"}, True, "/models", None),
    ("GET", "/models/{model}"): ({"score", "operate", "audit"}, True, "/models/iris", None),
    ("GET", "/models/{model}/versions/{version}"): ({"score", "operate", "audit"}, True, "/models/iris/versions/1.0.0", None),
    ("GET", "/models/{model}/versions/{version}/schema"): (
        {"score", "operate", "audit"}, True, "/models/iris/versions/1.0.0/schema", None),
    ("GET", "/models/{model}/openapi.json"): ({"score", "operate", "audit"}, True, "/models/iris/openapi.json", None),
    ("GET", "/models/{model}/versions/{version}/openapi.json"): (
        {"score", "operate", "audit"}, True, "/models/iris/versions/2.0.0/openapi.json", None),
    ("GET", "/models/{model}/versions/{version}/bundle"): (
        {"operate", "audit"}, False, "/models/iris/versions/1.0.0/bundle", None),
    ("GET", "/models/{model}/history"): ({"operate", "audit"}, False, "/models/iris/history", None),
    ("POST", "/models/{model}/activate"): ({"operate"}, False, "/models/iris/activate", {"version": "2.0.0", "reason": "matrix", "accept_breaking": True}),
    ("POST", "/models/{model}/rollback"): ({"operate"}, False, "/models/iris/rollback", {"reason": "matrix"}),
    ("POST", "/models/{model}/preview"): ({"operate"}, False, "/models/iris/preview", {"version": "2.0.0"}),
    ("POST", "/models/{model}/outside-domain"): (
        {"operate"}, False, "/models/iris/outside-domain", {"action": "refuse", "reason": "matrix"}),
    ("GET", "/healthz"): ("public", True, "/healthz", None),
    ("GET", "/readyz"): ("public", True, "/readyz", None),
    ("GET", "/metrics"): ("public", True, "/metrics", None),
    ("GET", "/openapi.json"): ({"score", "operate", "audit"}, True, "/openapi.json", None),
    ("GET", "/problems/{kind}"): ("public", True, "/problems/records-refused", None),
    # The pages hold no data; their data routes have the rules of the JSON routes they draw.
    ("GET", "/"): ("public", True, "/", None),
    ("GET", "/view/"): ("public", True, "/view/", None),
    ("GET", "/view/models/{model}"): ("public", True, "/view/models/iris", None),
    ("GET", "/view/models/{model}/versions/{version}"): ("public", True, "/view/models/iris/versions/1.0.0", None),
    ("GET", "/view/models/{model}/try"): ("public", True, "/view/models/iris/try", None),
    ("GET", "/view/models/{model}/preview"): ("public", True, "/view/models/iris/preview", None),
    ("GET", "/view/assets/{name:path}"): ("public", True, "/view/assets/vendor/vega.min.js", None),
    ("GET", "/view/data/session"): ("public", True, "/view/data/session", None),
    ("GET", "/view/data/models"): ({"score", "operate", "audit"}, True, "/view/data/models", None),
    ("GET", "/view/data/models/{model}/versions/{version}/card"): (
        {"score", "operate", "audit"}, True, "/view/data/models/iris/versions/1.0.0/card", None),
    ("GET", "/view/data/models/{model}/timeline"): ({"operate", "audit"}, False, "/view/data/models/iris/timeline", None),
    ("POST", "/view/data/models/{model}/try"): ({"score"}, True, "/view/data/models/iris/try", {"records": [GOOD_RECORD]}),
    ("POST", "/view/data/models/{model}/preview"): ({"operate"}, False, "/view/data/models/iris/preview", {"version": "2.0.0"}),
}


def bearer(token: str) -> dict[str, str]:
    """RFC 6750 section 2.1: the Authorization request header field with the Bearer scheme."""
    return {"Authorization": f"Bearer {token}"}


def assert_problem(response, status: int) -> dict:
    """RFC 9457 section 3: problem details are application/problem+json with type, title, status, detail."""
    assert response.status_code == status, response.text
    assert response.headers["content-type"].split(";")[0] == "application/problem+json", response.headers
    body = response.json()
    assert isinstance(body["type"], str) and body["type"]
    assert isinstance(body["title"], str) and body["title"]
    assert body["status"] == status  # section 3.1.2: the same as the HTTP status code
    assert isinstance(body["detail"], str) and body["detail"]
    return body


def _call(client, route, headers=None):
    _, _, path, body = ROLE_MATRIX[route]
    # follow_redirects: GET / answers 307 to /view/ (httpx does not follow by default, TestClient does)
    return client.request(route[0], path, json=body, headers=headers or {}, follow_redirects=True)


def check_role_matrix_with_tokens(client, issued: dict[str, str]) -> None:
    """Missing or unknown token -> 401 with a Bearer challenge; wrong role -> 403; right role -> < 400."""
    for route, (allowed, _, _, _) in ROLE_MATRIX.items():
        if allowed == "public":
            assert _call(client, route).status_code == 200, route
            assert _call(client, route, bearer("not-a-token")).status_code == 200, route
            continue
        response = _call(client, route)
        assert_problem(response, 401)
        assert response.headers["WWW-Authenticate"].startswith("Bearer")  # RFC 6750 section 3
        assert_problem(_call(client, route, bearer("rbfgate_forged")), 401)
        for role, token in issued.items():
            response = _call(client, route, bearer(token))
            if role in allowed:
                assert response.status_code < 400, (route, role, response.text)
            else:
                assert "needs role" in assert_problem(response, 403)["detail"], (route, role)


def check_role_matrix_without_tokens(client) -> None:
    """Scoring and metadata open; history, bundles and version changes 403 with an explanation."""
    for route, (_, open_without_tokens, _, _) in ROLE_MATRIX.items():
        response = _call(client, route)
        if open_without_tokens:
            assert response.status_code == 200, (route, response.text)
        else:
            assert "--tokens" in assert_problem(response, 403)["detail"], route


def check_bad_inputs(client, headers: dict[str, str] | None = None) -> None:
    """Every bad input of the issue against ``/score/iris``: its status and problem details."""
    headers = headers or {}
    for body, phrase in MALFORMED_BODIES:
        response = client.post("/score/iris", content=body.encode(), headers=headers)
        assert phrase in assert_problem(response, 400)["detail"], body[:60]
    for document, pointer in WRONG_SHAPES:
        problem = assert_problem(client.post("/score/iris", json=document, headers=headers), 422)
        assert problem["problems"][0]["pointer"] == pointer, document
    for value, reason in BAD_VALUES:
        bad = dict(GOOD_RECORD, sepal_length_cm=value)
        body = client.post("/score/iris", json={"records": [GOOD_RECORD, bad]}, headers=headers).json()
        assert [result["status"] for result in body["results"]] == ["scored", "refused"], value
        assert body["results"][1]["problems"][0]["reason"] == reason, value
    for method, path in NOT_FOUND:
        assert_problem(client.request(method, path, json={"records": [GOOD_RECORD]}, headers=headers), 404)
