"""One structured JSON log line per request, and the HTTP metrics.

An ASGI middleware (not Starlette's BaseHTTPMiddleware, which buffers
streaming responses) times each request, reads the route template Starlette
matched, and writes one JSON object per line:

    {"time": "...Z", "event": "request", "request_id": "3f2a...", "method": "POST", "path": "/score/iris",
     "route": "/score/{model}", "status": 200, "duration_ms": 3.1, "caller": "team-a",
     "model": "iris", "version": "1.0.0", "records": 2, "scored": 1, "refused": 1,
     "refusals": {"out_of_range": 1}}

Handlers add fields through ``request_note``. Feature values are never
logged unless the service runs with ``--log-inputs``; the scoring route adds
them itself in that case.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from typing import Any

from starlette.requests import Request
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from service.metrics import ServiceMetrics
from service.request_ids import request_id

__all__ = ["AccessLogMiddleware", "request_note"]

_NOTE_KEY = "rbfgate_note"


def request_note(request: Request) -> dict[str, Any]:
    """The dict whose fields the request's log line will carry."""
    return request.scope.setdefault("state", {}).setdefault(_NOTE_KEY, {})


class AccessLogMiddleware:
    """Times every HTTP request; logs it and counts it in the metrics."""

    def __init__(self, app: ASGIApp, *, write: Callable[[dict[str, Any]], None], metrics: ServiceMetrics) -> None:
        self.app = app
        self.write = write
        self.metrics = metrics

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        started = time.perf_counter()
        note = scope.setdefault("state", {}).setdefault(_NOTE_KEY, {})
        status = 500  # what the client gets if the app raises before responding

        async def send_and_watch(message: Message) -> None:
            nonlocal status
            if message["type"] == "http.response.start":
                status = message["status"]
            await send(message)

        try:
            await self.app(scope, receive, send_and_watch)
        finally:
            seconds = time.perf_counter() - started
            route = getattr(scope.get("route"), "path", None) or "(no route)"
            self.metrics.observe_request(route, scope["method"], status, seconds)
            caller = scope.get("state", {}).get("caller")
            self.write({
                "event": "request",
                "request_id": request_id(scope),  # chosen by service.request_ids, the outer middleware
                "method": scope["method"],
                "path": _short(scope.get("path", "")),
                "route": route,
                "status": status,
                "duration_ms": round(seconds * 1000, 3),
                "caller": getattr(caller, "name", None),
                **note,
            })


def _short(text: str, limit: int = 200) -> str:
    return text if len(text) <= limit else text[:limit] + "..."
