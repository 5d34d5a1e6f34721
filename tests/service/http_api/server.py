"""Run a real ``rbfgate serve`` process on a free 127.0.0.1 port for the duration of a test."""

from __future__ import annotations

import json
import os
import subprocess
import sys
import time
from collections.abc import Callable
from pathlib import Path

import httpx

from tests.process_control import free_port, stop_process_group, wait_until_ok

__all__ = ["ServeProcess", "free_port"]

_START_SECONDS = 90.0
_STOP_SECONDS = 30.0


class ServeProcess:
    """``with ServeProcess(tmp_path, "--store", root, ...) as server:`` -> ``server.url``, ``server.client()``."""

    def __init__(self, workdir: Path, *args: str) -> None:
        self.port = free_port()
        self.url = f"http://127.0.0.1:{self.port}"
        self.stdout_path = Path(workdir) / f"serve-{self.port}.out"
        self.stderr_path = Path(workdir) / f"serve-{self.port}.err"
        self.args = [sys.executable, "-m", "model_store", "serve", "--host", "127.0.0.1", "--port", str(self.port)]
        self.args += [str(arg) for arg in args]
        self.process: subprocess.Popen | None = None

    def __enter__(self) -> "ServeProcess":
        environ = {key: value for key, value in os.environ.items()
                   if key not in ("PROMETHEUS_MULTIPROC_DIR", "RBFGATE_TOKENS", "RBFGATE_STORE")}
        with open(self.stdout_path, "wb") as stdout, open(self.stderr_path, "wb") as stderr:
            # Its own session, so a stuck server and its workers can be killed as one group.
            self.process = subprocess.Popen(self.args, stdout=stdout, stderr=stderr, env=environ, start_new_session=True)
        try:
            self._wait_until_answering()
        except BaseException:
            self.__exit__(None, None, None)
            raise
        return self

    def __exit__(self, *exc_info) -> None:
        stop_process_group(self.process, _STOP_SECONDS)

    def client(self, **kwargs) -> httpx.Client:
        return httpx.Client(base_url=self.url, timeout=30.0, **kwargs)

    def log_lines(self) -> list[str]:
        return self.stdout_path.read_text().splitlines()

    def wait_for_log(self, matches: Callable[[dict], bool], timeout: float = 30.0) -> list[dict]:
        """The JSON log events for which ``matches`` is true, waiting (at most ``timeout`` s) until there is one.

        A request's line is written when the request ends, after its answer was sent (its duration covers
        the sending), so a client can hold the answer before the line exists: read the log only this way.
        """
        deadline = time.monotonic() + timeout
        while True:
            found = [event for event in self._events() if matches(event)]
            if found or time.monotonic() > deadline:
                return found
            time.sleep(0.05)

    def _events(self) -> list[dict]:
        events = []
        for line in self.log_lines():
            try:
                event = json.loads(line)
            except ValueError:
                continue  # a line still being written, or not one of ours
            if isinstance(event, dict):
                events.append(event)
        return events

    def _wait_until_answering(self) -> None:
        wait_until_ok(self.process, f"{self.url}/healthz", _START_SECONDS,
                      lambda: f"rbfgate serve: {self.stderr_path.read_text()}")
