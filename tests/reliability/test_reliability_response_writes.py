"""The answer's head written together with its body (service.http_limits) keeps HTTP/1.1 intact.

A real ``rbfgate serve`` (httptools parser) and raw sockets: a HEAD answer, which has no body
write, still arrives (RFC 9110 section 9.3.2); ``Expect: 100-continue`` gets its interim
``100 Continue`` before the client sends the body, and then the answer (RFC 9110 section
10.1.1); answers to requests sent back to back on one keep-alive connection arrive whole and
in order (RFC 9112 section 9.3.2, pipelining).
"""

from __future__ import annotations

import json
import socket

import pytest
from http_api.cases import GOOD_RECORD
from http_api.conftest import build_store
from http_api.server import ServeProcess


@pytest.fixture(scope="module")
def server(tmp_path_factory, service_models):
    workdir = tmp_path_factory.mktemp("writes")
    store = build_store(workdir / "store", service_models)
    with ServeProcess(workdir, "--store", store.root) as running:
        yield running


def _read_until(sock: socket.socket, data: bytes, marker: bytes, count: int = 1) -> bytes:
    while data.count(marker) < count:
        chunk = sock.recv(65536)
        if not chunk:
            break
        data += chunk
    return data


def _answers(data: bytes) -> list[tuple[bytes, bytes]]:
    """(status line, body) of each Content-Length-framed answer in ``data``, in order."""
    found = []
    while data:
        head, _, rest = data.partition(b"\r\n\r\n")
        lines = head.split(b"\r\n")
        length = next(int(line.split(b":")[1]) for line in lines if line.lower().startswith(b"content-length:"))
        found.append((lines[0], rest[:length]))
        data = rest[length:]
    return found


def test_a_head_request_gets_its_answer(server):
    with socket.create_connection(("127.0.0.1", server.port), timeout=10) as sock:
        sock.sendall(b"HEAD /healthz HTTP/1.1\r\nHost: 127.0.0.1\r\n\r\n")
        data = _read_until(sock, b"", b"\r\n\r\n")
    assert data.startswith(b"HTTP/1.1 ") and data.endswith(b"\r\n\r\n")


def test_expect_100_continue_gets_the_interim_answer_before_the_body_is_sent(server):
    body = json.dumps({"records": [GOOD_RECORD]}).encode()
    with socket.create_connection(("127.0.0.1", server.port), timeout=10) as sock:
        sock.sendall(b"POST /score/iris HTTP/1.1\r\nHost: 127.0.0.1\r\nContent-Type: application/json\r\n"
                     b"Expect: 100-continue\r\nContent-Length: %d\r\n\r\n" % len(body))
        interim = _read_until(sock, b"", b"\r\n\r\n")
        assert interim == b"HTTP/1.1 100 Continue\r\n\r\n"
        sock.sendall(body)
        data = _read_until(sock, b"", b"}]}")
    [(status, answer)] = _answers(data)
    assert status == b"HTTP/1.1 200 OK"
    assert json.loads(answer)["results"][0]["status"] == "scored"


def test_answers_to_back_to_back_requests_arrive_whole_and_in_order(server):
    bodies = [json.dumps({"records": [GOOD_RECORD] * count}).encode() for count in (1, 2, 3)]
    requests = b"".join(b"POST /score/iris HTTP/1.1\r\nHost: 127.0.0.1\r\nContent-Type: application/json\r\n"
                        b"Content-Length: %d\r\n\r\n%s" % (len(body), body) for body in bodies)
    with socket.create_connection(("127.0.0.1", server.port), timeout=10) as sock:
        sock.sendall(requests + b"GET /healthz HTTP/1.1\r\nHost: 127.0.0.1\r\nConnection: close\r\n\r\n")
        data = _read_until(sock, b"", b"HTTP/1.1 ", count=10**6)  # read until the server closes
    answers = _answers(data)
    assert [status for status, _ in answers] == [b"HTTP/1.1 200 OK"] * 4
    assert [len(json.loads(answer)["results"]) for _, answer in answers[:3]] == [1, 2, 3]
