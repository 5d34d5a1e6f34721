"""POST /score/{model} and POST /score/{model}/versions/{version}.

Order of checks: body size (413, before parsing), model and version (404,
or 503 while the active version cannot be loaded), JSON syntax (400), body
shape (422; 413 for too many records), then the refusal policy per record.
Some records scored -> 200 with per-record statuses; none scored -> 422 with
the same results inside the problem details. Both name the version and digest
in the body and in the ``Rbfgate-Version`` / ``Rbfgate-Bundle-Sha256`` headers.
"""

from __future__ import annotations

import json
from collections import Counter
from typing import Any

import numpy as np
from fastapi import FastAPI, Request
from starlette.concurrency import run_in_threadpool
from starlette.responses import Response

from model_store.errors import NotFoundError
from model_store.naming import check_name
from service.access_log import request_note
from service.body import parse_json, read_body
from service.context import Services, version_headers
from service.problems import ServiceProblem
from service.registry import LoadedModel
from service.scoring import ScoredBatch, read_records, score_records

__all__ = ["active_model", "add_score_routes"]

_EMPTY = np.empty(0)
# A loaded model and a body this small are scored on the event loop: measured on 2 cores
# (tests/benchmarks), handing a single-record request to the thread pool cost more than
# scoring it (GIL hand-offs between the loop and the pool thread: p50 6 ms instead of 1 ms).
_INLINE_BODY_BYTES = 16 * 1024


def add_score_routes(app: FastAPI, services: Services) -> None:
    """Add these routes to ``app`` (directly, so every route is a plain APIRoute with its path template)."""
    limit = services.settings.max_body_bytes

    @app.post("/score/{model}")
    async def score_with_active_version(model: str, request: Request) -> Response:
        """Score records with the model's active version."""
        body = await read_body(request, limit)
        loaded = services.registry.serving(model)
        if loaded is not None and len(body) <= _INLINE_BODY_BYTES:
            return _score(services, request, body, lambda: loaded)
        return await run_in_threadpool(_score, services, request, body, lambda: _active(services, model))

    @app.post("/score/{model}/versions/{version}")
    async def score_with_pinned_version(model: str, version: str, request: Request) -> Response:
        """Score records with one published version, active or not."""
        body = await read_body(request, limit)
        return await run_in_threadpool(_score, services, request, body, lambda: services.registry.pinned(model, version))


def _score(services: Services, request: Request, body: bytes, resolve) -> Response:
    model = resolve()  # read the table once: this request finishes on this version
    note = request_note(request)
    note.update(model=model.name, version=model.version)
    records = read_records(parse_json(body), services.settings.max_records)
    batch = score_records(model, records, services.registry.outside_action(model.name))
    _account(services, model, batch, note, records)
    headers = version_headers(model)
    head = {"model": model.name, "version": model.version, "bundle_sha256": model.digest}
    if batch.scored == 0:
        raise ServiceProblem(
            422,
            "records-refused",
            "Every record was refused",
            f"all {len(records)} record(s) were refused by {model.name} {model.version}; "
            "each result lists the features to fix (see the schema route for the allowed ranges)",
            extra={**head, "results": batch.results, "problems": _flat_problems(batch)},
            headers=headers,
        )
    content = json.dumps({**head, "results": batch.results}, ensure_ascii=False, allow_nan=False, separators=(",", ":"))
    return Response(content, media_type="application/json", headers=headers)


def active_model(services: Services, name: str) -> LoadedModel:
    """The version this worker serves for ``name`` (404, or 503 while it cannot be loaded)."""
    return _active(services, name)


def _active(services: Services, name: str) -> LoadedModel:
    check_name(name, what="model name")
    registry = services.registry
    loaded = registry.serving(name) or registry.refresh(name)
    if loaded is not None:
        return loaded
    unexplained = registry.unexplained(name)
    if unexplained is not None:
        raise ServiceProblem(
            503, "model-unavailable", "The model's active version cannot be served",
            f"{name}: {unexplained}, and no verified version is loaded in this worker; "
            f"'rbfgate history {name} --verify' names the problem", headers={"Retry-After": "5"},
        )
    failure = registry.failure(name)
    if failure is not None:
        raise ServiceProblem(
            503,
            "model-unavailable",
            "The model's active version cannot be served",
            f"{name} {failure.version} failed its checks in this worker ({failure.detail}) "
            "and no earlier version is loaded; activate a version that passes",
            headers={"Retry-After": "5"},
        )
    try:
        known = bool(services.store.versions(name))
    except NotFoundError:
        known = False
    if known:
        raise NotFoundError(
            f"model {name!r} has no active version; activate one with POST /models/{name}/activate "
            f"or score a published version with POST /score/{name}/versions/VERSION"
        )
    raise NotFoundError(f"no model named {name!r} in the store; GET /models lists the models")


def _account(services: Services, model: LoadedModel, batch: ScoredBatch, note: dict[str, Any], records) -> None:
    """Metrics, the log line's fields and the preview sample for one scored request."""
    feature_names = model.bundle.feature_names
    scores = batch.scores
    services.metrics.observe_scoring(
        model.name,
        model.version,
        scored=batch.scored,
        refused=batch.refused,
        problems=batch.problem_pairs(set(feature_names)),
        distances=scores.nearest_distance if scores is not None else _EMPTY,
        percentiles=scores.nearest_percentile if scores is not None else _EMPTY,
        verdicts=scores.domain_verdict if scores is not None and scores.domain_verdict is not None else _EMPTY,
    )
    services.recent.add(model.name, feature_names, batch.checked.values)
    reasons = Counter(reason for _, reason in batch.problem_pairs(set()))
    note.update(records=len(records), scored=batch.scored, refused=batch.refused, refusals=dict(sorted(reasons.items())))
    if services.settings.log_inputs:
        note["inputs"] = records


def _flat_problems(batch: ScoredBatch) -> list[dict[str, Any]]:
    ids = batch.checked.ids
    flat = []
    for index, problems in sorted(batch.checked.problems.items()):
        head: dict[str, Any] = {"record": index}
        if ids is not None and ids[index] is not None:
            head["id"] = ids[index]  # the caller's id, beside the index, so either finds the record
        flat.extend({**head, **problem.to_dict()} for problem in problems)
    return flat
