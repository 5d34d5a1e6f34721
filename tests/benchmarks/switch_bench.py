"""Load and switch figures for a bundle of 100,000 support vectors x 50 features.

- load: ``load_bundle`` (read, SHA-256 of every file, parse, build the scorer) and ``self_test``
  (the 40 golden vectors), each timed in a fresh interpreter, as a worker meets a new version;
  the median over several fresh interpreters is kept.
- memory: the resident set size (VmRSS, /proc/self/status) of that interpreter before and after
  loading; the delta is what one more loaded version costs a worker.
- switch: a running ``rbfgate serve`` answers single-record requests in a loop while
  ``rbfgate activate`` (the CLI, a separate process) moves the store's pointer; the time from the
  CLI's exit (the activation is committed) to the first answer naming the new version.
"""

from __future__ import annotations

import json
import os
import statistics
import subprocess
import sys
import threading
import time
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np

from model_store.bundle import load_bundle

from .large_bundle import write_large_bundle
from .servers import rbfgate_server
from .service_bench import publish_model

__all__ = ["LoadFigures", "SwitchFigures", "measure_load", "measure_switch", "prepare_large_bundles"]

_REPO = Path(__file__).resolve().parents[2]
_POLL_PAUSE = 0.005
_SWITCH_TIMEOUT = 30.0

_LOAD_SCRIPT = r"""
import json, sys, time
import numpy
import model_store.bundle
from model_store.bundle import load_bundle

def rss():
    with open("/proc/self/status") as status:
        for line in status:
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) * 1024

before = rss()
started = time.perf_counter()
bundle = load_bundle(sys.argv[1])
loaded = time.perf_counter()
bundle.self_test()
tested = time.perf_counter()
print(json.dumps({"load": loaded - started, "self_test": tested - loaded, "rss_before": before, "rss_after": rss()}))
"""


@dataclass(frozen=True)
class LoadFigures:
    blas_threads: str  # "1" as in a service worker, or "default"
    n_support: int
    features: int
    bundle_bytes: int
    load_seconds: float
    self_test_seconds: float
    rss_delta_bytes: int
    runs: int

    @property
    def total_seconds(self) -> float:
        return self.load_seconds + self.self_test_seconds

    def to_dict(self) -> dict:
        return {**asdict(self), "total_seconds": self.total_seconds}


@dataclass(frozen=True)
class SwitchFigures:
    bundle: str
    poll_seconds: float
    cli_seconds: list[float]  # how long `rbfgate activate` ran (it re-verifies the bundle)
    visible_after_commit: list[float]  # pointer written (active.json's mtime) -> first answer from the new version
    visible_after_cli: list[float]  # CLI exit -> first answer (negative: the server switched before the CLI exited)

    def to_dict(self) -> dict:
        return {**asdict(self), "median_visible": statistics.median(self.visible_after_commit),
                "max_visible": max(self.visible_after_commit)}


def prepare_large_bundles(cache: Path, n_support: int, features: int, log=print) -> tuple[Path, Path]:
    """Two versions (same arrays, so two digests only by their version) of the large bundle, cached."""
    paths = []
    for version in ("1.0.0", "2.0.0"):
        path = cache / f"large-{n_support}x{features}-{version}"
        if not path.exists():
            log(f"  writing the {n_support} x {features} bundle, version {version}")
            write_large_bundle(path, n_support=n_support, features=features, version=version)
        paths.append(path)
    return paths[0], paths[1]


def measure_load(bundle_path: Path, runs: int, threads: int | None) -> LoadFigures:
    """Load and self-test in ``runs`` fresh interpreters; ``threads=1`` as a service worker runs."""
    environ = {key: value for key, value in os.environ.items() if key != "OPENBLAS_NUM_THREADS"}
    environ["PYTHONPATH"] = str(_REPO)
    if threads is not None:
        environ["OPENBLAS_NUM_THREADS"] = str(threads)
    samples = []
    for _ in range(runs):
        completed = subprocess.run([sys.executable, "-c", _LOAD_SCRIPT, str(bundle_path)], capture_output=True,
                                   text=True, timeout=300, cwd=_REPO, env=environ)
        if completed.returncode != 0:
            raise RuntimeError(f"loading {bundle_path} failed: {completed.stderr[-2000:]}")
        samples.append(json.loads(completed.stdout.strip().splitlines()[-1]))
    bundle = load_bundle(bundle_path)
    return LoadFigures(
        blas_threads="default" if threads is None else str(threads),
        n_support=len(bundle.support_vectors),
        features=len(bundle.feature_names),
        bundle_bytes=sum(file.stat().st_size for file in bundle_path.iterdir()),
        load_seconds=statistics.median(sample["load"] for sample in samples),
        self_test_seconds=statistics.median(sample["self_test"] for sample in samples),
        rss_delta_bytes=int(statistics.median(sample["rss_after"] - sample["rss_before"] for sample in samples)),
        runs=runs,
    )


def measure_switch(label: str, versions: tuple[Path, Path], workdir: Path, *, switches: int,
                   poll_seconds: float = 1.0, log=print) -> SwitchFigures:
    """Activate the two versions alternately ``switches`` times against a running 1-worker server."""
    import httpx

    store_root = workdir / f"switch-store-{label}"
    name, first = publish_model(store_root, versions[0])
    second = load_bundle(versions[1]).version
    publish_model(store_root, versions[1])  # publishes and activates the second ...
    _activate(store_root, name, first)  # ... and back, so the server starts on the first
    bundle = load_bundle(versions[0])
    record = dict(zip(bundle.feature_names, np.asarray(bundle.manifest.golden.inputs[0]).tolist()))
    cli_seconds, after_commit, after_cli = [], [], []
    pointer = store_root / "models" / name / "active.json"
    with rbfgate_server(store_root, 1, workdir, None, "--poll-interval", f"{poll_seconds:g}") as server, \
            httpx.Client(base_url=server.url, timeout=30.0) as client:
        for index in range(switches):
            target = second if index % 2 == 0 else first
            seen = _Watcher(client, f"/score/{name}", record, target)
            seen.start()
            started = time.time()
            _activate(store_root, name, target)
            returned = time.time()
            arrived = seen.wait()
            committed = pointer.stat().st_mtime_ns / 1e9
            cli_seconds.append(returned - started)
            after_commit.append(arrived - committed)
            after_cli.append(arrived - returned)
            log(f"    {label}: activate {target}: CLI ran {returned - started:.2f} s; first answer from it "
                f"{arrived - committed:.3f} s after the pointer was written, {arrived - returned:.3f} s after the CLI exited")
    return SwitchFigures(label, poll_seconds, cli_seconds, after_commit, after_cli)


def _activate(store_root: Path, name: str, version: str) -> None:
    completed = subprocess.run(
        [sys.executable, "-m", "model_store", "activate", name, version, "--reason", "benchmark switch",
         "--store", str(store_root), "--actor", "benchmark", "--accept-breaking"],  # timing, not contracts
        capture_output=True, text=True, timeout=300, cwd=_REPO, env={**os.environ, "PYTHONPATH": str(_REPO)},
    )
    if completed.returncode != 0:
        raise RuntimeError(f"rbfgate activate {name} {version} failed: {completed.stderr[-2000:]}")


class _Watcher(threading.Thread):
    """Scores one record in a loop until an answer names ``version``; bounded by _SWITCH_TIMEOUT (monotonic)."""

    def __init__(self, client, path: str, record: dict, version: str) -> None:
        super().__init__(daemon=True)
        self.client, self.path, self.body, self.version = client, path, {"records": [record]}, version
        self.arrived: float | None = None
        self.failure: str | None = None

    def run(self) -> None:
        deadline = time.monotonic() + _SWITCH_TIMEOUT
        while time.monotonic() < deadline:
            response = self.client.post(self.path, json=self.body)
            received = time.time()  # wall clock, to compare with the pointer file's mtime
            if response.status_code != 200:
                self.failure = f"{response.status_code}: {response.text[:300]}"
                return
            if response.headers.get("Rbfgate-Version") == self.version:
                self.arrived = received
                return
            time.sleep(_POLL_PAUSE)
        self.failure = f"no answer from {self.version} within {_SWITCH_TIMEOUT} s"

    def wait(self) -> float:
        self.join(_SWITCH_TIMEOUT + 30)
        if self.arrived is None:
            raise RuntimeError(self.failure or "the watcher did not finish")
        return self.arrived
