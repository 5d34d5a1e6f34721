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

Speed (measured in tests/benchmarks: the strict parser was a third of a 1,000-record request's
server CPU): a body is first parsed by orjson, a C parser that already refuses everything above
except duplicate names, depth beyond ``MAX_DEPTH`` and integers too long for 64 bits (which it
turns into floats). Those three are then ruled out in bulk: every member name is followed by one
``:`` outside strings, so a body with as many ``:`` bytes as the parsed objects hold members has
no duplicate (and no ``:`` inside a string); the depth is measured on the parsed containers; and
a body holding 19 digits in a row outside a fraction is not taken from orjson at all. Whatever fails these checks,
or orjson itself, goes through ``model_store.strict_json``, which gives the same document or the
400 naming what is wrong, so the answer never depends on which parser ran.
"""

from __future__ import annotations

from itertools import chain
from typing import Any

import orjson
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
    document = _fast_document(data)
    if document is not _UNDECIDED:
        return document
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise _malformed(f"the body is not UTF-8 (byte {exc.start}); JSON must be sent as UTF-8") from None
    try:
        return loads_strict(text, max_depth=MAX_DEPTH)
    except StrictJsonError as exc:
        raise _malformed(str(exc)) from None


_UNDECIDED = object()
# 19 digits in a row may be an integer past 64 bits (-9223372036854775809, say), which orjson reads
# as a float where JSON's own parser, and so strict_json, keeps an exact int; 18 digits never are.
# A float's fraction may hold more (0.0012345678901234567, common in repr-written floats), so only
# runs not after a "." count. One C-speed pass finds them: every digit becomes "0", "." stays, every
# other byte becomes "x"; such a run is then "x" and 19 "0"s, or 19 "0"s at the start. (A regex took
# 6 ms on 270 KB; a numpy pass over the digit runs, needed when fractions held 19 digits, 1.5 ms.)
_RUN_MARKS = bytes(b"0"[0] if 0x30 <= code <= 0x39 else b"."[0] if code == 0x2E else b"x"[0] for code in range(256))
_LONG_DIGITS = b"0" * 19
_LONG_INTEGER_DIGITS = b"x" + _LONG_DIGITS
_CONTAINER_KINDS = frozenset({dict, list})


def _fast_document(data: bytes) -> Any:
    """The document orjson reads from ``data`` when it is the one ``loads_strict`` would return;
    ``_UNDECIDED`` when only the strict parser can tell (then it decides, and names any problem)."""
    try:
        document = orjson.loads(data)
    except orjson.JSONDecodeError:
        return _UNDECIDED
    if _long_integer_digits(data):
        return _UNDECIDED
    members, depth = _members_and_depth(document)
    if depth > MAX_DEPTH or members != data.count(b":"):
        return _UNDECIDED
    return document


def _long_integer_digits(data: bytes) -> bool:
    """True when some run of 19 or more digits is not a number's fraction (not preceded by "."):
    ``0.0012345678901234567`` is a float either way, ``-9223372036854775809`` is not."""
    marks = data.translate(_RUN_MARKS)
    return marks.startswith(_LONG_DIGITS) or marks.find(_LONG_INTEGER_DIGITS) >= 0


def _members_and_depth(document: Any) -> tuple[int, int]:
    """(members of every object, nesting depth) of a parsed document, a level at a time.

    Each level is scanned with C-level map and set calls rather than a Python loop per value
    (a scoring body is three levels: the object, its list of records, the records).
    """
    members, depth = 0, 0
    level, kinds = [document], {type(document)}
    while kinds & _CONTAINER_KINDS:
        depth += 1
        if depth > MAX_DEPTH:
            break
        objects = level if kinds == {dict} else [value for value in level if type(value) is dict]
        lists = level if kinds == {list} else [value for value in level if type(value) is list] if list in kinds else []
        members += sum(map(len, objects))
        level = list(chain(chain.from_iterable(map(dict.values, objects)), chain.from_iterable(lists)))
        kinds = set(map(type, level))
    return members, depth


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
