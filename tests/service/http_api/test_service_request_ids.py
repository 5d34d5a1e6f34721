"""X-Request-ID on every answer: the caller's when it is 1 to 128 printable ASCII characters,
otherwise one the service makes (32 hex digits from uuid4, RFC 9562 section 5.4), and in the log line.

X-Request-ID is common practice (nginx's $request_id, Heroku's router), not a standard; the rule
for a valid one is the service's own (README, "Request ids").
"""

from __future__ import annotations

import re
import uuid
import warnings

import pytest

from model_store.store import Store
from service.app import create_app
from service.settings import Settings

from .cases import GOOD_RECORD, ROLE_MATRIX

with warnings.catch_warnings():
    warnings.simplefilter("ignore", UserWarning)
    from fastapi.testclient import TestClient

_GENERATED = re.compile(r"^[0-9a-f]{32}$")


def _call(client, route, headers=None):
    _, _, path, body = ROLE_MATRIX[route]
    return client.request(route[0], path, json=body, headers=headers or {})


@pytest.mark.parametrize("route", sorted(ROLE_MATRIX))
def test_every_route_answers_with_a_generated_request_id(make_client, store, route):
    response = _call(make_client(store.root), route)
    assert _GENERATED.match(response.headers["X-Request-ID"]), (route, response.status_code)


@pytest.mark.parametrize("route", sorted(ROLE_MATRIX))
def test_every_route_echoes_a_valid_supplied_request_id(make_client, store, route):
    response = _call(make_client(store.root), route, {"X-Request-ID": "req-0042"})
    assert response.headers["X-Request-ID"] == "req-0042", (route, response.status_code)


@pytest.mark.parametrize("request_id", ["x" * 129, "   ", "caf\u00e9"])
def test_an_invalid_request_id_is_replaced_by_a_generated_one(shared_client, request_id):
    response = shared_client.get("/healthz", headers={"X-Request-ID": request_id.encode("latin-1")})
    assert _GENERATED.match(response.headers["X-Request-ID"])


def test_generated_request_ids_are_distinct_version_4_uuids():
    # RFC 9562 section 5.4: version 4, variant 10 (the standard library's uuid.UUID reads both fields).
    from service.request_ids import _new

    made = [_new() for _ in range(2000)]
    assert len(set(made)) == len(made)
    for text in made:
        parsed = uuid.UUID(hex=text)
        assert (parsed.version, parsed.variant, parsed.hex) == (4, uuid.RFC_4122, text)


def test_a_request_id_of_exactly_128_printable_characters_is_echoed(shared_client):
    request_id = "~ !" * 42 + "ab"
    assert shared_client.get("/healthz", headers={"X-Request-ID": request_id}).headers["X-Request-ID"] == request_id


@pytest.mark.parametrize("method, path, kwargs, status", [
    ("GET", "/no/such/route", {}, 404),
    ("DELETE", "/models", {}, 405),
    ("POST", "/score/iris", {"content": b"{not json"}, 400),
    ("POST", "/score/iris", {"json": {"records": [{**GOOD_RECORD, "sepal_length_cm": 99.0}]}}, 422),
    ("GET", "/healthz", {"headers": {"X-Padding": "p" * 20000}}, 431),
])
def test_error_answers_carry_the_request_id(shared_client, method, path, kwargs, status):
    headers = {"X-Request-ID": "err-1", **kwargs.pop("headers", {})}
    response = shared_client.request(method, path, headers=headers, **kwargs)
    assert (response.status_code, response.headers["X-Request-ID"]) == (status, "err-1")


class _BrokenStore(Store):
    """A store whose version listing fails with an error nobody planned for."""

    def versions(self, name):
        raise RuntimeError("simulated defect")


def test_an_unexpected_server_error_carries_the_request_id(shared_store):
    app = create_app(Settings(store_root=shared_store.root, poll_seconds=3600.0), store=_BrokenStore(shared_store.root),
                     environ={}, write_log=lambda event: None)
    with TestClient(app, raise_server_exceptions=False) as client:
        response = client.get("/models/iris", headers={"X-Request-ID": "boom-1"})
    assert (response.status_code, response.headers["X-Request-ID"]) == (500, "boom-1")


def test_the_log_line_holds_the_request_id(make_client, store):
    logs: list = []
    client = make_client(store.root, logs=logs)
    client.post("/score/iris", json={"records": [GOOD_RECORD]}, headers={"X-Request-ID": "trace-9"})
    generated = client.get("/models").headers["X-Request-ID"]
    requests = [event for event in logs if event.get("event") == "request"]
    assert [(event["request_id"], event["route"]) for event in requests] == [
        ("trace-9", "/score/{model}"), (generated, "/models")]

