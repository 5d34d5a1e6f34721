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
a document holding a number of magnitude 2**63 or more is not taken from orjson at all (every
integer orjson turned into a float is one). Whatever fails these checks,
or orjson itself, goes through ``model_store.strict_json``, which gives the same document or the
400 naming what is wrong, so the answer never depends on which parser ran.
"""

from __future__ import annotations

import math
from itertools import chain
from typing import Any

import numpy as np
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
# orjson reads an integer beyond its exact range [-2**63, 2**64) (-9223372036854775809, say) as a
# float, where JSON's own parser, and so strict_json, keeps an exact int. The float nearest such an
# integer has magnitude 2**63 or more, so a document with any number that large goes to the strict
# parser, which decides (integers orjson keeps exact near that edge go too: slower, the same
# answer). Found with one largest magnitude per level's numbers during the walk that counts
# members and depth: on a 1,000-record body (10 features) the walk with a scan of the body's bytes
# for long digit runs took 0.78 ms, the walk with Python's min and max 0.59 ms (best of 400, one
# process); with numpy's conversion and reduction for long levels, see ``_leaf_magnitude``.
_LARGEST_TAKEN = 2**63
# A level of fewer values is read in Python: a one-record body's levels hold 1, 1 and f values,
# where each numpy conversion (and the exception it raises on a container) costs more than the
# reading. The walk of a one-record body of 10 features took 9 us instead of 22 (p10, one process).
_NUMPY_LEVEL = 32
_CONTAINER_KINDS = frozenset({dict, list})
_NUMBER_KINDS = frozenset({int, float, bool})


def _fast_document(data: bytes) -> Any:
    """The document orjson reads from ``data`` when it is the one ``loads_strict`` would return;
    ``_UNDECIDED`` when only the strict parser can tell (then it decides, and names any problem)."""
    try:
        document = orjson.loads(data)
    except orjson.JSONDecodeError:
        return _UNDECIDED
    members, depth, largest = _members_depth_largest(document)
    if depth > MAX_DEPTH or members != data.count(b":") or largest >= _LARGEST_TAKEN:
        return _UNDECIDED
    return document


def _members_depth_largest(document: Any) -> tuple[int, int, float]:
    """(members of every object, nesting depth, largest magnitude of a number) of a parsed
    document, a level at a time (the magnitude only down to ``MAX_DEPTH``, where the walk stops).

    Each level is scanned with C-level map and set calls and, when it is long, one numpy
    reduction rather than a Python loop per value (a scoring body is three levels: the object,
    its list of records, the records; or four in the column form: the object, its columns, the
    arrays, their values).
    """
    members, depth, largest = 0, 0, 0
    level = [document]
    while True:
        leaves = _leaf_magnitude(level)
        if leaves is not None:
            largest = max(largest, leaves)
            break
        kinds = set(map(type, level))
        if kinds & _NUMBER_KINDS:
            numbers = level if kinds <= _NUMBER_KINDS else [value for value in level if type(value) in _NUMBER_KINDS]
            largest = max(largest, _magnitude(numbers))
        if not kinds & _CONTAINER_KINDS:
            break
        depth += 1
        if depth > MAX_DEPTH:
            break
        objects = level if kinds == {dict} else [value for value in level if type(value) is dict]
        lists = level if kinds == {list} else [value for value in level if type(value) is list] if list in kinds else []
        members += sum(map(len, objects))
        level = list(chain(chain.from_iterable(map(dict.values, objects)), chain.from_iterable(lists)))
    return members, depth, largest


def _leaf_magnitude(level: list[Any]) -> float | None:
    """The largest |number| of a level that holds no container and no number from 2**63 up, or None
    when the level needs the general walk (it holds a container, text that is no number, or a
    magnitude at or above 2**63 among its values).

    One numpy conversion instead of a set of the values' types: ``np.fromiter`` rejects every dict
    and list, so a level it converts is all leaves. It also converts null (NaN, ignored by fmax) and
    text that spells a number; such text can only raise the maximum, which then sends the level to
    the general walk, where only real numbers count. The walk over a 1,000-record body of 10
    features took 0.31 ms instead of 0.60 with a set of types and Python's min and max, and 0.20
    instead of 0.50 for the same rows as columns (p10 of 300 alternating runs, one process).
    A short level is None too: the general walk reads it faster (``_NUMPY_LEVEL``).
    """
    if len(level) < _NUMPY_LEVEL:
        return None
    try:
        magnitude = _largest(level)
    except (TypeError, ValueError, OverflowError):
        return None
    return None if magnitude >= _LARGEST_TAKEN else magnitude


def _magnitude(numbers: list[Any]) -> float:
    """The largest |number| of a non-empty list of ints, floats and booleans, as a float64 (any
    magnitude from 2**63 up may read as infinity: only the comparison with 2**63 uses it). A long
    list takes one numpy conversion and reduction: Python's max and min took twice as long on the
    10,000 numbers of a 1,000-record body (measured in process)."""
    if len(numbers) < _NUMPY_LEVEL:
        largest = max(map(abs, numbers))  # JSON numbers: no NaN to order
        return float(largest) if largest < _LARGEST_TAKEN else math.inf
    try:
        return _largest(numbers)
    except OverflowError:
        return math.inf


def _largest(values: list[Any]) -> float:
    """max |float(v)| over ``values`` converted by ``np.fromiter`` (NaN ignored; 0 for none), or
    the error the conversion raises (OverflowError for an int beyond float64)."""
    converted = np.fromiter(values, dtype=np.float64, count=len(values))
    magnitude = float(np.fmax.reduce(np.abs(converted))) if len(converted) else 0.0
    return 0.0 if math.isnan(magnitude) else magnitude


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
