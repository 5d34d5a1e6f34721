"""Faults under a running ``rbfgate serve``: damaged bundles, a read-only or vanished store, a killed
worker, and a tokens file that cannot be read.

Each server is a real process on a free 127.0.0.1 port (tests/service/http_api/server.py), stopped
by its test. Expected numbers come from scikit-learn's predict and decision_function of the model
behind the version an answer names (http_api/reference.py), to the golden tolerance 1e-9 x
max(1, |v|). Waiting loops are bounded and assert only the final state, never how long it took.
"""

from __future__ import annotations

import glob
import json
import os
import shutil
import signal
import stat
import subprocess
import sys
import threading
import time

import httpx
import numpy as np
import pytest
from http_api.cases import assert_problem, bearer
from http_api.conftest import build_store
from http_api.reference import assert_close, sklearn_reference
from http_api.server import ServeProcess, free_port
from prometheus_client.parser import text_string_to_metric_families
from store_support import python_env, wait_until

from service.tokens import add_token

from .support import extra_iris_versions, process_tree, worker_pids


def _metric(text: str, name: str, **labels: str) -> float:
    return sum(sample.value for family in text_string_to_metric_families(text) for sample in family.samples
               if sample.name == name and all(sample.labels.get(key) == value for key, value in labels.items()))


def _truncate(path):
    path.write_bytes(path.read_bytes()[: path.stat().st_size // 2])


def _delete(path):
    path.unlink()


def _flip_a_bit(path):
    data = bytearray(path.read_bytes())
    data[-3] ^= 0x01  # inside the array data of a .npy file
    path.write_bytes(bytes(data))


DAMAGE = {"truncated": _truncate, "deleted": _delete, "bit-flipped": _flip_a_bit}


@pytest.fixture
def tokens(tmp_path):
    path = tmp_path / "tokens.json"
    return path, {role: add_token(path, f"{role}-holder", role)[0] for role in ("score", "operate", "audit")}


def _score(client, published, token, rows):
    response = client.post("/score/iris", json={"records": published.records(rows)}, headers=bearer(token))
    assert response.status_code == 200, response.text
    return response.json()


def _assert_answered_by(body, published, rows):
    """The answer names ``published`` and carries scikit-learn's numbers for ``rows`` from its model."""
    assert (body["version"], body["bundle_sha256"]) == (published.version, published.bundle.digest)
    expected = sklearn_reference(published.model, rows)
    classes = published.bundle.classes
    decision = np.array([[result["decision"][str(label)] for label in classes] for result in body["results"]])
    assert_close(decision, expected["decision"], f"decision_function of {published.version}")
    assert [result["label"] for result in body["results"]] == expected["labels"].tolist()


def test_damaged_bundles_are_refused_and_reported_while_the_live_version_serves(tmp_path, service_models, tokens):
    path, issued = tokens
    store = build_store(tmp_path / "store", service_models)
    refused = extra_iris_versions(tmp_path / "bundles", ["2.0.1", "2.0.2", "2.0.3"])
    followed = extra_iris_versions(tmp_path / "bundles", ["3.0.1", "3.0.2", "3.0.3"])
    for published in refused + followed:
        store.publish(published.bundle.source, actor="test-setup")
    live, rows = service_models.iris1, service_models.iris1.X[::10]
    files = {"truncated": "support_vectors.npy", "deleted": "dual_coef.npy", "bit-flipped": "support_vectors.npy"}
    args = ("--store", store.root, "--tokens", path, "--poll-interval", "0.2")
    with ServeProcess(tmp_path, *args) as server, server.client() as client:
        # 1. Damaged after publishing, then activated over HTTP: refused (409 naming the file), nothing moves.
        for (kind, damage), published in zip(DAMAGE.items(), refused):
            damage(store.bundle_dir("iris", published.version) / files[kind])
            response = client.post("/models/iris/activate", headers=bearer(issued["operate"]),
                                   json={"version": published.version, "reason": f"{kind} bundle"})
            assert files[kind] in assert_problem(response, 409)["detail"], kind
            assert store.active("iris").version == "1.0.0"
            assert store.history("iris")[-1]["action"] == "refused-activate"
            _assert_answered_by(_score(client, live, issued["score"], rows), live, rows)
            assert client.get("/readyz").json()["state"] == "ready"
        assert _metric(client.get("/metrics").text, "rbfgate_http_requests_total",
                       route="/models/{model}/activate", status="409") == 3

        # 2. Activated while sound, damaged before the service loads it (the server is stopped
        # meanwhile, so the order is certain): the live version keeps serving, /readyz and the
        # metrics name the failing version, and a later failure replaces an earlier one.
        for (kind, damage), published in zip(DAMAGE.items(), followed):
            os.killpg(server.process.pid, signal.SIGSTOP)
            try:
                store.activate("iris", published.version, reason=f"rollout, then {kind}", actor="ops",
                               accept_breaking=True)  # the fault, not the contract, is under test
                damage(store.bundle_dir("iris", published.version) / files[kind])
            finally:
                os.killpg(server.process.pid, signal.SIGCONT)

            def reported():
                entry = client.get("/readyz").json()["models"]
                return any((model["failure"] or {}).get("version") == published.version for model in entry)

            wait_until(reported, f"/readyz to report {published.version}")
            ready = client.get("/readyz")
            assert ready.status_code == 200 and ready.json()["state"] == "degraded"
            [iris] = [model for model in ready.json()["models"] if model["model"] == "iris"]
            assert iris["serving"]["version"] == "1.0.0" and iris["active"]["version"] == published.version
            assert files[kind] in iris["failure"]["detail"]
            _assert_answered_by(_score(client, live, issued["score"], rows), live, rows)
            metrics = client.get("/metrics").text
            assert _metric(metrics, "rbfgate_load_failures_total", model="iris", version=published.version) >= 1
            failing = {version: _metric(metrics, "rbfgate_load_failing", model="iris", version=version)
                       for version in [p.version for p in followed]}
            assert failing[published.version] == 1
            assert sum(failing.values()) == 1, failing  # only the version the pointer names is failing


@pytest.fixture
def immutable():
    """``immutable(paths)``: chattr +i (root ignores permission bits, not the immutable flag)."""
    changed = []

    def make(paths):
        if os.geteuid() != 0:
            pytest.skip("chattr +i needs root")
        result = subprocess.run(["chattr", "+i", *map(str, paths)], capture_output=True)
        if result.returncode != 0:
            pytest.skip(f"cannot make files immutable here: {result.stderr.decode().strip()}")
        changed.extend(paths)

    yield make
    if changed:
        subprocess.run(["chattr", "-i", *map(str, changed)], check=True)


def test_a_read_only_store_keeps_serving_and_refuses_switches_clearly(tmp_path, service_models, tokens, immutable):
    path, issued = tokens
    store = build_store(tmp_path / "store", service_models)
    live, rows = service_models.iris1, service_models.iris1.X[::10]
    with ServeProcess(tmp_path, "--store", store.root, "--tokens", path, "--poll-interval", "0.2") as server, \
            server.client() as client:
        immutable([store.root, *sorted(store.root.rglob("*"))])
        time.sleep(0.5)  # let a few polls run against the read-only store
        _assert_answered_by(_score(client, live, issued["score"], rows), live, rows)
        response = client.post("/models/iris/activate", headers=bearer(issued["operate"]),
                               json={"version": "2.0.0", "reason": "while read-only", "accept_breaking": True})
        problem = assert_problem(response, 503)
        assert "read-only" in problem["detail"] and str(store.root) in problem["detail"]
        assert client.get("/readyz").json()["state"] == "ready"  # reading the store still works
        _assert_answered_by(_score(client, live, issued["score"], rows), live, rows)


def test_a_removed_store_keeps_serving_from_memory_and_refuses_switches_clearly(tmp_path, service_models, tokens):
    path, issued = tokens
    store = build_store(tmp_path / "store", service_models)
    live, rows = service_models.iris1, service_models.iris1.X[::10]
    with ServeProcess(tmp_path, "--store", store.root, "--tokens", path, "--poll-interval", "0.2") as server, \
            server.client() as client:
        shutil.rmtree(store.root)

        def polled_the_missing_store():
            return client.get("/readyz").json()["store_error"] is not None

        wait_until(polled_the_missing_store, "a poll of the removed store")
        ready = client.get("/readyz")
        assert ready.status_code == 200 and ready.json()["state"] == "degraded"
        _assert_answered_by(_score(client, live, issued["score"], rows), live, rows)
        cancer = service_models.cancer1
        body = client.post("/score/cancer", json={"records": cancer.records(cancer.X[:3])}, headers=bearer(issued["score"]))
        assert body.status_code == 200 and body.json()["version"] == "1.0.0"
        response = client.post("/models/iris/activate", headers=bearer(issued["operate"]),
                               json={"version": "2.0.0", "reason": "store is gone", "accept_breaking": True})
        problem = assert_problem(response, 503)
        assert str(store.root) in problem["detail"] and "no longer exists" in problem["detail"]
        _assert_answered_by(_score(client, live, issued["score"], rows), live, rows)


def test_a_worker_killed_mid_request_is_replaced_and_no_other_request_fails(tmp_path, service_models, tokens):
    """uvicorn's supervisor (0.54) checks its workers every 0.5 s and starts a new one for a dead one."""
    path, issued = tokens
    store = build_store(tmp_path / "store", service_models)
    published, rows = service_models.iris1, service_models.iris1.X[::15]
    args = ("--store", store.root, "--tokens", path, "--workers", "2", "--poll-interval", "0.2")
    with ServeProcess(tmp_path, *args) as server:
        wait_until(lambda: len(worker_pids(server.process.pid)) == 2, "two workers")
        before = worker_pids(server.process.pid)
        # A request in flight: headers and half of the body sent, the rest held back.
        body = json.dumps({"records": published.records(rows)}).encode()
        held = _open_request(server.port, issued["score"], body)
        victim = _worker_holding(held, before)
        outcome = {"ok": 0, "failed": [], "stop": threading.Event()}
        killed_at = []

        def load():
            with server.client(headers=bearer(issued["score"])) as client:
                while not outcome["stop"].is_set():
                    started = time.monotonic()
                    try:
                        response = client.post("/score/iris", json={"records": published.records(rows)})
                    except httpx.TransportError as exc:
                        outcome["failed"].append((started, "transport", repr(exc)))
                        continue
                    if response.status_code != 200:
                        outcome["failed"].append((started, "status", f"{response.status_code} {response.text[:200]}"))
                    else:
                        _assert_answered_by(response.json(), published, rows)
                        outcome["ok"] += 1

        threads = [threading.Thread(target=load) for _ in range(3)]
        for thread in threads:
            thread.start()
        try:
            time.sleep(1.0)
            os.kill(victim, signal.SIGKILL)
            wait_until(lambda: _gone(victim), "the killed worker to exit")  # its sockets are closed from here on
            killed_at.append(time.monotonic())
            wait_until(lambda: len(worker_pids(server.process.pid)) == 2 and victim not in worker_pids(server.process.pid),
                       "uvicorn to replace the killed worker")
            replacement = (set(worker_pids(server.process.pid)) - set(before))
            assert replacement, (before, victim, worker_pids(server.process.pid), process_tree(server.process.pid))
            replacement = replacement.pop()
            with server.client() as client:
                wait_until(lambda: _metric(client.get("/metrics").text, "rbfgate_version_switches_total",
                                           model="iris") >= 3, "the new worker to load iris")
            time.sleep(1.0)
        finally:
            outcome["stop"].set()
            for thread in threads:
                thread.join(60)
        held_answer = _finish(held, body)
        assert held_answer is None  # the request on the killed worker died with it
        # Requests that were in flight on the killed worker at the kill may fail with it (its
        # connections are reset); no request started after the kill may fail.
        late = [failure for failure in outcome["failed"] if failure[0] > killed_at[0]]
        assert late == [], late
        assert [kind for _, kind, _ in outcome["failed"]] == ["transport"] * len(outcome["failed"])  # never an error status
        assert outcome["ok"] > 0 and replacement in worker_pids(server.process.pid)
        # After a switch, exactly one iris version shows as active: the killed worker's gauges are forgotten.
        with server.client() as client:
            response = client.post("/models/iris/activate", headers=bearer(issued["operate"]),
                                   json={"version": "2.0.0", "reason": "after the worker was replaced", "accept_breaking": True})
            assert response.status_code == 200, response.text
            wait_until(lambda: _metric(client.get("/metrics").text, "rbfgate_version_switches_total", model="iris") >= 5,
                       "both workers to switch")
            metrics = client.get("/metrics").text
        active = [sample for family in text_string_to_metric_families(metrics) for sample in family.samples
                  if sample.name == "rbfgate_active_version_info" and sample.labels["model"] == "iris" and sample.value]
        assert [sample.labels["version"] for sample in active] == ["2.0.0"]


def _gone(pid: int) -> bool:
    """Exited with every socket closed: no such process, or only its main thread left, as a zombie.

    A zombie main thread alone is not enough: when a multi-threaded process is killed, its main
    thread can show state Z (proc(5), /proc/PID/stat) while its other threads are still exiting,
    and the process's files, its client connections among them, are closed only when the last
    thread exits. Exited threads leave /proc/PID/task, so a task list holding only the zombie
    main thread means the files are closed. (Checking the main thread alone let a request sent
    on a still-open keep-alive connection of the killed worker count as "started after the kill".)
    """
    try:
        state = open(f"/proc/{pid}/stat").read().rsplit(")", 1)[1].split()[0]
        threads = os.listdir(f"/proc/{pid}/task")
    except FileNotFoundError:
        return True
    return state == "Z" and threads == [str(pid)]


def _open_request(port, token, body):
    import socket

    sock = socket.create_connection(("127.0.0.1", port), timeout=20)
    head = (f"POST /score/iris HTTP/1.1\r\nHost: 127.0.0.1\r\nAuthorization: Bearer {token}\r\n"
            f"Content-Type: application/json\r\nContent-Length: {len(body)}\r\n\r\n").encode()
    sock.sendall(head + body[: len(body) // 2])
    return sock


def _worker_holding(sock, workers):
    """The worker whose file descriptors include the server side of ``sock`` (/proc/net/tcp, proc(5))."""
    client_port = sock.getsockname()[1]
    inodes = set()

    def find():
        for line in open("/proc/net/tcp").read().splitlines()[1:]:
            fields = line.split()
            remote_port = int(fields[2].split(":")[1], 16)
            if remote_port == client_port:
                inodes.add(fields[9])
        for pid in workers:
            for fd in os.listdir(f"/proc/{pid}/fd"):
                try:
                    target = os.readlink(f"/proc/{pid}/fd/{fd}")
                except OSError:
                    continue
                if target.startswith("socket:[") and target[8:-1] in inodes:
                    return pid
        return None

    found = []
    wait_until(lambda: found.append(find()) or found[-1] is not None, "a worker to accept the held request")
    return found[-1]


def _finish(sock, body):
    with sock:
        try:
            sock.sendall(body[len(body) // 2:])
            data = sock.recv(65536)
        except OSError:
            return None
    return data or None


def _serve_refusal(tmp_path, store_root, tokens_path, prefix=()):
    command = [*prefix, sys.executable, "-m", "model_store", "serve", "--store", str(store_root),
               "--tokens", str(tokens_path), "--port", str(free_port())]
    return subprocess.run(command, capture_output=True, text=True, timeout=60, env=python_env(), cwd=tmp_path)


def _assert_refused_to_start(result, tokens_path, phrase):
    assert result.returncode == 2, (result.returncode, result.stderr)
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and str(tokens_path) in lines[0] and phrase in lines[0], result.stderr
    assert "Traceback" not in result.stderr


def test_serve_refuses_to_start_with_a_tokens_file_it_may_not_read(tmp_path, service_models, tokens):
    path, _ = tokens
    store = build_store(tmp_path / "store", service_models)
    path.chmod(0)
    # As root, permission bits apply only without the capabilities that override them
    # (capabilities(7): CAP_DAC_OVERRIDE, CAP_DAC_READ_SEARCH); setpriv drops them for serve.
    prefix = ("setpriv", "--bounding-set", "-dac_override,-dac_read_search") if os.geteuid() == 0 else ()
    if prefix and shutil.which("setpriv") is None:
        pytest.skip("setpriv is not installed")
    result = _serve_refusal(tmp_path, store.root, path, prefix)
    if "Operation not permitted" in result.stderr and "setpriv" in result.stderr:
        pytest.skip("this container does not allow dropping capabilities")
    _assert_refused_to_start(result, path, "Permission denied")


@pytest.mark.parametrize("kind", ["directory", "fifo", "not UTF-8", "not JSON"])
def test_serve_refuses_to_start_with_an_unusable_tokens_file(tmp_path, service_models, kind):
    store = build_store(tmp_path / "store", service_models)
    path = tmp_path / "tokens.json"
    if kind == "directory":
        path.mkdir()
    elif kind == "fifo":
        os.mkfifo(path)  # opening it would wait for a writer forever
    elif kind == "not UTF-8":
        path.write_bytes(b'{"format": "rbfgate-tokens/1", "tokens": [\xff]}')
    else:
        path.write_text("{ not json")
    result = _serve_refusal(tmp_path, store.root, path)
    _assert_refused_to_start(result, path, "tokens file")
    if kind in ("directory", "fifo"):
        assert stat.S_ISREG(os.stat(path).st_mode) is False  # untouched


def _metrics_directory(worker: int) -> str:
    """The prometheus-client multiprocess directory ``rbfgate serve`` gave its workers (proc(5) environ)."""
    with open(f"/proc/{worker}/environ", "rb") as handle:
        items = handle.read().decode("utf-8", "replace").split("\0")
    return dict(item.split("=", 1) for item in items if "=" in item)["PROMETHEUS_MULTIPROC_DIR"]


def _garble_first_key(data: bytes) -> bytes:
    damaged = bytearray(data)
    damaged[12:20] = b"\xff" * 8  # inside the first entry's key (prometheus_client/mmap_dict.py: 8-byte header,
    return bytes(damaged)         # then a 4-byte length and the UTF-8 key), no longer UTF-8


_BAD_FILES = {"truncated": lambda data: data[:40], "empty": lambda data: b"", "garbled key": _garble_first_key}


@pytest.mark.parametrize("damage", sorted(_BAD_FILES))
def test_metrics_answer_the_live_workers_when_a_multiprocess_file_is_damaged(tmp_path, service_models, damage):
    store = build_store(tmp_path / "store", service_models)
    rows = service_models.iris1.X[:2]
    with ServeProcess(tmp_path, "--store", store.root, "--workers", "2") as server:
        with server.client() as client:
            wait_until(lambda: len(worker_pids(server.process.pid)) == 2, "both workers to start")
            directory = _metrics_directory(worker_pids(server.process.pid)[0])
            body = {"records": service_models.iris1.records(rows)}
            for _ in range(4):
                assert client.post("/score/iris", json=body).status_code == 200
            wait_until(lambda: glob.glob(os.path.join(directory, "counter_*.db")), "a worker to write its counters")
            written = open(sorted(glob.glob(os.path.join(directory, "counter_*.db")))[0], "rb").read()
            # As a worker killed while its disk was full leaves it: a pid no process has (above pid_max, proc(5)).
            bad = os.path.join(directory, "counter_4194305.db")
            with open(bad, "wb") as handle:
                handle.write(_BAD_FILES[damage](written))
            answers = [client.get("/metrics") for _ in range(8)]  # both workers answer some of them
        assert [answer.status_code for answer in answers] == [200] * 8
        assert all(_metric(answer.text, "rbfgate_score_requests_total", model="iris") >= 4 for answer in answers)
    named = [line for line in server.stderr_path.read_text().splitlines() if bad in line]
    assert 1 <= len(named) <= 2 and all("left out" in line for line in named), named  # once per worker at most
