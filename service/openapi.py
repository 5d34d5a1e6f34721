"""The service's OpenAPI 3.1 document, served at ``GET /openapi.json``.

The routes read their bodies themselves (a hard size cap, then strict JSON, see
``service.body``), so FastAPI cannot infer request or response shapes from
their signatures. This module states them: a request body and the response of
every status a route can answer, each error as ``application/problem+json``
(RFC 9457), the bearer scheme (RFC 6750) and the name rule of the path
parameters. The body shapes live in ``service.openapi_models``. The fuzzing tests (tests/reliability) check the running service against this
document, so it cannot drift from what the routes do.
"""

from __future__ import annotations

from typing import Any

from fastapi import FastAPI
from fastapi.openapi.utils import get_openapi
from pydantic import BaseModel
from pydantic.json_schema import models_json_schema

from model_store.naming import MAX_NAME_LENGTH
from service.auth import ACCESS_RULES
from service.openapi_models import (
    DOCUMENTED_MODELS,
    NAME_PATTERN,
    ActivateRequest,
    Alive,
    History,
    ModelDetail,
    ModelList,
    Preview,
    PreviewRequest,
    Readiness,
    RollbackRequest,
    ScoreRequest,
    ScoreResponse,
    Switched,
    VersionDetail,
)
from service.problems import PROBLEM_MEDIA_TYPE

__all__ = ["OPENAPI_PATH", "add_openapi_route"]

OPENAPI_PATH = "/openapi.json"
_REF = "#/components/schemas/{model}"


_PROBLEM_STATUSES = {
    400: "the body is not acceptable JSON (syntax, NaN/Infinity, overflow, duplicate names, depth, encoding)",
    401: "missing or unknown token",
    403: "the token's role does not allow this, or the route needs tokens and the service runs without them",
    404: "no such model, version or route",
    408: "the request did not arrive completely in time",
    409: "the bundle or the history failed a check",
    413: "the body or the number of records is over the limit",
    422: "the body does not have the expected shape, or every record was refused",
    503: "the store is busy or unreadable, the model cannot be served yet, or the scoring threads and queue are full",
}
_BODY_STATUSES = (400, 408, 413, 422)

# (method, path) -> (request body model or None, {status: (description, media type, schema)})
_JSON = "application/json"
_OPERATIONS: dict[tuple[str, str], tuple[type[BaseModel] | None, dict[int, tuple[str, str, Any]]]] = {
    ("POST", "/score/{model}"): (ScoreRequest, {200: ("results in request order", _JSON, ScoreResponse)}),
    ("POST", "/score/{model}/versions/{version}"): (
        ScoreRequest, {200: ("results in request order", _JSON, ScoreResponse)}),
    ("GET", "/models"): (None, {200: ("every model and its active version", _JSON, ModelList)}),
    ("GET", "/models/{model}"): (None, {200: ("the published versions", _JSON, ModelDetail)}),
    ("GET", "/models/{model}/versions/{version}"): (None, {200: ("metadata of one version", _JSON, VersionDetail)}),
    ("GET", "/models/{model}/versions/{version}/schema"): (
        None, {200: ("JSON Schema 2020-12 of one record", "application/schema+json", {"type": "object"})}),
    ("GET", "/models/{model}/versions/{version}/bundle"): (
        None, {200: ("the single-file bundle", "application/x-tar", {"type": "string", "format": "binary"})}),
    ("GET", "/models/{model}/history"): (None, {200: ("the trail and its verification", _JSON, History)}),
    ("POST", "/models/{model}/activate"): (ActivateRequest, {200: ("activated and switched", _JSON, Switched)}),
    ("POST", "/models/{model}/rollback"): (RollbackRequest, {200: ("rolled back and switched", _JSON, Switched)}),
    ("POST", "/models/{model}/preview"): (PreviewRequest, {200: ("the comparison; nothing changes", _JSON, Preview)}),
    ("GET", "/healthz"): (None, {200: ("the process answers", _JSON, Alive)}),
    ("GET", "/readyz"): (None, {200: ("every active model is loaded", _JSON, Readiness)}),
    ("GET", "/metrics"): (None, {200: ("Prometheus text exposition", "text/plain", {"type": "string"})}),
}


def add_openapi_route(app: FastAPI, max_records: int) -> None:
    """Serve the document at ``OPENAPI_PATH`` (an ordinary route, so it has an access rule too)."""
    document: dict[str, Any] = {}

    @app.get(OPENAPI_PATH, include_in_schema=False)
    def openapi_document() -> dict[str, Any]:
        """This service's OpenAPI 3.1 description."""
        if not document:
            document.update(build_document(app, max_records))
        return document


def build_document(app: FastAPI, max_records: int) -> dict[str, Any]:
    """The OpenAPI document of ``app``'s routes, with the bodies and responses stated here."""
    document = get_openapi(title="rbfgate", version="1", routes=app.routes,
                           description="Scoring service for RBF-kernel classifiers; errors are RFC 9457 problem details.")
    _, definitions = models_json_schema([(model, "serialization") for model in DOCUMENTED_MODELS], ref_template=_REF)
    schemas = definitions["$defs"]
    schemas["ScoreRequest"]["properties"]["records"]["maxItems"] = max_records
    document["components"] = {
        "schemas": schemas,
        "securitySchemes": {"bearer": {"type": "http", "scheme": "bearer", "description": "rbfgate token add"}},
    }
    for path, operations in document["paths"].items():
        for method, operation in operations.items():
            _describe(operation, method.upper(), path)
    return document


def _describe(operation: dict[str, Any], method: str, path: str) -> None:
    body_model, successes = _OPERATIONS[(method, path)]
    rule = ACCESS_RULES[(method, path)]
    for parameter in operation.get("parameters", []):
        if parameter["in"] == "path":
            parameter["schema"] = {"type": "string", "minLength": 1, "maxLength": MAX_NAME_LENGTH,
                                   "pattern": NAME_PATTERN}
    responses: dict[str, Any] = {}
    for status, (description, media_type, schema) in successes.items():
        if isinstance(schema, type):
            schema = {"$ref": _REF.format(model=schema.__name__)}
        responses[str(status)] = {"description": description, "content": {media_type: {"schema": schema}}}
    statuses = set() if rule.public else {401, 403, 404, 503}
    if body_model is not None:
        operation["requestBody"] = {
            "required": True,
            "content": {_JSON: {"schema": {"$ref": _REF.format(model=body_model.__name__)}}},
        }
        statuses |= set(_BODY_STATUSES)
    if path.endswith(("/activate", "/rollback", "/preview", "/bundle")) or path.startswith("/score/"):
        statuses.add(409)
    if path == "/readyz":
        statuses.add(503)
    problem = {"$ref": _REF.format(model="Problem")}
    for status in sorted(statuses):
        responses[str(status)] = {"description": _PROBLEM_STATUSES[status],
                                  "content": {PROBLEM_MEDIA_TYPE: {"schema": problem}}}
    operation["responses"] = responses
    # RFC 6750 bearer tokens when the service runs with a tokens file; health routes are always open.
    operation["security"] = [] if rule.public else [{"bearer": []}]
