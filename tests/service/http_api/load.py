"""A bounded load: client threads score while an operator switches versions.

Every loop is bounded in count (requests per thread, switches) and in time (join
timeouts), so a misbehaving server fails the test instead of hanging it.
"""

from __future__ import annotations

import threading
import time
from dataclasses import dataclass, field

import httpx
from prometheus_client.parser import text_string_to_metric_families

from .cases import bearer

__all__ = ["LoadOutcome", "run_switch_under_load"]

_JOIN_SECONDS = 120.0
_WARM_SECONDS = 60.0


@dataclass
class LoadOutcome:
    requests: int = 0
    failures: list[str] = field(default_factory=list)
    answers: list[tuple[str, dict]] = field(default_factory=list)  # (version the answer names, body)
    metrics_scoring_requests: float = 0.0

    @property
    def versions_seen(self) -> list[str]:
        return sorted({version for version, _ in self.answers})


def run_switch_under_load(
    server,
    *,
    records: list[dict],
    score_token: str,
    operate_token: str,
    versions: list[str],
    threads: int,
    max_requests_per_thread: int,
    pause: float = 0.3,
) -> LoadOutcome:
    outcome = LoadOutcome()
    lock = threading.Lock()
    stop = threading.Event()
    _wait_for_workers(server, expected=2)

    def client_loop() -> None:
        with server.client(headers=bearer(score_token)) as client:
            for _ in range(max_requests_per_thread):
                if stop.is_set():
                    return
                try:
                    response = client.post("/score/iris", json={"records": records})
                except httpx.HTTPError as exc:
                    with lock:
                        outcome.failures.append(f"transport: {exc!r}")
                    continue
                with lock:
                    outcome.requests += 1
                    _check(response, outcome)

    workers = [threading.Thread(target=client_loop, name=f"load-{index}") for index in range(threads)]
    for worker in workers:
        worker.start()
    try:
        with server.client(headers=bearer(operate_token)) as operator:
            for version in versions:
                time.sleep(pause)
                response = operator.post("/models/iris/activate", json={"version": version, "reason": "switch under load", "accept_breaking": True})
                if response.status_code != 200:
                    outcome.failures.append(f"activate {version}: {response.status_code} {response.text[:200]}")
            time.sleep(pause)
    finally:
        stop.set()
        for worker in workers:
            worker.join(_JOIN_SECONDS)
    with server.client() as client:
        outcome.metrics_scoring_requests = _metric_sum(client.get("/metrics").text, "rbfgate_score_requests_total")
    return outcome


def _check(response: httpx.Response, outcome: LoadOutcome) -> None:
    if response.status_code != 200:
        outcome.failures.append(f"{response.status_code}: {response.text[:200]}")
        return
    body = response.json()
    named = (body["version"], body["bundle_sha256"])
    headers = (response.headers.get("Rbfgate-Version"), response.headers.get("Rbfgate-Bundle-Sha256"))
    if named != headers:
        outcome.failures.append(f"body names {named}, headers name {headers}")
        return
    outcome.answers.append((body["version"], body))


def _metric_sum(text: str, name: str, **labels: str) -> float:
    return sum(
        sample.value
        for family in text_string_to_metric_families(text)
        for sample in family.samples
        if sample.name == name and all(sample.labels.get(key) == value for key, value in labels.items())
    )


def _wait_for_workers(server, expected: int) -> None:
    """Each worker counts one switch per model when it loads at start-up; wait until all have."""
    deadline = time.monotonic() + _WARM_SECONDS
    with server.client() as client:
        while time.monotonic() < deadline:
            text = client.get("/metrics").text
            if _metric_sum(text, "rbfgate_version_switches_total", model="iris") >= expected:
                return
            time.sleep(0.1)
    raise RuntimeError(f"fewer than {expected} workers loaded iris within {_WARM_SECONDS} s")
