"""Reading request bodies: a hard size cap, then strict JSON.

The size cap is enforced twice: a declared ``Content-Length`` over the limit
is refused before a single byte is read, and a body sent without one (chunked)
is read only until it passes the limit. Either way the answer is 413.

The JSON parser accepts RFC 8259 JSON only (UTF-8, section 8.1): the
``NaN``/``Infinity`` literals Python would otherwise accept, numbers that do
not fit a 64-bit float, duplicate member names (section 4 leaves their
meaning open, so we refuse the ambiguity) and nesting deeper than
``MAX_DEPTH`` are all refused with 400.
"""

from __future__ import annotations

import json
import math
from typing import Any

from starlette.requests import ClientDisconnect, Request

from service.problems import ServiceProblem

__all__ = ["MAX_DEPTH", "parse_json", "read_body"]

# A scoring body is object > records list > record > value: depth 3 is all a
# valid request needs; nested feature values are refused per record. Anything
# far deeper is an attack on the parser, not a request.
MAX_DEPTH = 32

# 10**309 already overflows a float64 (max about 1.8e308, IEEE 754 binary64).
_MAX_INTEGER_DIGITS = 309
_INFINITIES = frozenset({math.inf, -math.inf})
_OVERFLOW = "a number in the body does not fit a 64-bit float (largest about 1.8e308); send a finite number"


class _Malformed(ValueError):
    """Raised inside the parser hooks; becomes a 400."""


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
    """Parse ``data`` as strict UTF-8 JSON; raise a 400 problem naming what is wrong."""
    if not data.strip():
        raise _malformed("the request body is empty; send a JSON object")
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise _malformed(f"the body is not UTF-8 (byte {exc.start}); JSON must be sent as UTF-8") from None
    try:
        document = json.loads(
            text,
            parse_constant=_refuse_constant,
            parse_int=_checked_int,
            object_pairs_hook=_unique_members,
        )
    except json.JSONDecodeError as exc:
        raise _malformed(f"not valid JSON: {exc.msg} at line {exc.lineno}, column {exc.colno}") from None
    except _Malformed as exc:
        raise _malformed(str(exc)) from None
    except RecursionError:
        raise _malformed(f"the JSON is nested too deeply; at most {MAX_DEPTH} levels are accepted") from None
    _check_structure(document)
    return document


def _refuse_constant(name: str) -> float:
    raise _Malformed(f"{name} is not JSON (RFC 8259 has no NaN or Infinity); send a finite number")


def _checked_int(text: str) -> int:
    digits = text.lstrip("-")
    if len(digits) > _MAX_INTEGER_DIGITS:
        raise _Malformed(f"the number {text[:20]}... ({len(digits)} digits) does not fit a 64-bit float")
    number = int(text)
    try:
        float(number)
    except OverflowError:
        raise _Malformed(f"the number {text[:40]} does not fit a 64-bit float") from None
    return number


def _unique_members(pairs: list[tuple[str, Any]]) -> dict[str, Any]:
    document = dict(pairs)
    if len(document) != len(pairs):
        seen: set[str] = set()
        for key, _ in pairs:
            if key in seen:
                raise _Malformed(f"the member {key[:64]!r} appears twice in one object; send each name once")
            seen.add(key)
    return document


def _check_structure(document: Any) -> None:
    """Refuse nesting deeper than MAX_DEPTH and floats that overflowed to infinity.

    Python's parser turns ``1e400`` into ``inf`` without complaint; one iterative walk
    over the containers (no recursion, so a deep document cannot exhaust the stack)
    finds both problems faster than a per-number parser hook would.
    """
    if isinstance(document, float) and document in _INFINITIES:
        raise _malformed(_OVERFLOW)
    stack = [(document, 1)] if isinstance(document, (dict, list)) else []
    while stack:
        value, depth = stack.pop()
        if depth > MAX_DEPTH:
            raise _malformed(f"the JSON is nested too deeply; at most {MAX_DEPTH} levels are accepted")
        for child in value.values() if isinstance(value, dict) else value:
            if isinstance(child, float):
                if child in _INFINITIES:
                    raise _malformed(_OVERFLOW)
            elif isinstance(child, (dict, list)):
                stack.append((child, depth + 1))


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
