"""The role matrix over every route, bearer tokens (RFC 6750) and the tokens file.

The expected matrix (cases.ROLE_MATRIX) is written out independently of ``service.auth.ACCESS_RULES``
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

from .cases import (
    ROLE_MATRIX,
    assert_problem,
    bearer,
    check_role_matrix_with_tokens,
    check_role_matrix_without_tokens,
)
from .conftest import ROLE_NAMES


def test_every_route_of_the_app_has_a_rule_and_a_row_in_this_matrix(make_client, shared_store):
    app = make_client(shared_store.root).app
    routes = {(method, route.path) for route in app.routes for method in route.methods}
    assert routes == set(ROLE_MATRIX) == set(ACCESS_RULES)


def test_role_matrix_with_tokens(make_client, store, tokens):
    path, issued = tokens
    check_role_matrix_with_tokens(make_client(store.root, tokens_file=path), issued)


def test_role_matrix_without_tokens(make_client, store):
    check_role_matrix_without_tokens(make_client(store.root))


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
    body = {"version": "2.0.0", "reason": "canary", "accept_breaking": True}
    response = client.post("/models/iris/activate", json=body, headers=bearer(issued["operate"]))
    assert response.status_code == 200, response.text
    last = client.get("/models/iris/history", headers=bearer(issued["audit"])).json()["entries"][-1]
    assert (last["actor"], last["action"], last["version"], last["reason"]) == (
        ROLE_NAMES["operate"], "activate", "2.0.0", "canary")


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
