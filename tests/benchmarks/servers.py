"""Start and stop the servers under test on free 127.0.0.1 ports: ``rbfgate serve``, the reference, the bare one.

Each server runs in its own process group (so its workers stop with it), with
its output sent to files in a work directory, and is stopped by the code that
started it (SIGTERM, then SIGKILL of the group after a timeout).
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

from tests.process_control import free_port, stop_process_group, wait_until_ok

__all__ = ["Server", "bare_server", "free_port", "rbfgate_server", "reference_server"]

_START_SECONDS = 120.0
_STOP_SECONDS = 30.0
_REPO = Path(__file__).resolve().parents[2]


class Server:
    """A server process; ``ready_path`` is a GET route that answers 200 once it can serve."""

    def __init__(self, name: str, args: list[str], port: int, workdir: Path, ready_path: str,
                 environ: dict[str, str]) -> None:
        self.name = name
        self.args = args
        self.port = port
        self.url = f"http://127.0.0.1:{port}"
        self.ready_path = ready_path
        self.environ = environ
        self.stdout_path = workdir / f"{name}-{port}.out"
        self.stderr_path = workdir / f"{name}-{port}.err"
        self.process: subprocess.Popen | None = None

    def __enter__(self) -> "Server":
        with open(self.stdout_path, "wb") as stdout, open(self.stderr_path, "wb") as stderr:
            self.process = subprocess.Popen(self.args, stdout=stdout, stderr=stderr, env=self.environ,
                                            cwd=_REPO, start_new_session=True)
        try:
            self._wait_until_ready()
        except BaseException:
            self.__exit__()
            raise
        return self

    def __exit__(self, *exc_info) -> None:
        stop_process_group(self.process, _STOP_SECONDS)

    def cpu_seconds(self) -> float:
        """User + system CPU time used so far by the server and every process under it (Linux /proc)."""
        return sum(_process_cpu(pid) for pid in _descendants(self.process.pid))

    def _wait_until_ready(self) -> None:
        wait_until_ok(self.process, self.url + self.ready_path, _START_SECONDS,
                      lambda: f"{self.name}: {self.stderr_path.read_text()[-2000:]}")


def _process_cpu(pid: int) -> float:
    try:
        with open(f"/proc/{pid}/stat", encoding="ascii") as stat:
            fields = stat.read().rsplit(")", 1)[1].split()
    except OSError:  # the process ended meanwhile
        return 0.0
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")  # utime + stime, in clock ticks


def _descendants(root: int) -> list[int]:
    parents = {}
    for entry in os.listdir("/proc"):
        if entry.isdigit():
            try:
                with open(f"/proc/{entry}/stat", encoding="ascii") as stat:
                    parents[int(entry)] = int(stat.read().rsplit(")", 1)[1].split()[1])
            except OSError:
                continue
    found, frontier = [root], [root]
    while frontier:
        frontier = [pid for pid, parent in parents.items() if parent in frontier]
        found += frontier
    return found


def _clean_environ(extra: dict[str, str]) -> dict[str, str]:
    environ = {key: value for key, value in os.environ.items()
               if key not in ("PROMETHEUS_MULTIPROC_DIR", "RBFGATE_TOKENS", "RBFGATE_STORE")}
    environ["PYTHONPATH"] = os.pathsep.join(filter(None, [str(_REPO), environ.get("PYTHONPATH")]))
    environ.update(extra)
    return environ


def rbfgate_server(store: Path, workers: int, workdir: Path, extra_environ: dict[str, str] | None = None,
                   *extra_args: str) -> Server:
    """``rbfgate serve`` on ``store``; ready once /readyz says every active model is loaded."""
    port = free_port()
    args = [sys.executable, "-m", "model_store", "serve", "--store", str(store), "--host", "127.0.0.1",
            "--port", str(port), "--workers", str(workers), *extra_args]
    return Server(f"rbfgate-{workers}w", args, port, workdir, "/readyz", _clean_environ(extra_environ or {}))


def reference_server(model_path: Path, features: list[str], workers: int, workdir: Path,
                     extra_environ: dict[str, str] | None = None) -> Server:
    """The reference app under uvicorn, access log off (the reference is given every advantage)."""
    port = free_port()
    args = [sys.executable, "-m", "uvicorn", "tests.benchmarks.reference_app:app", "--host", "127.0.0.1",
            "--port", str(port), "--workers", str(workers), "--no-access-log", "--log-level", "warning"]
    environ = _clean_environ({"REFERENCE_MODEL": str(model_path), "REFERENCE_FEATURES": ",".join(features),
                              **(extra_environ or {})})
    return Server(f"reference-{workers}w", args, port, workdir, "/docs", environ)


def bare_server(bundle_path: Path, workers: int, workdir: Path, extra_environ: dict[str, str] | None = None) -> Server:
    """The bare app (tests/benchmarks/bare_app.py) under uvicorn's defaults (httptools, uvloop), access log off."""
    port = free_port()
    args = [sys.executable, "-m", "uvicorn", "tests.benchmarks.bare_app:app", "--host", "127.0.0.1",
            "--port", str(port), "--workers", str(workers), "--no-access-log", "--log-level", "warning"]
    environ = _clean_environ({"BARE_BUNDLE": str(bundle_path), **(extra_environ or {})})
    return Server(f"bare-{workers}w", args, port, workdir, "/docs", environ)
