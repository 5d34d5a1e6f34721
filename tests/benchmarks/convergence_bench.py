"""How long a switch takes to reach every worker while the workers are saturated with scoring.

A ``rbfgate serve --workers 2 --poll-interval 1`` is kept busy by wrk (8 connections posting one
record each, in C, so the load generator itself takes little CPU), and versions are switched with
``POST /models/{model}/activate``. The worker that receives the call switches before it answers;
the other one must notice the pointer on its own poll. Each worker logs a ``switch`` event with
its time (microseconds, UTC) when it swaps the new version in; the convergence of one switch is
the time from just before the activate request was sent to the last worker's ``switch`` event
naming that version. The pause between switches is drawn (seeded) from 1 to 2 poll intervals, so
that switches land at every phase of the workers' polls. Models: two RBF SVCs fitted on iris (scikit-learn's copy of R. A. Fisher's
1936 data), so loading a version costs milliseconds and the figure is the poll's own delay.
"""

from __future__ import annotations

import json
import os
import signal
import statistics
import subprocess
import sys
import time
from dataclasses import asdict, dataclass
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

from .load_generator import ensure_wrk
from .servers import rbfgate_server

__all__ = ["ConvergenceFigures", "measure_convergence"]

_REPO = Path(__file__).resolve().parents[2]
_ARRIVAL_LIMIT = 60.0  # seconds to wait for every worker to report a switch (a bound, not a target)
_WORKERS = 2


@dataclass(frozen=True)
class ConvergenceFigures:
    workers: int
    connections: int
    records: int  # per request
    poll_seconds: float
    lags: list[float]  # per switch: activate sent -> the last worker swapped the version in, seconds
    after_commit: list[float]  # per switch: pointer written (active.json's mtime) -> the last worker swapped it in
    load_seconds: list[float]  # per switch: how long the polling worker took to load and verify the version
    scored_during: int  # score requests wrk completed while the switches ran
    non_2xx: int

    @property
    def max_lag(self) -> float:
        return max(self.lags)

    @property
    def ratio(self) -> float:
        """The slowest switch in poll intervals: 1.0 means one interval."""
        return self.max_lag / self.poll_seconds

    def to_dict(self) -> dict:
        return {**asdict(self), "max_lag": self.max_lag, "median_lag": statistics.median(self.lags),
                "max_after_commit": max(self.after_commit), "ratio_to_poll": self.ratio}


def measure_convergence(workdir: Path, *, switches: int = 8, connections: int = 8, poll_seconds: float = 1.0,
                        records: int = 1, clients: str = "wrk", support_vectors: int = 0,
                        log=print) -> ConvergenceFigures:
    """``support_vectors`` > 0: two generated bundles of that many support vectors x 50 features
    (tests/benchmarks/large_bundle.py) instead of the iris models, so that each switch loads a large bundle."""
    import httpx

    from service.tokens import add_token

    store_root, rows = _large_store(workdir, support_vectors) if support_vectors else _store(workdir)
    pause = np.random.default_rng(12).uniform(1.0, 2.0, switches) * poll_seconds  # seeded: every phase of the poll
    tokens = workdir / "convergence-tokens.json"
    operate, _ = add_token(tokens, "bench-operator", "operate")
    score, _ = add_token(tokens, "bench-load", "score")
    body_path = workdir / "convergence-body.json"
    body_path.write_text(json.dumps({"records": [rows[index % len(rows)] for index in range(records)]}))
    wrk = ensure_wrk(log)
    lags, after_commit, loads = [], [], []
    pointer = store_root / "models" / "iris" / "active.json"
    with rbfgate_server(store_root, _WORKERS, workdir, None, "--poll-interval", f"{poll_seconds:g}",
                        "--tokens", str(tokens)) as server, httpx.Client(base_url=server.url, timeout=60.0) as client:
        if clients == "wrk":
            command = [wrk, "-t", "1", "-c", str(connections), "-d", f"{int(switches * 8 + 30)}s", "--timeout", "10s",
                       "-s", str(Path(__file__).with_name("post.lua")), f"{server.url}/score/iris"]
        else:  # Python clients, one process each, as a team's callers might be: they compete for the cores too
            command = [sys.executable, "-m", "tests.benchmarks.python_clients", f"{server.url}/score/iris",
                       str(body_path), str(connections), str(int(switches * 8 + 30))]
        load = subprocess.Popen(command, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, cwd=_REPO,
                                env={**os.environ, "BENCH_BODY": str(body_path), "BENCH_TOKEN": score,
                                     "PYTHONPATH": str(_REPO)})
        try:
            time.sleep(3.0)  # let the load reach both workers
            for index in range(switches):
                target = "2.0.0" if index % 2 == 0 else "1.0.0"
                before = len(_switch_events(server.stdout_path, target))
                sent = time.time()
                response = client.post("/models/iris/activate", json={"version": target, "reason": "convergence"},
                                       headers={"Authorization": f"Bearer {operate}"})
                if response.status_code != 200:
                    raise RuntimeError(f"activate {target}: {response.status_code} {response.text[:300]}")
                arrived = _wait_for_every_worker(server.stdout_path, target, before)
                lags.append(max(event[0] for event in arrived) - sent)
                after_commit.append(max(event[0] for event in arrived) - pointer.stat().st_mtime_ns / 1e9)
                loads.append(max(event[1] for event in arrived))
                log(f"    switch to {target}: every worker had it {lags[-1]:.3f} s after the activate was sent")
                time.sleep(pause[index])
        finally:
            load.send_signal(signal.SIGINT)  # wrk prints its summary and stops
            output, _ = load.communicate(timeout=60)
    fields = dict(item.split("=") for item in output.split("RESULT ", 1)[1].split()) if "RESULT " in output else {}
    return ConvergenceFigures(_WORKERS, connections, records, poll_seconds, lags, after_commit, loads, int(fields.get("requests", 0)),
                              int(fields.get("non2xx", 0)))


def _store(workdir: Path) -> tuple[Path, list[dict[str, float]]]:
    """A store with iris 1.0.0 (active) and 2.0.0; returns its root and the iris rows as records."""
    from sklearn.datasets import load_iris
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import StandardScaler
    from sklearn.svm import SVC

    from model_store.estimator_parts import take_apart
    from model_store.exporter import ExportRequest, export_bundle
    from model_store.store import Store

    X, y = load_iris(return_X_y=True)
    features = ["sepal_length_cm", "sepal_width_cm", "petal_length_cm", "petal_width_cm"]
    store = Store(workdir / "convergence-store", create=True)
    for version, C in (("1.0.0", 1.0), ("2.0.0", 4.0)):
        request = ExportRequest(
            parts=take_apart(make_pipeline(StandardScaler(), SVC(C=C)).fit(X, y)), features=features, reference=X,
            reference_labels=list(y), reference_file="iris.csv", reference_sha256="0" * 64, name="iris",
            version=version, out=workdir / f"convergence-iris-{version}", margin=0.05,
        )
        store.publish(export_bundle(request).source, actor="benchmark")
    store.activate("iris", "1.0.0", reason="benchmark", actor="benchmark")
    return store.root, [dict(zip(features, row)) for row in np.asarray(X, dtype=float).tolist()]


def _large_store(workdir: Path, n_support: int) -> tuple[Path, list[dict[str, float]]]:
    """A store with two generated 50-feature bundles, "iris" 1.0.0 (active) and 2.0.0, and their golden rows."""
    import json as _json

    from model_store.store import Store

    from .large_bundle import write_large_bundle

    store = Store(workdir / "convergence-store", create=True)
    for version in ("1.0.0", "2.0.0"):
        path = write_large_bundle(workdir / f"convergence-large-{version}", n_support=n_support, version=version)
        manifest = _json.loads((path / "manifest.json").read_text())
        manifest["name"] = "iris"  # one model name for both kinds of run
        (path / "manifest.json").write_text(_json.dumps(manifest))
        store.publish(path, actor="benchmark")
    store.activate("iris", "1.0.0", reason="benchmark", actor="benchmark")
    names = [feature["name"] for feature in manifest["features"]]
    return store.root, [dict(zip(names, row)) for row in manifest["golden"]["inputs"]]


def _switch_events(stdout_path: Path, version: str) -> list[tuple[float, float]]:
    """(wall-clock time, load seconds) of each worker's switch event to ``version``, in log order."""
    events = []
    for line in stdout_path.read_text().splitlines():
        if not line.startswith("{") or '"switch"' not in line:  # JSON log lines only; others are uvicorn's
            continue
        event = json.loads(line)
        if event.get("event") == "switch" and event.get("version") == version:
            moment = datetime.strptime(event["time"], "%Y-%m-%dT%H:%M:%S.%fZ").replace(tzinfo=timezone.utc)
            events.append((moment.timestamp(), float(event.get("load_seconds", 0.0))))
    return events


def _wait_for_every_worker(stdout_path: Path, version: str, before: int) -> list[tuple[float, float]]:
    deadline = time.monotonic() + _ARRIVAL_LIMIT
    while time.monotonic() < deadline:
        events = _switch_events(stdout_path, version)[before:]
        if len(events) >= _WORKERS:
            return events[:_WORKERS]
        time.sleep(0.02)
    raise RuntimeError(f"not every worker switched to {version} within {_ARRIVAL_LIMIT} s")
