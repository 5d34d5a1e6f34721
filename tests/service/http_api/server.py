"""Run a real ``rbfgate serve`` process on a free 127.0.0.1 port for the duration of a test."""

from __future__ import annotations

import os
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path

import httpx

__all__ = ["ServeProcess", "free_port"]

_START_SECONDS = 90.0
_STOP_SECONDS = 30.0


def free_port() -> int:
    """A port the kernel just handed out on 127.0.0.1 (closed again, so serve can bind it)."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


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
        if self.process is None or self.process.poll() is not None:
            return
        self.process.send_signal(signal.SIGTERM)
        try:
            self.process.wait(_STOP_SECONDS)
        except subprocess.TimeoutExpired:
            os.killpg(self.process.pid, signal.SIGKILL)
            self.process.wait(_STOP_SECONDS)

    def client(self, **kwargs) -> httpx.Client:
        return httpx.Client(base_url=self.url, timeout=30.0, **kwargs)

    def log_lines(self) -> list[str]:
        return self.stdout_path.read_text().splitlines()

    def _wait_until_answering(self) -> None:
        deadline = time.monotonic() + _START_SECONDS
        with self.client() as client:
            while time.monotonic() < deadline:
                if self.process.poll() is not None:
                    raise RuntimeError(f"rbfgate serve exited with {self.process.returncode}: {self.stderr_path.read_text()}")
                try:
                    if client.get("/healthz").status_code == 200:
                        return
                except httpx.TransportError:
                    pass
                time.sleep(0.1)
        raise RuntimeError(f"rbfgate serve did not answer within {_START_SECONDS} s: {self.stderr_path.read_text()}")
