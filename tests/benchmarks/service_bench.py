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

For a batch of more than one record rbfgate is measured twice in the same alternation, with the
same rows in the record form (``{"records": [{feature: value}, ...]}``) and in the column form
(``{"columns": {feature: [value, ...]}}``): A A' B C A A' B C. The reference and the bare endpoint
take the record form only; they are the comparison points. The column form's answer (columnar
too) is checked like the record form's against the reference, and its values must equal, ==,
those of rbfgate's own record-form answer for the same rows.
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
from .report import FORMS
from .servers import bare_server, rbfgate_server, reference_server

__all__ = ["ServiceResult", "bench_service", "check_agreement", "publish_model", "rows_of_columns"]


@dataclass(frozen=True)
class ServiceResult:
    server: str  # "rbfgate", "reference" or "bare"
    workers: int
    records: int
    connections: int
    rounds: list[LoadResult]
    cpu_seconds: list[float]  # CPU time the server's processes used during each round
    form: str = "records"  # the body's form, one of report.FORMS; "columns" for rbfgate only

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
            "server": self.server, "form": self.form, "workers": self.workers, "records": self.records,
            "connections": self.connections,
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
            urls = {"rbfgate": f"{ours.url}/score/{name}", "reference": f"{theirs.url}/score",
                    "bare": f"{bare.url}/score"}
            servers = {"rbfgate": ours, "reference": theirs, "bare": bare}
            for records, forms in bodies.items():
                _check_answers(urls, forms, records)
                # (server, form) in the order of each round: rbfgate's record then column form, reference, bare
                cases = [("rbfgate", form) for form in FORMS if form in forms]
                cases += [("reference", "records"), ("bare", "records")]
                for server, form in cases:  # warm every case (and every worker) before timing
                    run_wrk(wrk, urls[server], forms[form], connections=connections, seconds=min(2.0, seconds))
                measured = {case: [] for case in cases}
                cpu = {case: [] for case in cases}
                for _ in range(rounds):
                    for server, form in cases:
                        before = servers[server].cpu_seconds()
                        measured[server, form].append(run_wrk(wrk, urls[server], forms[form], connections=connections,
                                                              seconds=seconds))
                        cpu[server, form].append(servers[server].cpu_seconds() - before)
                for (server, form), runs in measured.items():
                    result = ServiceResult(server, workers, records, connections, runs, cpu[server, form], form)
                    results.append(result)
                    log(f"    {server:>9} ({form:>7}), {records:>4} record(s)/request: "
                        f"{result.requests_per_second:8.0f} req/s, p50 {result.p50_ms:.2f} ms, "
                        f"p99 {result.p99_ms:.2f} ms, non-2xx {result.non_2xx}, "
                        f"server CPU {result.cpu_ms_per_request:.3f} ms/request")
    return results


def _write_bodies(workdir: Path, bundle, reference: np.ndarray, batch_sizes: list[int]) -> dict[int, dict[str, Path]]:
    """Request bodies per batch size, by form: ``{size: {"records": path, "columns": path}}``, the
    column form only for sizes above 1 (the single-record case is the record form alone). Both forms
    hold the same rows, from the model's own training rows that it answers for: inside the allowed
    ranges and not outside the domain (of 1,000 standard-normal rows in 10 features, the domain
    model puts 2 outside), so that every record is scored and compared with the reference; rows
    repeat from the first when a body wants more than there are."""
    scores = bundle.score(reference)
    answered = scores.in_range if scores.domain_verdict is None else scores.in_range & (scores.domain_verdict != "outside")
    rows = reference[answered]
    bodies = {}
    for size in batch_sizes:
        chosen = rows[np.arange(size) % len(rows)]
        records = [dict(zip(bundle.feature_names, row)) for row in chosen.tolist()]
        path = workdir / f"body-{size}.json"
        path.write_text(json.dumps({"records": records}))
        bodies[size] = {"records": path}
        if size > 1:
            columns = {name: chosen[:, index].tolist() for index, name in enumerate(bundle.feature_names)}
            path = workdir / f"body-{size}-columns.json"
            path.write_text(json.dumps({"columns": columns}))
            bodies[size]["columns"] = path
    return bodies


def _post(server: str, url: str, body_path: Path) -> dict:
    request = urllib.request.Request(url, data=body_path.read_bytes(), headers={"Content-Type": "application/json"})
    with urllib.request.urlopen(request, timeout=60) as response:  # raises HTTPError for 4xx and 5xx
        if response.status != 200:
            raise RuntimeError(f"{server} answered {response.status} to {body_path.name}")
        return json.loads(response.read())


def _check_answers(urls: dict[str, str], bodies: dict[str, Path], records: int) -> None:
    """Every server answers each of its bodies with 200 and the reference's labels and decisions;
    rbfgate's column-form answer holds the values of its record-form answer (``check_agreement``)."""
    answers = {server: _post(server, url, bodies["records"]) for server, url in urls.items()}
    columns = _post("rbfgate (column form)", urls["rbfgate"], bodies["columns"]) if "columns" in bodies else None
    check_agreement(answers, columns, records)


def check_agreement(answers: dict[str, dict], column_answer: dict | None, records: int) -> None:
    """RuntimeError unless the servers' answers to one batch of ``records`` rows agree.

    answers:        server -> its parsed answer to the record-form body (``{"results": [...], ...}``),
                    "reference" among them
    column_answer:  rbfgate's parsed answer to the column-form body of the same rows, or None

    Each record-form answer has one result per record, with the reference's label and its
    decision within GOLDEN_TOLERANCE x max(1, |reference|), rbfgate's with status "scored". The
    column-form answer has every column of ``records`` entries, no refused row, the same labels
    and decisions as the reference, and row for row exactly (==) the results of rbfgate's
    record-form answer, with the same members (model, version, bundle_sha256) beside them.
    """
    results = {}
    for server, answer in answers.items():
        results[server] = answer["results"]
        if len(results[server]) != records:
            raise RuntimeError(f"{server} returned {len(results[server])} results for {records} records")
    if column_answer is not None:
        server = "rbfgate (column form)"
        _check_lengths(column_answer["columns"], records, "/columns")
        if column_answer.get("refused") != []:
            raise RuntimeError(f"{server} refused rows: {str(column_answer.get('refused'))[:500]}")
        ours = answers["rbfgate"]
        mine = {key: value for key, value in column_answer.items() if key not in ("columns", "refused")}
        theirs = {key: value for key, value in ours.items() if key != "results"}
        if mine != theirs:
            raise RuntimeError(f"{server} answered the members {mine}, the record form {theirs}")
        results[server] = rows_of_columns(column_answer["columns"], records)
        for index, (row, record) in enumerate(zip(results[server], ours["results"])):
            if row != record:
                raise RuntimeError(f"row {index}: {server} {row} differs from the record form's {record}")
    reference_results = results["reference"]
    for server, rows in results.items():
        for index, (mine, reference) in enumerate(zip(rows, reference_results)):
            if (server.startswith("rbfgate") and mine.get("status") != "scored") or str(mine["label"]) != str(reference["label"]):
                raise RuntimeError(f"record {index}: {server} {mine} disagrees with the reference {reference}")
            if abs(mine["decision"] - reference["decision"]) > GOLDEN_TOLERANCE * max(1.0, abs(reference["decision"])):
                raise RuntimeError(f"record {index}: {server} decision {mine['decision']} vs {reference['decision']}")


def _check_lengths(columns, records: int, pointer: str) -> None:
    """Every array under ``columns`` (an object of arrays, objects of arrays or nulls) has ``records`` entries."""
    if not isinstance(columns, dict) or not columns:
        raise RuntimeError(f"{pointer} is {str(columns)[:200]}, not an object of columns")
    for name, column in columns.items():
        if isinstance(column, list):
            if len(column) != records:
                raise RuntimeError(f"{pointer}/{name} has {len(column)} entries for {records} rows")
        elif isinstance(column, dict):
            _check_lengths(column, records, f"{pointer}/{name}")
        elif column is not None:
            raise RuntimeError(f"{pointer}/{name} is {str(column)[:200]}, not a column")


def rows_of_columns(columns: dict, records: int) -> list[dict]:
    """The column-form answer's columns as one record-form result per row: row i of
    ``{"label": [...], "nearest_support": {"distance": [...], ...}, "probability": None}``
    is ``{"label": label[i], "nearest_support": {"distance": distance[i], ...}, "probability": None}``."""
    def row(node, index):
        if isinstance(node, list):
            return node[index]
        if isinstance(node, dict):
            return {name: row(child, index) for name, child in node.items()}
        return node  # a null column: null in every row
    return [row(columns, index) for index in range(records)]
