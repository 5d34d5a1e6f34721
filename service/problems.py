"""Every error response of the service, as RFC 9457 problem details.

This is the one place where errors become HTTP: rbfgate's own exceptions
(``model_store.errors``), the service's ``ServiceProblem``, Starlette's
HTTP errors (unknown route, wrong method), FastAPI's request validation and,
last, any unexpected exception (logged, answered with a bare 500 that reveals
nothing). Each body is ``application/problem+json`` with ``type``, ``title``,
``status`` and ``detail`` (RFC 9457 section 3.1), plus extension members such
as ``problems`` where a list helps the caller fix the request.

Problem types of our own are relative URI references under ``/problems/``
(RFC 9457 section 3.1.1 allows relative references), each answered by a page
(``service.problem_types``); plain HTTP conditions use ``about:blank`` with
the status phrase as title (section 4.2.1). Every answer carries
``X-Request-ID`` (``service.request_ids``); the handler of unexpected errors
adds it itself, because Starlette runs that handler outside every middleware.
"""

from __future__ import annotations

import http
import json
import logging
from collections.abc import Mapping
from typing import Any

from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from starlette.exceptions import HTTPException as StarletteHTTPException
from starlette.responses import Response

from model_store.api_document import PROBLEM_MEDIA_TYPE, problem_type_uri
from model_store.errors import (
    BreakingChangeError,
    CheckFailedError,
    InputError,
    InvalidNameError,
    LockTimeoutError,
    NotFoundError,
    RbfgateError,
    StoreError,
)
from service.request_ids import REQUEST_ID_HEADER, request_id

__all__ = [
    "PROBLEM_MEDIA_TYPE",
    "ServiceProblem",
    "install_problem_handlers",
    "known_problem",
    "problem_for_error",
    "problem_response",
    "validation_problem",
]

_log = logging.getLogger("rbfgate.service")


class ServiceProblem(Exception):
    """An HTTP error the service raises on purpose; rendered by ``problem_response``.

    kind:     the last part of the problem type URI, e.g. ``records-refused``
    extra:    extension members added to the body (``problems``, ``results``...)
    headers:  extra response headers (``WWW-Authenticate``, ``Retry-After``...)
    """

    def __init__(
        self,
        status: int,
        kind: str,
        title: str,
        detail: str,
        *,
        extra: Mapping[str, Any] | None = None,
        headers: Mapping[str, str] | None = None,
    ) -> None:
        super().__init__(detail)
        self.status = status
        self.kind = kind
        self.title = title
        self.detail = detail
        self.extra = dict(extra or {})
        self.headers = dict(headers or {})

    def body(self) -> dict[str, Any]:
        problem_type = "about:blank" if self.kind == "about:blank" else problem_type_uri(self.kind)
        return {"type": problem_type, "title": self.title, "status": self.status, "detail": self.detail, **self.extra}


# Most specific first: the first class the error is an instance of decides.
_ERROR_STATUS: tuple[tuple[type[RbfgateError], int, str, str], ...] = (
    (InvalidNameError, 404, "not-found", "No such model or version"),
    (NotFoundError, 404, "not-found", "No such model or version"),
    (LockTimeoutError, 503, "store-busy", "The store is busy"),
    (StoreError, 503, "store-unavailable", "The store cannot be used"),
    (BreakingChangeError, 409, "breaking-changes", "The candidate would break callers"),
    (CheckFailedError, 409, "check-failed", "A check refused the request"),
    (InputError, 422, "invalid-request", "The request body is not what the route takes"),
)


def problem_for_error(exc: RbfgateError) -> ServiceProblem:
    """Map one of rbfgate's errors to its HTTP problem; the message becomes the detail."""
    for error_class, status, kind, title in _ERROR_STATUS:
        if isinstance(exc, error_class):
            headers = {"Retry-After": "5"} if status == 503 else None
            extra: dict[str, Any] = {"error": type(exc).__name__}
            if isinstance(exc, BreakingChangeError):
                extra["breaking_changes"] = list(exc.changes)
                extra["range_basis"] = exc.range_basis
            return ServiceProblem(status, kind, title, str(exc), extra=extra, headers=headers)
    # An RbfgateError outside the table is a bug in this table, not the caller's fault.
    _log.error("no HTTP mapping for %s: %s", type(exc).__name__, exc)
    return ServiceProblem(500, "about:blank", "Internal Server Error", "the service failed; the error was logged")


def known_problem(exc: BaseException) -> ServiceProblem | None:
    """The problem an expected error is answered with (a ``ServiceProblem`` as it is, one of
    rbfgate's errors through ``problem_for_error``); None for anything else, which is a bug.

    The exception handlers below and the score routes' lean path (``service.score_dispatch``)
    both answer through this, so an error reads the same whichever path served the route.
    """
    if isinstance(exc, ServiceProblem):
        return exc
    if isinstance(exc, RbfgateError):
        return problem_for_error(exc)
    return None


def problem_response(problem: ServiceProblem) -> Response:
    """Render ``problem`` as ``application/problem+json``."""
    content = json.dumps(problem.body(), ensure_ascii=False, allow_nan=False, separators=(",", ":"))
    return Response(content, status_code=problem.status, media_type=PROBLEM_MEDIA_TYPE, headers=problem.headers)


def install_problem_handlers(app: FastAPI) -> None:
    """Register the handlers that turn every kind of error into problem details."""
    app.add_exception_handler(ServiceProblem, _on_known_error)
    app.add_exception_handler(RbfgateError, _on_known_error)
    app.add_exception_handler(StarletteHTTPException, _on_http_exception)
    app.add_exception_handler(RequestValidationError, _on_validation_error)
    app.add_exception_handler(Exception, _on_unexpected)


async def _on_known_error(request: Request, exc: ServiceProblem | RbfgateError) -> Response:
    return problem_response(known_problem(exc))


async def _on_http_exception(request: Request, exc: StarletteHTTPException) -> Response:
    status = exc.status_code
    detail = _http_detail(request, status, exc.detail)
    headers = dict(exc.headers or {})
    return problem_response(ServiceProblem(status, "about:blank", _phrase(status), detail, headers=headers))


async def _on_validation_error(request: Request, exc: RequestValidationError) -> Response:
    return problem_response(validation_problem(exc.errors()))


def validation_problem(errors: list[Mapping[str, Any]]) -> ServiceProblem:
    """422 for pydantic-style errors: one entry per problem, with a JSON pointer to the field."""
    problems = [
        {
            "pointer": "/" + "/".join(str(part) for part in error.get("loc", ()) if part != "body"),
            "detail": error.get("msg", ""),
        }
        for error in errors
    ]
    first = problems[0] if problems else {"pointer": "/", "detail": "invalid request"}
    return ServiceProblem(
        422,
        "invalid-request",
        "The request body is not what the route takes",
        f"{first['pointer']}: {first['detail']}" + (f" (and {len(problems) - 1} more)" if len(problems) > 1 else ""),
        extra={"problems": problems},
    )


async def _on_unexpected(request: Request, exc: Exception) -> Response:
    # Reached only by a bug: bad input is refused before it gets here.
    _log.exception("unexpected error on %s %s", request.method, request.url.path)
    chosen = request_id(request.scope)
    return problem_response(ServiceProblem(
        500, "about:blank", "Internal Server Error", "the service failed; the error was logged",
        headers={REQUEST_ID_HEADER: chosen} if chosen else None,
    ))


def _http_detail(request: Request, status: int, detail: Any) -> str:
    if status == 404:
        return f"no route {_short(request.url.path)!r}; see the service documentation for the routes"
    if status == 405:
        return f"{request.method} is not allowed on {_short(request.url.path)!r}; the Allow header lists what is"
    return detail if isinstance(detail, str) else _phrase(status)


def _phrase(status: int) -> str:
    try:
        return http.HTTPStatus(status).phrase
    except ValueError:
        return "Error"


def _short(text: str, limit: int = 200) -> str:
    return text if len(text) <= limit else text[:limit] + "..."
