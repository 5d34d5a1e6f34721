"""Request ids: every answer carries ``X-Request-ID``, the caller's when valid, else a new one.

A caller (or a proxy in front of the service) may send ``X-Request-ID`` to follow one
request through its own logs and ours. The service echoes it when it is 1 to 128 printable
ASCII characters (0x20 to 0x7E, not only spaces), and otherwise makes one (the 32 hex
digits of a random version-4 UUID), so a header cannot smuggle control characters or
unbounded text into the logs. The id is on every answer the application gives, errors
included (the outermost middleware adds it; the handler of unexpected errors, which Starlette
runs outside every middleware, adds it itself through ``request_id``), and in the access log
line.
``X-Request-ID`` is common practice (nginx ``$request_id``, Heroku's router), not a standard.
"""

from __future__ import annotations

import os

from starlette.types import ASGIApp, Message, Receive, Scope, Send

__all__ = ["MAX_REQUEST_ID_LENGTH", "REQUEST_ID_HEADER", "RequestIdMiddleware", "request_id", "valid_request_id"]

REQUEST_ID_HEADER = "X-Request-ID"
MAX_REQUEST_ID_LENGTH = 128
_HEADER_KEY = REQUEST_ID_HEADER.lower().encode("ascii")
_STATE_KEY = "request_id"


def valid_request_id(value: str) -> bool:
    """1 to 128 printable ASCII characters, not only spaces."""
    return (
        0 < len(value) <= MAX_REQUEST_ID_LENGTH
        and all(" " <= character <= "~" for character in value)
        and not value.isspace()
    )


def request_id(scope: Scope) -> str | None:
    """The id the middleware chose for this request (None outside a request)."""
    return scope.get("state", {}).get(_STATE_KEY)


class RequestIdMiddleware:
    """ASGI middleware: choose the request's id, keep it in the scope's state, add it to the answer."""

    def __init__(self, app: ASGIApp) -> None:
        self.app = app

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        chosen = _chosen(scope)
        scope.setdefault("state", {})[_STATE_KEY] = chosen
        encoded = chosen.encode("ascii")

        async def send_with_id(message: Message) -> None:
            if message["type"] == "http.response.start":
                headers = [(name, value) for name, value in message.get("headers", []) if name.lower() != _HEADER_KEY]
                message = {**message, "headers": [*headers, (_HEADER_KEY, encoded)]}
            await send(message)

        await self.app(scope, receive, send_with_id)


def _chosen(scope: Scope) -> str:
    for name, value in scope.get("headers", []):
        if name == _HEADER_KEY:
            text = value.decode("latin-1")  # RFC 9110 section 5.5: field values are octets; ASCII is checked next
            return text if valid_request_id(text) else _new()
    return _new()


def _new() -> str:
    """A version-4 UUID's 32 hex digits (RFC 9562 section 5.4: 122 random bits, version 4, variant
    10), written from the bytes: ``uuid.uuid4().hex`` builds a UUID object first, 3x the time."""
    octets = bytearray(os.urandom(16))
    octets[6] = octets[6] & 0x0F | 0x40
    octets[8] = octets[8] & 0x3F | 0x80
    return octets.hex()
