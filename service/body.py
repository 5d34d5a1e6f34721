"""Reading request bodies: a hard size cap, then strict JSON.

The size cap is enforced twice: a declared ``Content-Length`` over the limit
is refused before a single byte is read, and a body sent without one (chunked)
is read only until it passes the limit. Either way the answer is 413.

The JSON parser accepts RFC 8259 JSON only (UTF-8, section 8.1): the
``NaN``/``Infinity`` literals Python would otherwise accept, numbers that do
not fit a 64-bit float, duplicate member names (section 4 leaves their
meaning open, so we refuse the ambiguity), unpaired surrogate escapes such as
``"\\ud800"`` (RFC 7493 section 2.1; they cannot be echoed as UTF-8) and nesting
deeper than ``MAX_DEPTH`` are all refused with 400 (``model_store.strict_json``).
"""

from __future__ import annotations

from typing import Any

from starlette.requests import ClientDisconnect, Request

from model_store.strict_json import StrictJsonError, loads_strict
from service.problems import ServiceProblem

__all__ = ["MAX_DEPTH", "parse_json", "read_body"]

# A scoring body is object > records list > record > value: depth 3 is all a
# valid request needs; nested feature values are refused per record. Anything
# far deeper is an attack on the parser, not a request.
MAX_DEPTH = 32


async def read_body(request: Request, limit: int) -> bytes:
    """Return the whole body, or raise 413 as soon as it is known to exceed ``limit`` bytes."""
    declared = request.headers.get("content-length")
    if declared is not None:
        if not declared.isdigit():
            raise ServiceProblem(
                400, "malformed-request", "Bad Content-Length", f"Content-Length {declared[:40]!r} is not a byte count"
            )
        if int(declared) > limit:
            raise _too_large(f"the request declares {int(declared)} bytes", limit)
    chunks: list[bytes] = []
    received = 0
    try:
        async for chunk in request.stream():
            received += len(chunk)
            if received > limit:
                raise _too_large(f"the request body passed {limit} bytes", limit)
            chunks.append(chunk)
    except ClientDisconnect:
        # The client went away, or the server closed a body that came too slowly (service.http_limits).
        # Nobody reads this answer; it keeps the log and the metrics from calling it a server failure.
        raise ServiceProblem(
            408,
            "incomplete-request",
            "The request did not arrive completely",
            f"the connection closed after {received} bytes of the body; send the whole body without pausing",
        ) from None
    return b"".join(chunks)


def parse_json(data: bytes) -> Any:
    """Parse ``data`` as strict UTF-8 JSON (``model_store.strict_json``); raise a 400 problem naming what is wrong."""
    if not data.strip():
        raise _malformed("the request body is empty; send a JSON object")
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise _malformed(f"the body is not UTF-8 (byte {exc.start}); JSON must be sent as UTF-8") from None
    try:
        return loads_strict(text, max_depth=MAX_DEPTH)
    except StrictJsonError as exc:
        raise _malformed(str(exc)) from None


def _malformed(detail: str) -> ServiceProblem:
    return ServiceProblem(400, "malformed-json", "The request body is not acceptable JSON", detail)


def _too_large(found: str, limit: int) -> ServiceProblem:
    return ServiceProblem(
        413,
        "body-too-large",
        "The request body is too large",
        f"{found}; the limit is {limit} bytes; send fewer records per request",
        extra={"limit_bytes": limit},
    )
