"""A switch made through the API reaches both workers of a real ``rbfgate serve --workers 2`` kept busy by clients.

The bound here is functional and generous (60 s for every worker, on a shared machine); the measured figures
(about the poll interval plus one bundle load) live in tests/benchmarks/test_switch_convergence.py.
Reference for the answers: the version each response names and the bundle digests of the published models.
"""

from __future__ import annotations

import json
import threading
import time

from service.tokens import add_token

from .conftest import build_store
from .server import ServeProcess

_BOUND_SECONDS = 60.0
_CLIENTS = 4


def _switch_events(server: ServeProcess, version: str) -> int:
    count = 0
    for line in server.log_lines():
        if line.startswith("{") and '"switch"' in line:  # the JSON log lines (uvicorn writes plain text too)
            event = json.loads(line)
            count += event.get("event") == "switch" and event.get("version") == version
    return count


def test_an_api_switch_reaches_both_busy_workers(tmp_path, service_models):
    build_store(tmp_path / "store", service_models)
    tokens = tmp_path / "tokens.json"
    operate, _ = add_token(tokens, "ops-alice", "operate")
    score, _ = add_token(tokens, "team-checkout", "score")
    body = {"records": service_models.iris1.records(service_models.iris1.X[:20])}
    stop = threading.Event()
    failures: list[str] = []

    with ServeProcess(tmp_path, "--store", tmp_path / "store", "--workers", "2", "--poll-interval", "1",
                      "--tokens", tokens) as server:
        def load() -> None:
            with server.client(headers={"Authorization": f"Bearer {score}"}) as client:
                deadline = time.monotonic() + 4 * _BOUND_SECONDS  # bounded even if the test body fails
                while not stop.is_set() and time.monotonic() < deadline:
                    response = client.post("/score/iris", json=body)
                    if response.status_code != 200:
                        failures.append(f"{response.status_code} {response.text[:200]}")

        clients = [threading.Thread(target=load, daemon=True) for _ in range(_CLIENTS)]
        for thread in clients:
            thread.start()
        try:
            with server.client(headers={"Authorization": f"Bearer {operate}"}) as operator:
                for target in ("2.0.0", "1.0.0"):
                    before = _switch_events(server, target)
                    response = operator.post("/models/iris/activate", json={  # 2.0.0 drops calibration: a breaking change
                        "version": target, "reason": "under load", "accept_breaking": True})
                    assert response.status_code == 200, response.text
                    deadline = time.monotonic() + _BOUND_SECONDS
                    while _switch_events(server, target) < before + 2 and time.monotonic() < deadline:
                        time.sleep(0.05)
                    assert _switch_events(server, target) == before + 2, f"not every worker switched to {target}"
        finally:
            stop.set()
            for thread in clients:
                thread.join(30)
    assert failures == []
