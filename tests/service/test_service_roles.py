"""The role matrix over every route, bearer tokens (RFC 6750) and the tokens file.

The expected matrix below is written out independently of ``service.auth.ACCESS_RULES``
(it restates the issue's role list), and the first test checks that it covers exactly
the app's routes, so a new route cannot be added without deciding who may call it.
"""

from __future__ import annotations

import hashlib
import hmac
from unittest import mock

import pytest

from service.auth import ACCESS_RULES
from service.tokens import revoke_token

from .conftest import ROLE_NAMES, assert_problem, bearer

_RECORD = {"sepal_length_cm": 5.1, "sepal_width_cm": 3.5, "petal_length_cm": 1.4, "petal_width_cm": 0.2}

# (method, path template) -> (roles allowed with tokens, open without a tokens file, request path, JSON body)
# Order matters: activate, then rollback, then preview run one after another on one store.
_MATRIX = {
    ("POST", "/score/{model}"): ({"score"}, True, "/score/iris", {"records": [_RECORD]}),
    ("POST", "/score/{model}/versions/{version}"): ({"score"}, True, "/score/iris/versions/2.0.0", {"records": [_RECORD]}),
    ("GET", "/models"): ({"score", "operate", "audit"}, True, "/models", None),
    ("GET", "/models/{model}"): ({"score", "operate", "audit"}, True, "/models/iris", None),
    ("GET", "/models/{model}/versions/{version}"): ({"score", "operate", "audit"}, True, "/models/iris/versions/1.0.0", None),
    ("GET", "/models/{model}/versions/{version}/schema"): (
        {"score", "operate", "audit"}, True, "/models/iris/versions/1.0.0/schema", None),
    ("GET", "/models/{model}/versions/{version}/bundle"): (
        {"operate", "audit"}, False, "/models/iris/versions/1.0.0/bundle", None),
    ("GET", "/models/{model}/history"): ({"operate", "audit"}, False, "/models/iris/history", None),
    ("POST", "/models/{model}/activate"): (
        {"operate"}, False, "/models/iris/activate", {"version": "2.0.0", "reason": "role matrix"}),
    ("POST", "/models/{model}/rollback"): ({"operate"}, False, "/models/iris/rollback", {"reason": "role matrix"}),
    ("POST", "/models/{model}/preview"): ({"operate"}, False, "/models/iris/preview", {"version": "2.0.0"}),
    ("GET", "/healthz"): ("public", True, "/healthz", None),
    ("GET", "/readyz"): ("public", True, "/readyz", None),
    ("GET", "/metrics"): ("public", True, "/metrics", None),
}


def _call(client, route, headers=None):
    _, _, path, body = _MATRIX[route]
    return client.request(route[0], path, json=body, headers=headers or {})


def test_every_route_of_the_app_has_a_rule_and_a_row_in_this_matrix(make_client, shared_store):
    app = make_client(shared_store.root).app
    routes = {(method, route.path) for route in app.routes for method in route.methods}
    assert routes == set(_MATRIX) == set(ACCESS_RULES)


def test_role_matrix_with_tokens(make_client, store, tokens):
    path, issued = tokens
    client = make_client(store.root, tokens_file=path)
    for route, (allowed, _, _, _) in _MATRIX.items():
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


def test_role_matrix_without_tokens(make_client, store):
    client = make_client(store.root)
    for route, (allowed, open_without_tokens, _, _) in _MATRIX.items():
        response = _call(client, route)
        if open_without_tokens:
            assert response.status_code == 200, (route, response.text)
        else:
            problem = assert_problem(response, 403)
            assert "--tokens" in problem["detail"], route  # the explanation says how to enable it


def test_authorization_scheme_other_than_bearer_is_401(make_client, shared_store, tokens):
    path, issued = tokens
    client = make_client(shared_store.root, tokens_file=path)
    response = client.get("/models", headers={"Authorization": f"Basic {issued['score']}"})
    assert 'error="invalid_token"' in response.headers["WWW-Authenticate"]  # RFC 6750 section 3.1
    assert_problem(response, 401)


def test_tokens_file_holds_only_sha256_digests(tokens):
    path, issued = tokens
    text = path.read_text()
    for token in issued.values():
        assert token not in text
        assert hashlib.sha256(token.encode()).hexdigest() in text  # FIPS 180-4 via hashlib


def test_every_stored_digest_is_compared_in_constant_time(make_client, shared_store, tokens):
    path, issued = tokens
    client = make_client(shared_store.root, tokens_file=path)
    calls = []
    real = hmac.compare_digest

    def counting(a, b):
        calls.append(1)
        return real(a, b)

    with mock.patch("service.auth.hmac.compare_digest", counting):
        for token in (issued["score"], issued["audit"], "rbfgate_unknown"):
            calls.clear()
            client.get("/models", headers=bearer(token))
            assert len(calls) == len(issued)  # no early exit, whichever entry matches


def test_history_records_the_token_name_as_actor(make_client, store, tokens):
    path, issued = tokens
    client = make_client(store.root, tokens_file=path)
    response = client.post("/models/iris/activate", json={"version": "2.0.0", "reason": "canary"}, headers=bearer(issued["operate"]))
    assert response.status_code == 200, response.text
    last = client.get("/models/iris/history", headers=bearer(issued["audit"])).json()["entries"][-1]
    assert (last["actor"], last["action"], last["version"], last["reason"]) == (ROLE_NAMES["operate"], "activate", "2.0.0", "canary")


def test_a_revoked_token_is_refused_after_the_next_poll(make_client, shared_store, tokens):
    path, issued = tokens
    client = make_client(shared_store.root, tokens_file=path)
    assert client.get("/models", headers=bearer(issued["audit"])).status_code == 200
    revoke_token(path, ROLE_NAMES["audit"])
    client.app.state.services.authenticator.refresh()  # what the poller does every interval
    assert_problem(client.get("/models", headers=bearer(issued["audit"])), 401)
    assert client.get("/models", headers=bearer(issued["score"])).status_code == 200


def test_a_damaged_tokens_file_refuses_every_token(make_client, shared_store, tokens):
    path, issued = tokens
    client = make_client(shared_store.root, tokens_file=path)
    path.write_text("{ not json")
    client.app.state.services.authenticator.refresh()
    problem = assert_problem(client.get("/models", headers=bearer(issued["score"])), 401)
    assert "cannot be read" in problem["detail"]
    assert client.get("/readyz").json()["tokens"]["error"]


@pytest.mark.parametrize("route", ["/healthz", "/readyz", "/metrics"])
def test_health_routes_are_open_even_with_tokens(make_client, shared_store, tokens, route):
    path, _ = tokens
    assert make_client(shared_store.root, tokens_file=path).get(route).status_code == 200
