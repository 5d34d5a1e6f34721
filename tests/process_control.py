"""Starting and stopping the real server processes the tests run (rbfgate serve, nginx, the reference app).

Shared by tests/service, tests/deploy, tests/reliability and tests/benchmarks: a free loopback
port, a readiness poll, and a stop that escalates to SIGKILL of the whole process group, so a
stuck server and its workers never outlive the test that started them.
"""

from __future__ import annotations

import os
import signal
import socket
import subprocess
import time
from collections.abc import Callable

import httpx

__all__ = ["free_port", "stop_process_group", "wait_until_ok"]


def free_port() -> int:
    """A port the kernel just handed out on 127.0.0.1 (closed again, so a server can bind it)."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


def stop_process_group(process: subprocess.Popen | None, timeout: float, first: int = signal.SIGTERM) -> None:
    """Send ``first`` to a process started with ``start_new_session=True``; SIGKILL its group after ``timeout`` s."""
    if process is None or process.poll() is not None:
        return
    process.send_signal(first)
    try:
        process.wait(timeout)
    except subprocess.TimeoutExpired:
        os.killpg(process.pid, signal.SIGKILL)
        process.wait(timeout)


def wait_until_ok(
    process: subprocess.Popen, url: str, timeout: float, describe: Callable[[], str], *, interval: float = 0.1
) -> None:
    """Poll GET ``url`` until it answers 200; raise RuntimeError with ``describe()`` if the process
    exits or ``timeout`` seconds pass first."""
    deadline = time.monotonic() + timeout
    with httpx.Client(timeout=5.0) as client:
        while time.monotonic() < deadline:
            if process.poll() is not None:
                raise RuntimeError(f"exited with {process.returncode}: {describe()}")
            try:
                if client.get(url).status_code == 200:
                    return
            except httpx.TransportError:
                pass
            time.sleep(interval)
    raise RuntimeError(f"no 200 from {url} within {timeout} s: {describe()}")
