"""wrk, the HTTP load generator (Debian package ``wrk``), driven with post.lua.

``ensure_wrk`` installs it with apt-get when it is missing (as root on the project's
machines, through ``sudo -n`` otherwise); ``run_wrk`` runs one bounded load and
parses the RESULT line post.lua prints.
"""

from __future__ import annotations

import os
import re
import shutil
import subprocess
from dataclasses import asdict, dataclass
from pathlib import Path

__all__ = ["LoadResult", "ensure_wrk", "run_wrk"]

_SCRIPT = Path(__file__).with_name("post.lua")
_RESULT = re.compile(r"^RESULT (.*)$", re.MULTILINE)


@dataclass(frozen=True)
class LoadResult:
    requests: int
    seconds: float
    p50_ms: float
    p90_ms: float
    p99_ms: float
    max_ms: float
    non_2xx: int
    socket_errors: int

    @property
    def requests_per_second(self) -> float:
        return self.requests / self.seconds

    def to_dict(self) -> dict:
        return {**asdict(self), "requests_per_second": self.requests_per_second}


def ensure_wrk(log=print) -> str:
    """Path of wrk, installing Debian's package first if it is not there."""
    found = shutil.which("wrk")
    if found:
        return found
    log("  wrk not found; installing it with apt-get (Debian package wrk)")
    as_root = [] if os.geteuid() == 0 else ["sudo", "-n"]
    for command in ([*as_root, "apt-get", "update", "-qq"], [*as_root, "apt-get", "install", "-y", "-qq", "wrk"]):
        completed = subprocess.run(command, capture_output=True, text=True, timeout=600,
                                   env={**os.environ, "DEBIAN_FRONTEND": "noninteractive"})
        if completed.returncode != 0:
            raise RuntimeError(f"{' '.join(command)} failed ({completed.returncode}): {completed.stderr[-1000:]}; "
                               "install wrk by hand (apt-get install wrk) and run again")
    found = shutil.which("wrk")
    if not found:
        raise RuntimeError("apt-get installed wrk but it is not on PATH")
    return found


def run_wrk(wrk: str, url: str, body_path: Path, *, connections: int, seconds: float, threads: int = 1) -> LoadResult:
    """One wrk run of ``seconds`` (bounded: wrk stops itself; the timeout is a backstop)."""
    command = [wrk, "-t", str(threads), "-c", str(connections), "-d", f"{seconds:g}s", "--timeout", "10s",
               "--latency", "-s", str(_SCRIPT), url]
    completed = subprocess.run(command, capture_output=True, text=True, timeout=seconds + 60,
                               env={**os.environ, "BENCH_BODY": str(body_path)})
    match = _RESULT.search(completed.stdout)
    if completed.returncode != 0 or match is None:
        raise RuntimeError(f"wrk failed ({completed.returncode}): {completed.stdout[-1500:]} {completed.stderr[-1500:]}")
    fields = {key: int(value) for key, value in (item.split("=") for item in match.group(1).split())}
    return LoadResult(
        requests=fields["requests"],
        seconds=fields["duration_us"] / 1e6,
        p50_ms=fields["p50_us"] / 1e3,
        p90_ms=fields["p90_us"] / 1e3,
        p99_ms=fields["p99_us"] / 1e3,
        max_ms=fields["max_us"] / 1e3,
        non_2xx=fields["non2xx"],
        socket_errors=fields["connect"] + fields["read"] + fields["write"] + fields["timeout"],
    )
