"""Fuzzing a real ``rbfgate serve``: schemathesis from the service's own OpenAPI document, and a
seeded mutation fuzzer of our own over raw bodies, headers and paths.

Promises checked (README, "Errors"; RFC 9457): no input gets a 5xx; every error the application
answers is ``application/problem+json`` with type, title, status and detail; responses match the
documented schemas, statuses and media types (schemathesis' checks). Requests that are not HTTP
at all (a bad request line, a header byte h11 refuses) never reach the application: uvicorn
answers them with its own plain-text 400 and closes, which the mutation fuzzer accepts only in
that exact form.

Both are bounded: schemathesis runs ``--max-examples`` per operation with a fixed seed, the
mutation fuzzer a fixed number of requests from a fixed seed.
"""

from __future__ import annotations

import json
import os
import random
import re
import subprocess
import sys
from pathlib import Path

import pytest
from http_api.cases import GOOD_RECORD
from http_api.conftest import build_store
from http_api.server import ServeProcess

from service.tokens import add_token

from .support import raw_exchange, raw_request

TESTS = Path(__file__).resolve().parents[1]
_SEED = 20261201
_UVICORN_400 = b"Invalid HTTP request received."


@pytest.fixture(scope="module")
def fuzzed_server(tmp_path_factory, service_models):
    workdir = tmp_path_factory.mktemp("fuzz")
    store = build_store(workdir / "store", service_models)
    tokens_file = workdir / "tokens.json"
    tokens = {role: add_token(tokens_file, f"fuzz-{role}", role)[0] for role in ("score", "operate", "audit")}
    args = ("--store", store.root, "--tokens", tokens_file, "--poll-interval", "0.2", "--read-timeout", "2")
    with ServeProcess(workdir, *args) as server:
        yield server, tokens, workdir
        stderr = server.stderr_path.read_text()
    assert "Traceback" not in stderr, stderr[-3000:]


def test_schemathesis_finds_nothing_against_the_openapi_document(fuzzed_server):
    server, tokens, workdir = fuzzed_server
    # Each route gets a token whose role it admits (service/auth.py); scoring routes answer 422 to
    # schema-valid records that the refusal policy refuses (features and ranges differ by model, so the
    # document cannot state them) and 413 to more records than --max-records (RFC 9110 section
    # 15.5.14, README "Errors"), and activate, rollback and outside-domain refuse a reason with control
    # characters.
    config = workdir / "schemathesis.toml"
    config.write_text(f"""
[generation]
database = "none"

[[operations]]
include-path-regex = "^/score/"
headers = {{ Authorization = "Bearer {tokens['score']}" }}
checks.positive_data_acceptance.expected-statuses = ["2xx", "401", "403", "404", "409", "422"]
checks.negative_data_rejection.expected-statuses = ["400", "401", "403", "404", "405", "409", "413", "415", "422"]

[[operations]]
include-path-regex = "^/models/[^/]+/(activate|rollback|outside-domain)$"
headers = {{ Authorization = "Bearer {tokens['operate']}" }}
checks.positive_data_acceptance.expected-statuses = ["2xx", "401", "403", "404", "409", "422"]

[[operations]]
include-path-regex = "^/(models|healthz|readyz|metrics)"
exclude-path-regex = "^/models/[^/]+/(activate|rollback|outside-domain)$"
headers = {{ Authorization = "Bearer {tokens['operate']}" }}
""")
    environ = {**os.environ, "SCHEMATHESIS_HOOKS": "reliability.schemathesis_hooks",
               "PYTHONPATH": os.pathsep.join([str(TESTS), os.environ.get("PYTHONPATH", "")])}
    command = [sys.executable, "-m", "schemathesis.cli", "--no-color", "--config-file", str(config), "run",
               f"{server.url}/openapi.json", "-H", f"Authorization: Bearer {tokens['audit']}", "--checks", "all",
               "--max-examples", "25", "--seed", str(_SEED), "--request-timeout", "20", "--workers", "1"]
    result = subprocess.run(command, capture_output=True, text=True, timeout=600, env=environ, cwd=workdir)
    report = result.stdout + result.stderr
    assert result.returncode == 0, report[report.find("FAILURES"):][:3000] + report[-3000:]
    generated = re.search(r"(\d+) generated", report)
    assert generated and int(generated.group(1)) >= 14 * 25, report[-2000:]  # every operation was exercised


# ---- our own mutation fuzzer ------------------------------------------------------------------

_VALID = [
    ("POST", "/score/iris", "score", {"records": [GOOD_RECORD]}),
    ("POST", "/score/iris/versions/2.0.0", "score", {"records": [GOOD_RECORD, GOOD_RECORD]}),
    ("POST", "/score/cancer", "score", {"records": [{"x0": 14.0}]}),
    ("POST", "/models/iris/preview", "operate", {"version": "2.0.0"}),
    ("POST", "/models/iris/activate", "operate", {"version": "2.0.0", "reason": "fuzz"}),
    ("POST", "/models/iris/rollback", "operate", {"reason": "fuzz"}),
    ("GET", "/models/iris/versions/1.0.0", "audit", None),
    ("GET", "/models/iris/history", "audit", None),
    ("GET", "/models", "score", None),
]
_SNIPPETS = [b"NaN", b"Infinity", b"-Infinity", b"1e999", b"9" * 400, b"[" * 200, b"{" * 100, b'"\\u0000"',
             b"\xff\xfe", b"\xef\xbb\xbf", b"null", b"true", b'"records"', b":", b",", b"}", b"]", b'"a":1,"a":2',
             b"\x00", b"\\", b'"', b"-0", b"1.7976931348623157e309", b"0x10", b"'single'",
             # Invalid Unicode (RFC 3629 section 3; RFC 7493 section 2.1): escaped lone surrogates as values and
             # member names, a surrogate encoded as UTF-8 bytes, an over-long encoding, a paired escape.
             b'"\\ud800"', b'"\\udfff"', b'{"\\ud800":1}', b'"\\ud800":1,', b"\xed\xa0\x80", b"\xc0\xaf",
             b'"\\ud83d\\ude00"', b"\xf4\x90\x80\x80"]
_PATH_PIECES = ["..", "%2e%2e", "%2F", "%00", "%", "%zz", "~", "iris", "1.0.0", "versions", "models", "score",
                "schema", "bundle", ";", "?x=1", "#frag", "%C3%A9", "\u00e9", "a" * 300, "//", "*", "{model}",
                "%ED%A0%80", "%C0%AF", "%F4%90%80%80", "\U0001d11e", "?q=%ED%A0%80"]
_CONTENT_TYPES = ["application/json", "text/plain", "application/json; charset=latin-1", "", "multipart/form-data",
                  "application/problem+json", "application/x-www-form-urlencoded", "*/*"]


def _mutate_body(rng: random.Random, body: bytes) -> bytes:
    data = bytearray(body)
    for _ in range(rng.randint(1, 4)):
        choice = rng.randrange(7)
        position = rng.randint(0, len(data))
        if choice == 0 and data:
            data[min(position, len(data) - 1)] ^= 1 << rng.randrange(8)
        elif choice == 1:
            data[position:position] = rng.choice(_SNIPPETS)
        elif choice == 2:
            del data[position:position + rng.randint(1, 16)]
        elif choice == 3:
            data = data[:position]
        elif choice == 4:
            data[position:position] = bytes(rng.randrange(256) for _ in range(rng.randint(1, 8)))
        elif choice == 5:
            data = data + data[: rng.randint(0, len(data))]
        else:
            data = bytearray(_with_a_lone_surrogate(rng, bytes(data)))
    return bytes(data)


def _with_a_lone_surrogate(rng: random.Random, body: bytes) -> bytes:
    """The body with one member name or string value (a feature, a record id, a version, a reason)
    replaced by text holding a lone surrogate, still valid JSON syntax (json.dumps escapes it)."""
    try:
        document = json.loads(body)
    except ValueError:
        return body
    containers = [document]
    places = []
    while containers:
        value = containers.pop()
        items = value.items() if isinstance(value, dict) else enumerate(value) if isinstance(value, list) else ()
        for key, child in items:
            places.append((value, key))
            containers.append(child)
    if not places:
        return body
    container, key = rng.choice(places)
    lone = rng.choice(["\ud800", "\udbff", "\udc00", "\udfff"])
    if isinstance(container, dict) and rng.random() < 0.5:
        container[f"{key}{lone}" if rng.random() < 0.5 else lone] = container.pop(key)
    else:
        container[key] = rng.choice([lone, f"5.1{lone}", [lone], {lone: 1}])
    return json.dumps(document).encode("ascii")


def _mutate_path(rng: random.Random, path: str) -> str:
    parts = path.split("/")
    for _ in range(rng.randint(1, 3)):
        index = rng.randrange(len(parts))
        action = rng.randrange(3)
        if action == 0:
            parts[index] = rng.choice(_PATH_PIECES)
        elif action == 1:
            parts.insert(index, rng.choice(_PATH_PIECES))
        elif index > 0:
            del parts[index]
    return "/".join(parts) or "/"


def _mutated_request(rng: random.Random, tokens: dict[str, str]) -> tuple[str, bytes, dict[str, str], bytes]:
    method, path, role, document = rng.choice(_VALID)
    body = json.dumps(document).encode() if document is not None else b""
    headers = {"Content-Type": "application/json", "Authorization": f"Bearer {tokens[role]}"}
    for _ in range(rng.randint(1, 3)):
        target = rng.randrange(6)
        if target in (0, 1) and body:
            body = _mutate_body(rng, body)
        elif target == 2:
            path = _mutate_path(rng, path)
        elif target == 3:
            headers["Content-Type"] = rng.choice(_CONTENT_TYPES)
        elif target == 4:
            headers["Authorization"] = rng.choice([
                "", "Bearer", "Bearer ", "Basic dXNlcjpwYXNz", f"Bearer {tokens[role]}x", f"bearer {tokens[role]}",
                f"Bearer {tokens[role][:-1]}", "Bearer " + "A" * 4000, f"Bearer {tokens[role]} extra",
            ])
        else:
            method = rng.choice(["GET", "POST", "PUT", "DELETE", "PATCH", "HEAD", "OPTIONS", "TRACE", "BREW"])
    return method, path.encode("utf-8"), headers, body


def test_mutated_requests_never_get_a_5xx_and_errors_are_problem_details(fuzzed_server):
    server, tokens, _ = fuzzed_server
    rng = random.Random(_SEED)
    statuses: dict[int, int] = {}
    for number in range(400):
        method, target, headers, body = _mutated_request(rng, tokens)
        response = raw_request(server.port, method, target, headers=headers, body=body)
        what = f"#{number}: {method} {target[:120]!r} {headers} {body[:120]!r}"
        assert response is not None, f"closed without an answer: {what}"
        statuses[response.status] = statuses.get(response.status, 0) + 1
        assert response.status < 500, f"{response.status} {response.body[:300]!r} for {what}"
        if response.status < 400 or method == "HEAD":
            continue
        if response.media_type == "text/plain":  # never reached the app: uvicorn refused the HTTP itself
            assert response.status == 400 and _UVICORN_400 in response.body, what
            continue
        assert response.media_type == "application/problem+json", what
        problem = json.loads(response.body)
        assert problem["status"] == response.status and all(problem.get(key) for key in ("type", "title", "detail"))
    assert len(statuses) >= 5, statuses  # the mutations reached many different answers
    with server.client() as client:
        assert client.get("/healthz").status_code == 200


def test_requests_that_are_not_http_get_uvicorns_400_and_the_server_goes_on(fuzzed_server):
    server, _, _ = fuzzed_server
    garbage = [b"\x16\x03\x01\x02\x00\x01\x00\x01\xfc\x03\x03" + bytes(range(64)), b"GET\r\n\r\n",
               b"GET /nowhere HTTP/9.9\r\nHost: x\r\n\r\n", b"GET /models HTTP/1.1\r\nHost: x\r\nBad Header\r\n\r\n",
               b"POST /score/iris HTTP/1.1\r\nHost: x\r\nTransfer-Encoding: chunked\r\n\r\nzz\r\n{}\r\n0\r\n\r\n",
               b"GET /models HTTP/1.1\r\nHost: x\r\nX: \x00\r\n\r\n", b"\r\n\r\n\r\n"]
    for data in garbage:
        response = raw_exchange(server.port, data)
        if response is None or response.media_type == "text/plain":  # refused before the app
            assert response is None or (response.status == 400 and _UVICORN_400 in response.body), (data, response)
        else:  # h11 found it acceptable after all (it takes any HTTP/1.x version): the app answered
            assert response.status < 500 and response.media_type == "application/problem+json", (data, response)
    with server.client() as client:
        assert client.get("/healthz").status_code == 200
