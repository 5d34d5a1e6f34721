"""Cheap attacks on a real ``rbfgate serve``, as measurements: each function runs one attack for a
bounded count and time against 127.0.0.1 and returns what it saw. The tests decide what to assert
(generous functional bounds in the default suite, the full-size attacks marked slow), and the slow
tests print the figures quoted in the README's promises section.

- ``refusal_flood``: clients posting bodies of many empty records (each refuses every feature)
  while a probe times /healthz and a one-record request;
- ``concurrent_large_requests``: many simultaneous requests of many good records, with the
  server's resident memory before and after;
- ``slow_reconnecting_clients``: connections that trickle header bytes and reconnect whenever the
  server closes them, while a probe counts how many health checks get through;
- ``cycle_pinned_versions``: pinned scoring of each version in turn, with the resident memory.
"""

from __future__ import annotations

import json
import socket
import statistics
import threading
import time
from collections import Counter
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field

import httpx

from .support import process_tree, resident_kib

__all__ = [
    "FloodOutcome",
    "LargeRequestsOutcome",
    "SlowClientsOutcome",
    "concurrent_large_requests",
    "cycle_pinned_versions",
    "refusal_flood",
    "resident_mib",
    "slow_reconnecting_clients",
]


def resident_mib(server_pid: int) -> float:
    """Resident size of the server and all its processes (parent, workers, resource tracker), MiB."""
    return resident_kib(process_tree(server_pid)) / 1024


def _percentile(values: list[float], share: float) -> float:
    ordered = sorted(values)
    return ordered[min(len(ordered) - 1, int(share * len(ordered)))] if ordered else float("nan")


@dataclass
class FloodOutcome:
    health_seconds: list[float] = field(default_factory=list)
    health_failures: int = 0
    good_seconds: list[float] = field(default_factory=list)
    flood_statuses: Counter = field(default_factory=Counter)
    answer_bytes: int = 0

    def summary(self) -> str:
        return (f"/healthz p50 {1000 * statistics.median(self.health_seconds):.1f} ms, "
                f"p99 {1000 * _percentile(self.health_seconds, 0.99):.1f} ms ({len(self.health_seconds)} answered, "
                f"{self.health_failures} failed); one-record p50 {1000 * statistics.median(self.good_seconds):.1f} ms; "
                f"flood answers {dict(self.flood_statuses)} of {self.answer_bytes} bytes each")


def refusal_flood(url: str, record: dict, *, clients: int, seconds: float, empty_records: int = 1000) -> FloodOutcome:
    """``clients`` threads post ``{"records": [{}] * empty_records}`` for ``seconds``; a probe measures."""
    outcome = FloodOutcome()
    stop = threading.Event()
    body = json.dumps({"records": [{}] * empty_records})

    def flood() -> None:
        with httpx.Client(base_url=url, timeout=30.0) as client:
            while not stop.is_set():
                try:
                    response = client.post("/score/iris", content=body, headers={"Content-Type": "application/json"})
                except httpx.HTTPError:
                    outcome.flood_statuses["error"] += 1
                    continue
                outcome.flood_statuses[response.status_code] += 1
                outcome.answer_bytes = len(response.content)

    threads = [threading.Thread(target=flood) for _ in range(clients)]
    for thread in threads:
        thread.start()
    deadline = time.monotonic() + seconds
    with httpx.Client(base_url=url, timeout=10.0) as probe:
        time.sleep(min(1.0, seconds / 4))  # let the flood start
        while time.monotonic() < deadline:
            started = time.perf_counter()
            try:
                ok = probe.get("/healthz").status_code == 200
            except httpx.HTTPError:
                ok = False
            if ok:
                outcome.health_seconds.append(time.perf_counter() - started)
            else:
                outcome.health_failures += 1
            started = time.perf_counter()
            try:
                if probe.post("/score/iris", json={"records": [record]}).status_code == 200:
                    outcome.good_seconds.append(time.perf_counter() - started)
            except httpx.HTTPError:
                pass
            time.sleep(0.05)
    stop.set()
    for thread in threads:
        thread.join(60)
    return outcome


@dataclass
class LargeRequestsOutcome:
    statuses: Counter
    retry_after: set
    problem_types: set
    resident_before_mib: float
    resident_peak_mib: float
    resident_after_mib: float

    def summary(self) -> str:
        return (f"answers {dict(self.statuses)}; resident {self.resident_before_mib:.0f} MiB before, "
                f"peak {self.resident_peak_mib:.0f} MiB, {self.resident_after_mib:.0f} MiB after")


def concurrent_large_requests(url: str, server_pid: int, records: list[dict], *, concurrent: int,
                              rounds: int = 1) -> LargeRequestsOutcome:
    """``concurrent`` simultaneous requests of ``records``, ``rounds`` times; memory before, peak and after."""
    body = json.dumps({"records": records})
    statuses: Counter = Counter()
    retry_after: set = set()
    problem_types: set = set()
    before = resident_mib(server_pid)
    peak = before
    barrier = threading.Barrier(concurrent)

    def one(_: int) -> None:
        with httpx.Client(base_url=url, timeout=120.0) as client:
            barrier.wait(60)
            response = client.post("/score/iris", content=body, headers={"Content-Type": "application/json"})
        statuses[response.status_code] += 1
        if response.status_code == 503:
            retry_after.add(response.headers.get("retry-after"))
            problem_types.add((response.headers.get("content-type"), response.json().get("type")))

    for _ in range(rounds):
        with ThreadPoolExecutor(concurrent) as pool:
            futures = [pool.submit(one, index) for index in range(concurrent)]
            while not all(future.done() for future in futures):
                peak = max(peak, resident_mib(server_pid))
                time.sleep(0.05)
            for future in futures:
                future.result()
        barrier.reset()
    time.sleep(1.0)
    return LargeRequestsOutcome(statuses, retry_after, problem_types, before, peak, resident_mib(server_pid))


@dataclass
class SlowClientsOutcome:
    health_ok: int
    health_tried: int
    reconnects: int

    def summary(self) -> str:
        return f"{self.health_ok} of {self.health_tried} health checks answered; the slow clients reconnected {self.reconnects} times"


def slow_reconnecting_clients(host: str, port: int, url: str, *, connections: int, seconds: float,
                              probe_timeout: float = 5.0) -> SlowClientsOutcome:
    """``connections`` sockets send a request line, then one header byte at a time; each one the server
    closes is opened again at once. A probe sends a health check every 0.1 s with ``probe_timeout``."""
    stop = threading.Event()
    reconnects = 0
    lock = threading.Lock()

    def open_one() -> socket.socket | None:
        try:
            sock = socket.create_connection((host, port), timeout=2)
            sock.sendall(b"GET /healthz HTTP/1.1\r\nHost: 127.0.0.1\r\n")
            return sock
        except OSError:
            return None

    def attacker(share: int) -> None:
        nonlocal reconnects
        sockets = [open_one() for _ in range(share)]
        while not stop.is_set():
            for index, sock in enumerate(sockets):
                if stop.is_set():
                    break
                try:
                    if sock is None:
                        raise OSError
                    sock.sendall(b"X")
                except OSError:
                    if sock is not None:
                        sock.close()
                    sockets[index] = open_one()
                    with lock:
                        reconnects += 1
            stop.wait(0.2)
        for sock in sockets:
            if sock is not None:
                sock.close()

    threads = [threading.Thread(target=attacker, args=(connections // 8,)) for _ in range(8)]
    for thread in threads:
        thread.start()
    time.sleep(1.0)
    ok = tried = 0
    deadline = time.monotonic() + seconds
    while time.monotonic() < deadline:
        tried += 1
        try:
            with httpx.Client(base_url=url, timeout=probe_timeout) as probe:
                ok += probe.get("/healthz", headers={"Connection": "close"}).status_code == 200
        except httpx.HTTPError:
            pass
        time.sleep(0.1)
    stop.set()
    for thread in threads:
        thread.join(60)
    return SlowClientsOutcome(ok, tried, reconnects)


def cycle_pinned_versions(url: str, server_pid: int, model: str, records: dict[str, dict], *,
                          rounds: int) -> tuple[float, float, Counter]:
    """Pinned scoring of each version in turn (``records``: version -> a record it scores), ``rounds``
    times: (resident MiB before, after, statuses)."""
    before = resident_mib(server_pid)
    statuses: Counter = Counter()
    with httpx.Client(base_url=url, timeout=120.0) as client:
        for _ in range(rounds):
            for version, record in records.items():
                response = client.post(f"/score/{model}/versions/{version}", json={"records": [record]})
                statuses[response.status_code] += 1
    time.sleep(1.0)
    return before, resident_mib(server_pid), statuses
