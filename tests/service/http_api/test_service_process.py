"""The same specification against a real ``rbfgate serve`` process on a free 127.0.0.1 port.

Each server is started and stopped by its test (SIGTERM, then a bounded wait). References
as in the in-process tests: scikit-learn (reference.py), RFC 9457 / RFC 6750 / RFC 8259
(cases.py), RFC 9110 section 15.5.14 for 413 Content Too Large.
"""

from __future__ import annotations

import socket

import numpy as np
import pytest

from service.tokens import add_token

from .cases import GOOD_RECORD, check_bad_inputs, check_role_matrix_with_tokens, check_role_matrix_without_tokens
from .conftest import ROLE_NAMES, build_store
from .reference import assert_close, sklearn_reference
from .server import ServeProcess

_MAX_BODY = 64 * 1024


@pytest.fixture(scope="module")
def open_server(tmp_path_factory, service_models):
    """One worker, no tokens file, a 64 KiB body limit."""
    workdir = tmp_path_factory.mktemp("serve-open")
    build_store(workdir / "store", service_models)
    with ServeProcess(workdir, "--store", workdir / "store", "--max-body-bytes", _MAX_BODY) as server:
        yield server


def test_served_scores_equal_sklearn(open_server, service_models):
    published = service_models.iris1
    rows = published.X[::6]
    with open_server.client() as client:
        response = client.post("/score/iris", json={"records": published.records(rows)})
    assert response.status_code == 200
    body = response.json()
    assert response.headers["Rbfgate-Bundle-Sha256"] == body["bundle_sha256"] == published.bundle.digest
    reference = sklearn_reference(published.model, rows)
    classes = published.bundle.classes
    assert [result["label"] for result in body["results"]] == reference["labels"].tolist()
    assert_close([[r["decision"][c] for c in classes] for r in body["results"]], reference["decision"], "decision_function")
    assert_close([[r["probability"][c] for c in classes] for r in body["results"]], reference["probabilities"], "predict_proba")


def test_served_bad_inputs_get_their_status_and_problem_details(open_server):
    with open_server.client() as client:
        check_bad_inputs(client)


def test_served_role_matrix_without_tokens(tmp_path, service_models):
    build_store(tmp_path / "store", service_models)
    with ServeProcess(tmp_path, "--store", tmp_path / "store") as server, server.client() as client:
        check_role_matrix_without_tokens(client)


def test_served_role_matrix_with_tokens(tmp_path, service_models):
    build_store(tmp_path / "store", service_models)
    tokens = tmp_path / "tokens.json"
    issued = {role: add_token(tokens, name, role)[0] for role, name in ROLE_NAMES.items()}
    with ServeProcess(tmp_path, "--store", tmp_path / "store", "--tokens", tokens) as server, server.client() as client:
        check_role_matrix_with_tokens(client, issued)


def _status_line(sock: socket.socket) -> str:
    received = b""
    while b"\r\n" not in received:
        chunk = sock.recv(4096)
        if not chunk:
            break
        received += chunk
    return received.split(b"\r\n", 1)[0].decode("latin-1")


def test_declared_oversized_body_is_413_before_any_of_it_is_sent(open_server):
    with socket.create_connection(("127.0.0.1", open_server.port), timeout=20) as sock:
        sock.sendall(
            b"POST /score/iris HTTP/1.1\r\nHost: 127.0.0.1\r\nContent-Type: application/json\r\n"
            b"Content-Length: 104857600\r\n\r\n"  # 100 MiB declared, none sent
        )
        assert _status_line(sock).split(" ")[1] == "413"


def test_chunked_oversized_body_is_413_long_before_its_end(open_server):
    chunk = b"x" * 1024
    sent = 0
    with socket.create_connection(("127.0.0.1", open_server.port), timeout=20) as sock:
        sock.sendall(b"POST /score/iris HTTP/1.1\r\nHost: 127.0.0.1\r\nTransfer-Encoding: chunked\r\n\r\n")
        sock.settimeout(0.0)
        status = ""
        while sent < 8 * 1024 * 1024:  # an 8 MiB body that the server should stop reading at 64 KiB
            try:
                sock.sendall(b"400\r\n" + chunk + b"\r\n")
                sent += len(chunk)
            except (BlockingIOError, BrokenPipeError, ConnectionResetError):
                break
            try:
                if sock.recv(1, socket.MSG_PEEK):
                    break
            except BlockingIOError:
                continue
        sock.settimeout(20)
        status = _status_line(sock)
    assert status.split(" ")[1] == "413"
    assert sent < 8 * 1024 * 1024


def test_served_metrics_and_logs(open_server):
    with open_server.client() as client:
        client.post("/score/iris", json={"records": [GOOD_RECORD]})
        metrics = client.get("/metrics")
    assert metrics.headers["content-type"].startswith("text/plain")
    assert "rbfgate_score_requests_total" in metrics.text
    assert open_server.wait_for_log(lambda event: event.get("event") == "request"
                                    and event.get("route") == "/score/{model}")


def test_switch_under_load_with_two_workers(tmp_path, service_models):
    """Concurrent clients while the operator switches back and forth: no failed request, and
    every answer carries exactly the numbers of the version it names."""
    from .load import run_switch_under_load

    store = build_store(tmp_path / "store", service_models)
    tokens = tmp_path / "tokens.json"
    operate = add_token(tokens, "ops-alice", "operate")[0]
    score = add_token(tokens, "team-checkout", "score")[0]
    published = {"1.0.0": service_models.iris1, "2.0.0": service_models.iris2}
    rows = service_models.iris1.X[::15]
    expected = {version: sklearn_reference(p.model, rows) for version, p in published.items()}  # scikit-learn
    # The two versions must differ clearly, or the comparison below could not tell them apart.
    assert np.abs(expected["1.0.0"]["decision"] - expected["2.0.0"]["decision"]).max() > 1e-3
    args = ("--store", store.root, "--tokens", tokens, "--workers", "2", "--poll-interval", "0.2")
    with ServeProcess(tmp_path, *args) as server:
        outcome = run_switch_under_load(
            server, records=service_models.iris1.records(rows), score_token=score, operate_token=operate,
            versions=["2.0.0", "1.0.0"] * 3, threads=4, max_requests_per_thread=300,
        )
    assert outcome.failures == [], outcome.failures[:3]
    assert set(outcome.versions_seen) == {"1.0.0", "2.0.0"}
    for version, body in outcome.answers:
        assert body["bundle_sha256"] == published[version].bundle.digest
        reference = expected[version]
        decision = np.array([[r["decision"][c] for c in published[version].bundle.classes] for r in body["results"]])
        assert_close(decision, reference["decision"], f"decision_function of {version}")
        assert [r["label"] for r in body["results"]] == reference["labels"].tolist()
    # Multiprocess metrics: any worker reports the requests of both.
    assert outcome.metrics_scoring_requests == outcome.requests
