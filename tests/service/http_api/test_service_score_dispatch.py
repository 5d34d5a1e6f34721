"""The score routes' lean path (service.score_dispatch) answers exactly as FastAPI's own dispatch does.

Two apps over the same store and tokens file: the one ``create_app`` builds, and the same app with
the lean path taken out of its middlewares, so FastAPI's router, its app-wide access dependency
and its exception handlers answer the score routes. Every request below (scored, refused, each
refusal of the access rules, RFC 6750; unknown model and version, bad JSON, too many records,
a wrong method, an unexpected failure) must get the same status, headers, body (RFC 9457 problem
details where it fails) and log line from both. Only what differs by nature is left out: the
request id a request did not choose, the time and the duration.
"""

from __future__ import annotations

import json
import warnings
from pathlib import Path
from unittest import mock

import pytest

from service.app import create_app
from service.score_dispatch import ScoreDispatch, score_routes
from service.settings import Settings

from .cases import GOOD_RECORD, bearer

with warnings.catch_warnings():
    warnings.simplefilter("ignore", UserWarning)
    from fastapi.testclient import TestClient

_TOO_LOW = {**GOOD_RECORD, "sepal_length_cm": -1.0}
_DIFFERS_BY_NATURE = ("time", "duration_ms")


def _client(store_root: Path, tokens_file: Path, logs: list, *, lean: bool) -> TestClient:
    settings = Settings(store_root=store_root, tokens_file=tokens_file, poll_seconds=3600.0, max_records=3)
    app = create_app(settings, environ={}, write_log=logs.append)
    if not lean:
        app.user_middleware = [entry for entry in app.user_middleware if entry.cls is not ScoreDispatch]
    return TestClient(app, raise_server_exceptions=False)


@pytest.fixture
def both(store, tokens):
    path, issued = tokens
    logs = {"lean": [], "fastapi": []}
    clients = {name: _client(store.root, path, logs[name], lean=name == "lean") for name in logs}
    for client in clients.values():
        client.__enter__()
    yield clients, logs, issued
    for client in clients.values():
        client.__exit__(None, None, None)


def _answer(client: TestClient, logs: list, method: str, url: str, **kwargs) -> dict:
    logs.clear()
    response = client.request(method, url, **kwargs)
    headers = dict(response.headers)
    chosen = "X-Request-ID" in kwargs.get("headers", {})
    if not chosen:
        headers.pop("x-request-id")
    lines = [{key: value for key, value in line.items() if key not in _DIFFERS_BY_NATURE
              and (chosen or key != "request_id")} for line in logs if line.get("event") == "request"]
    return {"status": response.status_code, "headers": headers, "body": response.content, "log": lines}


def _requests(issued: dict[str, str]) -> list[tuple[str, str, dict]]:
    score = bearer(issued["score"])
    return [
        ("POST", "/score/iris", {"json": {"records": [GOOD_RECORD]}, "headers": score}),
        ("POST", "/score/iris", {"json": {"records": [GOOD_RECORD, _TOO_LOW]}, "headers": score}),
        ("POST", "/score/iris", {"json": {"records": [_TOO_LOW]}, "headers": score}),
        ("POST", "/score/iris", {"json": {"records": [GOOD_RECORD]}, "headers": {**score, "X-Request-ID": "order-17"}}),
        ("POST", "/score/iris/versions/2.0.0", {"json": {"records": [GOOD_RECORD]}, "headers": score}),
        ("POST", "/score/iris", {"json": {"records": [GOOD_RECORD]}}),
        ("POST", "/score/iris", {"json": {"records": [GOOD_RECORD]}, "headers": bearer("not-a-token")}),
        ("POST", "/score/iris", {"json": {"records": [GOOD_RECORD]}, "headers": bearer(issued["audit"])}),
        ("POST", "/score/no-such-model", {"json": {"records": [GOOD_RECORD]}, "headers": score}),
        ("POST", "/score/iris/versions/9.9.9", {"json": {"records": [GOOD_RECORD]}, "headers": score}),
        ("POST", "/score/iris", {"content": b'{"records": [', "headers": score}),
        ("POST", "/score/iris", {"json": {"records": [GOOD_RECORD] * 4}, "headers": score}),
        ("GET", "/score/iris", {"headers": score}),
    ]


def test_the_app_serves_the_score_routes_through_the_lean_path(make_client, shared_store):
    app = make_client(shared_store.root).app
    assert [entry.cls for entry in app.user_middleware].count(ScoreDispatch) == 1


@pytest.mark.parametrize("index", range(13))
def test_each_score_request_gets_the_answer_and_log_line_fastapi_gives(both, index):
    clients, logs, issued = both
    method, url, kwargs = _requests(issued)[index]
    lean = _answer(clients["lean"], logs["lean"], method, url, **kwargs)
    assert lean == _answer(clients["fastapi"], logs["fastapi"], method, url, **kwargs)
    assert len(lean["log"]) == 1


def test_an_unexpected_failure_is_the_same_bare_500_with_the_request_id(both):
    clients, logs, issued = both
    kwargs = {"json": {"records": [GOOD_RECORD]}, "headers": {**bearer(issued["score"]), "X-Request-ID": "r-500"}}
    with mock.patch("service.score_routes.score_records", side_effect=RuntimeError("a bug")):
        answers = [_answer(clients[name], logs[name], "POST", "/score/iris", **kwargs) for name in ("lean", "fastapi")]
    assert answers[0] == answers[1]
    assert answers[0]["status"] == 500 and answers[0]["headers"]["x-request-id"] == "r-500"
    assert json.loads(answers[0]["body"])["detail"] == "the service failed; the error was logged"


def test_score_routes_refuse_an_app_whose_score_routes_are_not_first(make_client, shared_store):
    routes = list(make_client(shared_store.root).app.routes)
    with pytest.raises(RuntimeError, match="first routes"):
        score_routes(routes[2:] + routes[:2])
