"""Service benchmark: ``rbfgate serve`` against two other servers, same model, same load.

- reference: the FastAPI + joblib + pydantic endpoint a team would write (reference_app.py);
- bare: FastAPI that only scores the same bundle with numpy, no validation, no diagnostics, no
  log, no metrics (bare_app.py): the framework's ceiling, of which rbfgate reaches a share.

For each worker count (1, then 2) the three servers are started side by side on the same
machine, each is checked once per request body (200, one result per record, the same labels
and decisions as the reference), and then wrk runs A B C A B C (rbfgate, reference, bare, ...)
for each batch size. Requests/s is the total over all rounds; p50/p99 are the medians of the
rounds' values; server CPU is read from /proc for the server's processes around each round.
Every record sent lies inside the bundle's allowed ranges, so rbfgate scores all of them (a
refusal would be a non-2xx or a different answer).
"""

from __future__ import annotations

import json
import statistics
import urllib.request
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from model_store.bundle import GOLDEN_TOLERANCE, load_bundle
from model_store.store import Store

from .load_generator import LoadResult, ensure_wrk, run_wrk
from .models import CachedModel
from .servers import bare_server, rbfgate_server, reference_server

__all__ = ["ServiceResult", "bench_service", "publish_model"]


@dataclass(frozen=True)
class ServiceResult:
    server: str  # "rbfgate", "reference" or "bare"
    workers: int
    records: int
    connections: int
    rounds: list[LoadResult]
    cpu_seconds: list[float]  # CPU time the server's processes used during each round

    @property
    def cpu_ms_per_request(self) -> float:
        """Server CPU per request: robust to other load on the machine, unlike requests/s."""
        return 1e3 * sum(self.cpu_seconds) / sum(run.requests for run in self.rounds)

    @property
    def requests_per_second(self) -> float:
        return sum(run.requests for run in self.rounds) / sum(run.seconds for run in self.rounds)

    @property
    def p50_ms(self) -> float:
        return statistics.median(run.p50_ms for run in self.rounds)

    @property
    def p99_ms(self) -> float:
        return statistics.median(run.p99_ms for run in self.rounds)

    @property
    def worst_p99_ms(self) -> float:
        return max(run.p99_ms for run in self.rounds)

    @property
    def non_2xx(self) -> int:
        return sum(run.non_2xx + run.socket_errors for run in self.rounds)

    def to_dict(self) -> dict:
        return {
            "server": self.server, "workers": self.workers, "records": self.records, "connections": self.connections,
            "requests_per_second": self.requests_per_second, "p50_ms": self.p50_ms, "p99_ms": self.p99_ms,
            "worst_p99_ms": self.worst_p99_ms, "non_2xx": self.non_2xx, "cpu_ms_per_request": self.cpu_ms_per_request,
            "records_per_second": self.requests_per_second * self.records,
            "cpu_seconds": list(self.cpu_seconds), "rounds": [run.to_dict() for run in self.rounds],
        }


def publish_model(store_root: Path, bundle_path: Path) -> tuple[str, str]:
    """Publish and activate ``bundle_path`` in the store at ``store_root`` (created when missing)."""
    bundle = load_bundle(bundle_path)
    store = Store(store_root, create=True)
    store.publish(bundle_path, actor="benchmark")
    store.activate(bundle.name, bundle.version, reason="benchmark", actor="benchmark", accept_breaking=True)
    return bundle.name, bundle.version


def bench_service(model: CachedModel, workdir: Path, *, workers_list: list[int], batch_sizes: list[int],
                  connections: int, seconds: float, rounds: int, log=print) -> list[ServiceResult]:
    wrk = ensure_wrk(log)
    store_root = workdir / "service-store"
    name, _ = publish_model(store_root, model.bundle_path)
    bundle = load_bundle(model.bundle_path)
    bodies = _write_bodies(workdir, bundle, model.reference, batch_sizes)
    results = []
    for workers in workers_list:
        log(f"  {workers} worker(s): starting rbfgate serve, the reference endpoint and the bare one")
        with rbfgate_server(store_root, workers, workdir) as ours, \
                reference_server(model.joblib_path, bundle.feature_names, workers, workdir) as theirs, \
                bare_server(model.bundle_path, workers, workdir) as bare:
            targets = {"rbfgate": f"{ours.url}/score/{name}", "reference": f"{theirs.url}/score",
                       "bare": f"{bare.url}/score"}
            servers = {"rbfgate": ours, "reference": theirs, "bare": bare}
            for records, body_path in bodies.items():
                _check_answers(targets, body_path, records)
                for target in targets.values():  # warm both (and every worker) before timing
                    run_wrk(wrk, target, body_path, connections=connections, seconds=min(2.0, seconds))
                measured = {server: [] for server in targets}
                cpu = {server: [] for server in targets}
                for _ in range(rounds):
                    for server, url in targets.items():
                        before = servers[server].cpu_seconds()
                        measured[server].append(run_wrk(wrk, url, body_path, connections=connections, seconds=seconds))
                        cpu[server].append(servers[server].cpu_seconds() - before)
                for server, runs in measured.items():
                    result = ServiceResult(server, workers, records, connections, runs, cpu[server])
                    results.append(result)
                    log(f"    {server:>9}, {records:>4} record(s)/request: {result.requests_per_second:8.0f} req/s, "
                        f"p50 {result.p50_ms:.2f} ms, p99 {result.p99_ms:.2f} ms, non-2xx {result.non_2xx}, "
                        f"server CPU {result.cpu_ms_per_request:.3f} ms/request")
    return results


def _write_bodies(workdir: Path, bundle, reference: np.ndarray, batch_sizes: list[int]) -> dict[int, Path]:
    """One body per batch size, from the model's own training rows that it answers for: inside the
    allowed ranges and not outside the domain (of 1,000 standard-normal rows in 10 features, the
    domain model puts 2 outside), so that every record is scored and compared with the reference;
    rows repeat from the first when a body wants more than there are."""
    scores = bundle.score(reference)
    answered = scores.in_range if scores.domain_verdict is None else scores.in_range & (scores.domain_verdict != "outside")
    rows = reference[answered]
    bodies = {}
    for size in batch_sizes:
        records = [dict(zip(bundle.feature_names, row)) for row in rows[np.arange(size) % len(rows)].tolist()]
        path = workdir / f"body-{size}.json"
        path.write_text(json.dumps({"records": records}))
        bodies[size] = path
    return bodies


def _check_answers(targets: dict[str, str], body_path: Path, records: int) -> None:
    """Every server answers 200 with one result per record, and the labels and decisions of the reference."""
    answers = {}
    for server, url in targets.items():
        request = urllib.request.Request(url, data=body_path.read_bytes(), headers={"Content-Type": "application/json"})
        with urllib.request.urlopen(request, timeout=60) as response:
            if response.status != 200:
                raise RuntimeError(f"{server} answered {response.status} to {body_path.name}")
            results = json.loads(response.read())["results"]
        if len(results) != records:
            raise RuntimeError(f"{server} returned {len(results)} results for {records} records")
        answers[server] = results
    for server, results in answers.items():
        for index, (mine, reference) in enumerate(zip(results, answers["reference"])):
            if (server == "rbfgate" and mine.get("status") != "scored") or str(mine["label"]) != str(reference["label"]):
                raise RuntimeError(f"record {index}: {server} {mine} disagrees with the reference {reference}")
            if abs(mine["decision"] - reference["decision"]) > GOLDEN_TOLERANCE * max(1.0, abs(reference["decision"])):
                raise RuntimeError(f"record {index}: {server} decision {mine['decision']} vs {reference['decision']}")
