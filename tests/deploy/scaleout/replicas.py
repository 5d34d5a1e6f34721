"""``rbfgate serve`` replicas over one store, each a real process on its own 127.0.0.1 port.

A replica can be SIGKILLed (nothing runs at exit, the way a crashed pod or an OOM kill ends)
and started again on the same port, which is how a load balancer with a fixed upstream list
sees a replica come back.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
from pathlib import Path

from tests.process_control import free_port, stop_process_group, wait_until_ok

__all__ = ["Replica", "clean_environment", "free_port", "start_all"]

_READY_SECONDS = 60.0
_STOP_SECONDS = 15.0
# Variables that would change what `rbfgate serve` does if the test runner happened to set them.
_FOREIGN_PREFIXES = ("RBFGATE_", "PROMETHEUS_MULTIPROC_DIR")


def clean_environment() -> dict[str, str]:
    return {key: value for key, value in os.environ.items() if not key.startswith(_FOREIGN_PREFIXES)}


class Replica:
    """One ``rbfgate serve --workers 1`` on ``port``; ``start`` may be called again after ``kill``."""

    def __init__(self, name: str, store_root: Path, workdir: Path, port: int | None = None) -> None:
        self.name = name
        self.store_root = Path(store_root)
        self.workdir = Path(workdir)
        self.port = port or free_port()
        self.address = f"127.0.0.1:{self.port}"
        self.url = f"http://{self.address}"
        self.process: subprocess.Popen | None = None
        self.starts = 0

    def start(self) -> None:
        self.starts += 1
        log = self.workdir / f"{self.name}-{self.starts}"
        command = [sys.executable, "-m", "model_store", "serve", "--store", str(self.store_root),
                   "--host", "127.0.0.1", "--port", str(self.port), "--workers", "1"]
        with open(f"{log}.out", "wb") as stdout, open(f"{log}.err", "wb") as stderr:
            self.process = subprocess.Popen(command, stdout=stdout, stderr=stderr, env=clean_environment(),
                                            start_new_session=True)

    def wait_ready(self, timeout: float = _READY_SECONDS) -> None:
        """Until /readyz answers 200 (every active model loaded and self-tested)."""
        if self.process is None:
            raise RuntimeError(f"{self.name} was never started")
        wait_until_ok(self.process, f"{self.url}/readyz", timeout, lambda: f"{self.name}: {self.stderr()}", interval=0.05)

    def kill(self) -> None:
        """SIGKILL: no shutdown handler runs, open connections are reset."""
        assert self.process is not None and self.process.poll() is None, f"{self.name} is not running"
        self.process.send_signal(signal.SIGKILL)
        self.process.wait(_STOP_SECONDS)

    def stop(self) -> None:
        stop_process_group(self.process, _STOP_SECONDS)

    def stderr(self) -> str:
        path = self.workdir / f"{self.name}-{self.starts}.err"
        return path.read_text(errors="replace")[-2000:] if path.exists() else ""


def start_all(replicas: list[Replica]) -> None:
    """Start every replica first and then wait for each, so their start-ups overlap."""
    for replica in replicas:
        replica.start()
    for replica in replicas:
        replica.wait_ready()
