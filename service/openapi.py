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

from typing import Any, NamedTuple

from fastapi import FastAPI
from fastapi.openapi.utils import get_openapi
from pydantic import BaseModel
from pydantic.json_schema import models_json_schema

from model_store.naming import MAX_NAME_LENGTH
from model_store.store.timeline import AT_PATTERN
from service.auth import ACCESS_RULES
from service.openapi_models import (
    DOCUMENTED_MODELS,
    NAME_PATTERN,
    ActivateRequest,
    Alive,
    BreakingChangesProblem,
    History,
    ModelDetail,
    ModelList,
    OutsideDomainChoice,
    OutsideDomainRequest,
    Preview,
    PreviewRequest,
    Readiness,
    RecordsRefusedProblem,
    RollbackRequest,
    ScoreColumnsRequest,
    ScoreColumnsResponse,
    ScoreRequest,
    ScoreResponse,
    Switched,
    VersionDetail,
)
from service.problems import PROBLEM_MEDIA_TYPE
from service.request_ids import MAX_REQUEST_ID_LENGTH, REQUEST_ID_HEADER

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

class _Operation(NamedTuple):
    """operation_id: explicit and stable, so generated clients get short method names (``score``,
    ``listModels``) that do not change when a handler is renamed; body: the request body model (a
    tuple of models: exactly one of them, ``oneOf``)."""

    operation_id: str
    body: type[BaseModel] | tuple[type[BaseModel], ...] | None
    successes: dict[int, tuple[str, str | tuple[str, ...], Any]]  # status -> (description, media type(s), schema)


_JSON = "application/json"
_OBJECT = {"type": "object"}
# The records form or the column form; the answer takes the form of the body.
_SCORE_BODY = (ScoreRequest, ScoreColumnsRequest)
_SCORED = {200: ("results in request order, in the body's form", _JSON, (ScoreResponse, ScoreColumnsResponse))}
_OPERATIONS: dict[tuple[str, str], _Operation] = {
    ("POST", "/score/{model}"): _Operation("score", _SCORE_BODY, _SCORED),
    ("POST", "/score/{model}/versions/{version}"): _Operation("scoreVersion", _SCORE_BODY, _SCORED),
    ("GET", "/models"): _Operation("listModels", None, {200: ("every model and its active version", _JSON, ModelList)}),
    ("GET", "/models/{model}"): _Operation("getModel", None, {200: ("the published versions", _JSON, ModelDetail)}),
    ("GET", "/models/{model}/versions/{version}"): _Operation(
        "getVersion", None, {200: ("metadata of one version", _JSON, VersionDetail)}),
    ("GET", "/models/{model}/versions/{version}/schema"): _Operation(
        "getRecordSchema", None, {200: ("JSON Schema 2020-12 of one record", "application/schema+json", _OBJECT)}),
    ("GET", "/models/{model}/openapi.json"): _Operation(
        "getModelDocument", None, {200: ("OpenAPI 3.1 document for scoring the active version", _JSON, _OBJECT)}),
    ("GET", "/models/{model}/versions/{version}/openapi.json"): _Operation(
        "getVersionDocument", None, {200: ("OpenAPI 3.1 document for scoring this version", _JSON, _OBJECT)}),
    ("GET", "/models/{model}/versions/{version}/bundle"): _Operation(
        "getBundle", None,
        {200: ("the single-file bundle (octet-stream when Accept asks only for that)",
               ("application/x-tar", "application/octet-stream"), {"type": "string", "format": "binary"})}),
    ("GET", "/models/{model}/history"): _Operation(
        "getHistory", None, {200: ("the trail and its verification; with ?at=, the version live then", _JSON,
                                   {"anyOf": [{"$ref": _REF.format(model="History")},
                                              {"$ref": _REF.format(model="LiveAt")}]})}),
    ("POST", "/models/{model}/activate"): _Operation(
        "activate", ActivateRequest, {200: ("activated and switched", _JSON, Switched)}),
    ("POST", "/models/{model}/rollback"): _Operation(
        "rollback", RollbackRequest, {200: ("rolled back and switched", _JSON, Switched)}),
    ("POST", "/models/{model}/preview"): _Operation(
        "preview", PreviewRequest, {200: ("the comparison; nothing changes", _JSON, Preview)}),
    ("POST", "/models/{model}/outside-domain"): _Operation(
        "chooseOutsideDomain", OutsideDomainRequest,
        {200: ("the choice, recorded in the history", _JSON, OutsideDomainChoice)}),
    ("GET", "/healthz"): _Operation("checkHealth", None, {200: ("the process answers", _JSON, Alive)}),
    ("GET", "/readyz"): _Operation("checkReadiness", None, {200: ("every active model is loaded", _JSON, Readiness)}),
    ("GET", "/metrics"): _Operation(
        "getMetrics", None, {200: ("Prometheus text exposition", "text/plain", {"type": "string"})}),
    ("GET", OPENAPI_PATH): _Operation("getServiceDocument", None, {200: ("this document", _JSON, _OBJECT)}),
    ("GET", "/problems/{kind}"): _Operation(
        "getProblemType", None, {200: ("what the problem type means and how to fix it", "text/html", {"type": "string"})}),
}


def add_openapi_route(app: FastAPI, max_records: int) -> None:
    """Serve the document at ``OPENAPI_PATH`` (an ordinary route, so it has an access rule too)."""
    document: dict[str, Any] = {}

    @app.get(OPENAPI_PATH)
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
    columns = schemas["ScoreColumnsRequest"]["properties"]
    columns["columns"]["additionalProperties"]["maxItems"] = columns["ids"]["maxItems"] = max_records
    document["components"] = {
        "schemas": schemas,
        "headers": {"RequestId": {
            "required": True,
            "description": "the caller's X-Request-ID when valid (printable ASCII, at most 128 characters), else a new one",
            "schema": {"type": "string", "minLength": 1, "maxLength": MAX_REQUEST_ID_LENGTH},
        }},
        "securitySchemes": {"bearer": {"type": "http", "scheme": "bearer", "description": "rbfgate token add"}},
    }
    for path, operations in document["paths"].items():
        for method, operation in operations.items():
            _describe(operation, method.upper(), path)
    return document


def _describe(operation: dict[str, Any], method: str, path: str) -> None:
    described = _OPERATIONS[(method, path)]
    rule = ACCESS_RULES[(method, path)]
    operation["operationId"] = described.operation_id
    for parameter in operation.get("parameters", []):
        if parameter["in"] == "query" and parameter["name"] == "at":
            parameter["description"] = "RFC 3339 date-time with Z or an offset: answer the version live then"
            parameter["schema"] = {"type": "string", "format": "date-time", "pattern": AT_PATTERN}
        if parameter["in"] == "path":
            parameter["schema"] = {"type": "string", "minLength": 1, "maxLength": MAX_NAME_LENGTH,
                                   "pattern": NAME_PATTERN}
    request_id = {REQUEST_ID_HEADER: {"$ref": "#/components/headers/RequestId"}}
    responses: dict[str, Any] = {}
    for status, (description, media_type, schema) in described.successes.items():
        if isinstance(schema, type | tuple):
            schema = _model_schema(schema)
        media_types = (media_type,) if isinstance(media_type, str) else media_type
        responses[str(status)] = {"description": description, "headers": request_id,
                                  "content": {media: {"schema": schema} for media in media_types}}
    statuses = set() if rule.public else {401, 403, 404, 503}
    if described.body is not None:
        operation["requestBody"] = {"required": True, "content": {_JSON: {"schema": _model_schema(described.body)}}}
        statuses |= set(_BODY_STATUSES)
    if path.endswith(("/activate", "/rollback", "/preview", "/bundle", "/outside-domain", "/history")) or \
            path.startswith("/score/"):
        statuses.add(409)
    if path.endswith("/history"):
        statuses.add(422)  # ?at= that is not an RFC 3339 date-time
    if path == "/readyz":
        statuses.add(503)
    if path.startswith("/problems/"):
        statuses.add(404)
    problem = {"$ref": _REF.format(model="Problem")}
    for status in sorted(statuses):
        schema = problem
        if status == 422 and path.startswith("/score/"):
            # Every record refused (results and problems) or a wrong shape (plain problem details).
            schema = {"anyOf": [{"$ref": _REF.format(model=RecordsRefusedProblem.__name__)}, problem]}
        if status == 409 and path.endswith("/activate"):
            # Breaking changes refused (breaking_changes, range_basis), or another check failed.
            schema = {"anyOf": [{"$ref": _REF.format(model=BreakingChangesProblem.__name__)}, problem]}
        description = _PROBLEM_STATUSES[status]
        if status == 409 and path.endswith("/activate"):
            description += ", or activating would break callers (BreakingChangesProblem)"
        responses[str(status)] = {"description": description, "headers": request_id,
                                  "content": {PROBLEM_MEDIA_TYPE: {"schema": schema}}}
    operation["responses"] = responses
    # RFC 6750 bearer tokens when the service runs with a tokens file; health routes are always open.
    operation["security"] = [] if rule.public else [{"bearer": []}]


def _model_schema(models: type[BaseModel] | tuple[type[BaseModel], ...]) -> dict[str, Any]:
    """A reference to the model's component, or ``oneOf`` the models' (their members tell them apart)."""
    if isinstance(models, tuple):
        return {"oneOf": [_model_schema(model) for model in models]}
    return {"$ref": _REF.format(model=models.__name__)}
