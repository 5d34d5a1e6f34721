"""Helpers of the reliability suite: raw HTTP on a socket, the processes of a server, more versions.

Raw sockets are used where an HTTP client would tidy the request up first (httpx removes
``..`` segments from paths and always sends a correct Content-Length). Each socket has a
timeout, so a server that never answers fails the test instead of hanging it.
"""

from __future__ import annotations

import os
import socket
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from conftest import export_model  # tests/conftest.py
from http_api.conftest import IRIS_FEATURES, Published
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler
from sklearn.svm import SVC

__all__ = [
    "RawResponse",
    "extra_iris_versions",
    "process_tree",
    "raw_exchange",
    "raw_request",
    "resident_kib",
    "worker_pids",
]


@dataclass(frozen=True)
class RawResponse:
    status: int
    headers: dict[str, str]  # lower-case names
    body: bytes

    @property
    def media_type(self) -> str:
        return self.headers.get("content-type", "").split(";")[0].strip()


def raw_exchange(port: int, data: bytes, timeout: float = 20.0) -> RawResponse | None:
    """Send ``data`` as it is and read until the server closes; None if it closed without answering."""
    with socket.create_connection(("127.0.0.1", port), timeout=timeout) as sock:
        try:
            sock.sendall(data)
        except (BrokenPipeError, ConnectionResetError):
            pass  # the server may answer and close before it has read everything
        received = b""
        while True:
            try:
                chunk = sock.recv(65536)
            except ConnectionResetError:
                break
            if not chunk:
                break
            received += chunk
    return _parse(received) if received else None


def raw_request(port: int, method: str, target: bytes, *, headers: dict[str, str] | None = None,
                body: bytes = b"", timeout: float = 20.0) -> RawResponse | None:
    """One HTTP/1.1 request with ``target`` sent byte for byte, and ``Connection: close``."""
    lines = [method.encode("ascii") + b" " + target + b" HTTP/1.1", b"Host: 127.0.0.1", b"Connection: close"]
    fields = {"Content-Length": str(len(body))} if body or method == "POST" else {}
    fields.update(headers or {})
    lines += [f"{name}: {value}".encode("latin-1") for name, value in fields.items()]
    return raw_exchange(port, b"\r\n".join(lines) + b"\r\n\r\n" + body, timeout)


def _parse(data: bytes) -> RawResponse:
    head, _, body = data.partition(b"\r\n\r\n")
    status_line, *header_lines = head.decode("latin-1").split("\r\n")
    headers = {}
    for line in header_lines:
        name, _, value = line.partition(":")
        headers[name.strip().lower()] = value.strip()
    return RawResponse(int(status_line.split(" ")[1]), headers, body)


def process_tree(pid: int) -> list[int]:
    """``pid`` and all its descendants (from /proc), parents first."""
    children: dict[int, list[int]] = {}
    for entry in os.listdir("/proc"):
        if not entry.isdigit():
            continue
        try:
            stat = Path(f"/proc/{entry}/stat").read_text()
        except OSError:
            continue
        parent = int(stat.rsplit(")", 1)[1].split()[1])  # field 4, after the command in parentheses
        children.setdefault(parent, []).append(int(entry))
    tree, queue = [], [pid]
    while queue:
        current = queue.pop(0)
        tree.append(current)
        queue.extend(sorted(children.get(current, [])))
    return tree


def worker_pids(server_pid: int) -> list[int]:
    """uvicorn's worker processes under ``rbfgate serve`` (started by multiprocessing's spawn)."""
    workers = []
    for pid in process_tree(server_pid)[1:]:
        try:
            command = Path(f"/proc/{pid}/cmdline").read_bytes()
        except OSError:
            continue
        if b"spawn_main" in command:
            workers.append(pid)
    return sorted(workers)


def resident_kib(pids: list[int]) -> int:
    """Sum of the resident set sizes (VmRSS, proc(5)) of ``pids``, in KiB."""
    total = 0
    for pid in pids:
        try:
            for line in Path(f"/proc/{pid}/status").read_text().splitlines():
                if line.startswith("VmRSS:"):
                    total += int(line.split()[1])
        except OSError:
            continue
    return total


def extra_iris_versions(directory: Path, versions: list[str]) -> list[Published]:
    """More iris versions (StandardScaler + SVC(C=2, gamma=0.5)), one bundle per name; iris is
    R. A. Fisher's 1936 data set as shipped with scikit-learn."""
    from sklearn.datasets import load_iris

    X, y = load_iris(return_X_y=True)
    labels = np.array(["setosa", "versicolor", "virginica"])[y]
    model = make_pipeline(StandardScaler(), SVC(C=2.0, gamma=0.5)).fit(X, labels)
    return [
        Published(export_model(model, X, Path(directory) / version, y=labels, name="iris", version=version,
                               features=IRIS_FEATURES), model, X)
        for version in versions
    ]
