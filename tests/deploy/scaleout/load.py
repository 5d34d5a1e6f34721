"""A bounded scoring load through the balancer, and a watch on each replica directly.

``ScoringLoad``: client threads post the same batch through one URL until stopped.
``DirectWatch``: one thread per replica asks that replica (not the balancer) every
``interval`` seconds which version scores the batch, to time a switch per replica.

Bounded in count (``max_requests`` per thread) and in time (``max_seconds``, then the
threads stop on their own; joins time out), so a hung server fails the test instead of
hanging it. Every answer is checked as it arrives; anything but a 200 whose body passes
``check`` is a failure, and so is a transport error, with one exception kept apart in
``cut_off``: an answer whose status and headers arrived and whose body never did. That is
what a replica killed between its two writes (headers, then body) leaves behind; the
balancer has already forwarded the headers and cannot resend the request, so the tests
check who was answering and when, instead of counting it as an ordinary failure.
"""

from __future__ import annotations

import threading
import time
from collections.abc import Callable
from dataclasses import dataclass

import httpx

from scaleout.balancer import UPSTREAM_HEADER

__all__ = ["Answer", "DirectWatch", "ScoringLoad"]

_JOIN_SECONDS = 30.0
_REQUEST_TIMEOUT = 20.0


@dataclass(frozen=True)
class Answer:
    """One successful request: wall-clock times (time.time()), the version it names, the replicas nginx tried."""

    started: float
    finished: float
    version: str
    upstream: str

    @property
    def tried(self) -> list[str]:
        return [address.strip() for address in self.upstream.split(",") if address.strip()]

    @property
    def answered_by(self) -> str:
        return self.tried[-1] if self.tried else ""


class ScoringLoad:
    """``with ScoringLoad(url, path, body, check, threads=4):`` runs the load inside the block."""

    def __init__(
        self,
        url: str,
        path: str,
        body: dict,
        check: Callable[[dict], str | None],
        *,
        threads: int = 4,
        max_requests: int = 4000,
        max_seconds: float = 45.0,
    ) -> None:
        self.url, self.path, self.body, self.check = url, path, body, check
        self.threads = threads
        self.max_requests = max_requests
        self.max_seconds = max_seconds
        self.answers: list[Answer] = []
        self.failures: list[str] = []
        self.cut_off: list[Answer] = []  # status and headers arrived, then the connection closed mid-body
        self._lock = threading.Lock()
        self._stop = threading.Event()
        self._workers: list[threading.Thread] = []

    def __enter__(self) -> "ScoringLoad":
        give_up = time.monotonic() + self.max_seconds
        self._workers = [threading.Thread(target=self._run, args=(give_up,), name=f"scoring-load-{index}", daemon=True)
                         for index in range(self.threads)]
        for worker in self._workers:
            worker.start()
        return self

    def __exit__(self, *exc_info) -> None:
        self._stop.set()
        for worker in self._workers:
            worker.join(_JOIN_SECONDS)
            if worker.is_alive():
                self.failures.append(f"{worker.name} did not stop within {_JOIN_SECONDS} s")

    def answered_since(self, moment: float) -> list[Answer]:
        """Answers to requests started at or after ``moment`` (time.time())."""
        with self._lock:
            return [answer for answer in self.answers if answer.started >= moment]

    def _run(self, give_up: float) -> None:
        with httpx.Client(base_url=self.url, timeout=_REQUEST_TIMEOUT) as client:
            for _ in range(self.max_requests):
                if self._stop.is_set() or time.monotonic() > give_up:
                    return
                started = time.time()
                try:
                    with client.stream("POST", self.path, json=self.body) as response:
                        try:
                            response.read()
                        except httpx.RemoteProtocolError:
                            # The replica died between writing the headers and the body: no
                            # balancer can resend a request whose answer it has begun to forward.
                            cut = Answer(started, time.time(), response.headers.get("Rbfgate-Version", ""),
                                         response.headers.get(UPSTREAM_HEADER, ""))
                            with self._lock:
                                self.cut_off.append(cut)
                            continue
                except httpx.HTTPError as exc:
                    self._fail(f"transport error: {exc!r}")
                    continue
                problem = self._problem(response)
                if problem is not None:
                    self._fail(problem)
                    continue
                answer = Answer(started, time.time(), response.json()["version"],
                                response.headers.get(UPSTREAM_HEADER, ""))
                with self._lock:
                    self.answers.append(answer)

    def _problem(self, response: httpx.Response) -> str | None:
        upstream = response.headers.get(UPSTREAM_HEADER, "?")
        if response.status_code != 200:
            return f"{response.status_code} from {upstream}: {response.text[:300]}"
        body = response.json()
        if response.headers.get("Rbfgate-Version") != body.get("version"):
            return f"header names {response.headers.get('Rbfgate-Version')}, body names {body.get('version')}"
        problem = self.check(body)
        return None if problem is None else f"{problem} (from {upstream})"

    def _fail(self, message: str) -> None:
        with self._lock:
            self.failures.append(message)


class DirectWatch:
    """``with DirectWatch({name: url}, path, body, check):`` -> ``observations[name]`` = [(started, finished, version)]."""

    def __init__(
        self,
        urls: dict[str, str],
        path: str,
        body: dict,
        check: Callable[[dict], str | None],
        *,
        interval: float = 0.02,
        max_requests: int = 3000,
        max_seconds: float = 45.0,
    ) -> None:
        self.urls, self.path, self.body, self.check = dict(urls), path, body, check
        self.interval = interval
        self.max_requests = max_requests
        self.max_seconds = max_seconds
        self.observations: dict[str, list[tuple[float, float, str]]] = {name: [] for name in self.urls}
        self.failures: list[str] = []
        self._lock = threading.Lock()
        self._stop = threading.Event()
        self._workers: list[threading.Thread] = []

    def __enter__(self) -> "DirectWatch":
        give_up = time.monotonic() + self.max_seconds
        self._workers = [threading.Thread(target=self._run, args=(name, give_up), name=f"watch-{name}", daemon=True)
                         for name in self.urls]
        for worker in self._workers:
            worker.start()
        return self

    def __exit__(self, *exc_info) -> None:
        self._stop.set()
        for worker in self._workers:
            worker.join(_JOIN_SECONDS)
            if worker.is_alive():
                self.failures.append(f"{worker.name} did not stop within {_JOIN_SECONDS} s")

    def wait_for(self, version: str, timeout: float) -> bool:
        """Until every replica has answered with ``version`` at least once (bounded by ``timeout``)."""
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if all(self.switched_at(name, version) is not None for name in self.urls):
                return True
            time.sleep(0.01)
        return False

    def switched_at(self, name: str, version: str) -> float | None:
        """When the answer that began ``name``'s final run of ``version`` answers finished (an upper
        bound on the moment the replica switched), or None if its last answer names another version."""
        with self._lock:
            observed = list(self.observations[name])
        switched = None
        for _, finished, seen in observed:
            if seen != version:
                switched = None
            elif switched is None:
                switched = finished
        return switched

    def versions_seen(self, name: str) -> list[str]:
        """The versions ``name`` answered with, in order, repeats collapsed (["1.0.0", "2.0.0"] for one switch)."""
        with self._lock:
            seen = [version for _, _, version in self.observations[name]]
        return [version for index, version in enumerate(seen) if index == 0 or seen[index - 1] != version]

    def _run(self, name: str, give_up: float) -> None:
        with httpx.Client(base_url=self.urls[name], timeout=_REQUEST_TIMEOUT) as client:
            for _ in range(self.max_requests):
                if self._stop.wait(self.interval) or time.monotonic() > give_up:
                    return
                started = time.time()
                try:
                    response = client.post(self.path, json=self.body)
                except httpx.HTTPError as exc:
                    with self._lock:
                        self.failures.append(f"{name}: transport error {exc!r}")
                    continue
                problem = None if response.status_code == 200 else f"{response.status_code}: {response.text[:300]}"
                problem = problem or self.check(response.json())
                with self._lock:
                    if problem is not None:
                        self.failures.append(f"{name}: {problem}")
                    else:
                        self.observations[name].append((started, time.time(), response.json()["version"]))
