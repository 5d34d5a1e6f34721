"""POST /score/{model} and POST /score/{model}/versions/{version}.

Order of checks: body size (413, before parsing), model and version (404,
or 503 while the active version cannot be loaded), JSON syntax (400), body
shape (422; 413 for too many records), then the refusal policy per record.
Some records scored -> 200 with per-record statuses; none scored -> 422 with
the same results inside the problem details. Both name the version and digest
in the body and in the ``Rbfgate-Version`` / ``Rbfgate-Bundle-Sha256`` headers,
and both bound the refusal part of the answer (``service.refusal_answer``).
Large requests are scored on the admission-controlled scoring threads
(``service.admission``; 503 with Retry-After when they are all taken).
"""

from __future__ import annotations

from collections import Counter
from typing import Any

import numpy as np
import orjson
from fastapi import FastAPI, Request
from starlette.responses import Response

from model_store.errors import NotFoundError
from model_store.naming import check_name
from service.access_log import request_note
from service.body import parse_json, read_body
from service.context import Services, version_headers
from service.problems import ServiceProblem, problem_response
from service.registry import LoadedModel
from service.score_body import ColumnBody, read_request
from service.scoring import ScoredBatch, score_records

__all__ = ["active_model", "add_score_routes"]

_EMPTY = np.empty(0)
# What is scored on the event loop rather than a scoring thread (service.admission), decided by
# work, not by body bytes: 1,000 empty records are a 3 KB body but 1,000 x f refusals. Measured on
# 2 cores (tests/benchmarks): handing a single-record request to a thread cost more than scoring it
# (GIL hand-offs between the loop and the thread: p50 6 ms instead of 1 ms), while 1,000 empty
# records held the loop for 134 ms. A body this small is parsed on the loop (under 1 ms); it is
# then scored there when its records x features (plus unknown members) stay within the work bound.
_INLINE_BODY_BYTES = 16 * 1024
_INLINE_WORK = 256


def add_score_routes(app: FastAPI, services: Services) -> None:
    """Add these routes to ``app`` (directly, so every route is a plain APIRoute with its path template)."""
    limit = services.settings.max_body_bytes
    gate = services.gate

    @app.post("/score/{model}")
    async def score_with_active_version(model: str, request: Request) -> Response:
        """Score records with the model's active version."""
        body = await read_body(request, limit)
        loaded = services.registry.serving(model)
        if loaded is not None and len(body) <= _INLINE_BODY_BYTES:
            records = read_request(parse_json(body), services.settings.max_records)
            if _work(records, len(loaded.bundle.feature_names)) <= _INLINE_WORK:
                return _score(services, request, records, loaded)
            return await gate.run(lambda: _score(services, request, records, loaded))

        def work() -> Response:
            loaded = _active(services, model)  # 404 or 503 before the body's 400, 422 or 413
            return _score(services, request, _parsed(services, body), loaded)

        return await gate.run(work)

    @app.post("/score/{model}/versions/{version}")
    async def score_with_pinned_version(model: str, version: str, request: Request) -> Response:
        """Score records with one published version, active or not."""
        body = await read_body(request, limit)

        def work() -> Response:
            # Checks in the documented order: the version (404, 409), then the body (400, 422, 413).
            loaded = services.registry.pinned(model, version)
            return _score(services, request, _parsed(services, body), loaded)

        return await gate.run(work)


def _work(records: list[dict[str, Any]] | ColumnBody, n_features: int) -> int:
    """Cells the refusal policy visits: each feature of each record, and each member it holds."""
    if isinstance(records, ColumnBody):
        return records.n_rows * (n_features + len(records.columns))
    return len(records) * n_features + sum(map(len, records))


def _parsed(services: Services, body: bytes) -> list[dict[str, Any]] | ColumnBody:
    return read_request(parse_json(body), services.settings.max_records)


def _score(
    services: Services, request: Request, records: list[dict[str, Any]] | ColumnBody, model: LoadedModel
) -> Response:
    """Score ``records`` with ``model`` (read once: this request finishes on this version)."""
    note = request_note(request)
    note.update(model=model.name, version=model.version)
    batch = score_records(model, records, services.registry.outside_action(model.name))
    _account(services, model, batch, note, records)
    headers = version_headers(model)
    head = {"model": model.name, "version": model.version, "bundle_sha256": model.digest}
    if batch.refused:
        head.update(batch.refusals.members())
    if batch.scored == 0:
        # Rendered here, on the scoring thread, rather than by the exception handler on the event loop.
        return problem_response(ServiceProblem(
            422,
            "records-refused",
            "Every record was refused",
            f"all {batch.rows} record(s) were refused by {model.name} {model.version}; "
            "each result lists the features to fix (see the schema route for the allowed ranges)",
            extra={**head, "results": batch.results, "problems": batch.refusals.detailed},
            headers=headers,
        ))
    # The head as orjson writes it, its closing brace replaced by the results (or the columns).
    content = orjson.dumps(head)[:-1] + b"," + batch.answer_json + b"}"
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
    note.update(records=batch.rows, scored=batch.scored, refused=batch.refused, refusals=dict(sorted(reasons.items())))
    if services.settings.log_inputs:
        note["inputs"] = records.as_document() if isinstance(records, ColumnBody) else records
