"""Strict JSON: one parser for manifests, signatures and request bodies.

Python's ``json`` module accepts more than RFC 8259 describes and fails in ways that are not
input errors. ``loads_strict`` refuses, with one ``StrictJsonError`` naming what is wrong:

- ``NaN``, ``Infinity`` and ``-Infinity`` (not JSON, RFC 8259 section 6);
- numbers that do not fit a 64-bit float, including ``1e400``, which Python turns into
  infinity without complaint (IEEE 754 binary64; RFC 8259 section 6 allows the limit);
- duplicate member names in any object at any depth (RFC 8259 section 4 leaves their
  meaning open; I-JSON, RFC 7493 section 2.3, forbids them), because "last one wins" lets two
  readers see two different documents under one digest;
- strings or member names holding an unpaired UTF-16 surrogate such as ``"\\ud800"``
  (RFC 7493 section 2.1): they cannot be written back as UTF-8, so echoing them fails;
- nesting deeper than ``max_depth``: the C scanner recurses once per level and ends in
  ``RecursionError`` near 1,000 levels; the depth is checked by a linear scan *before*
  parsing, so a document 100,000 levels deep costs one pass over its bytes.

Cost: one pass to measure nesting, one parse, one iterative walk over the parsed containers.
"""

from __future__ import annotations

import json
import math
import re
from typing import Any

import numpy as np

__all__ = ["StrictJsonError", "loads_strict"]

# 10**309 already overflows a float64 (largest about 1.8e308, IEEE 754 binary64).
_MAX_INTEGER_DIGITS = 309
_INFINITIES = frozenset({math.inf, -math.inf})
# Brackets outside strings decide the depth. A string runs from '"' to the next unescaped '"' or,
# unterminated, to the end of the text: every alternative is decided by its first character and a
# match always succeeds, so the scan stays linear whatever the input (no backtracking blow-up).
_STRING = re.compile(r'"(?:[^"\\]|\\.|\\\Z)*(?:"|\Z)', re.DOTALL)
_NOT_BRACKET = re.compile(r"[^\[\]{}]+")
_STEP = np.zeros(256, dtype=np.int64)
_STEP[[ord("["), ord("{")]] = 1
_STEP[[ord("]"), ord("}")]] = -1


class StrictJsonError(ValueError):
    """The text is not acceptable strict JSON; the message says what and where."""


def loads_strict(text: str, *, max_depth: int) -> Any:
    """Parse ``text`` as strict JSON (see the module docstring) with at most ``max_depth`` nesting levels."""
    _check_depth(text, max_depth)
    try:
        document = json.loads(
            text,
            parse_constant=_refuse_constant,
            parse_int=_checked_int,
            object_pairs_hook=_unique_members,
        )
    except json.JSONDecodeError as exc:
        raise StrictJsonError(f"not valid JSON: {exc.msg} at line {exc.lineno}, column {exc.colno}") from None
    except RecursionError:  # unreachable after _check_depth, kept so no input can end in a traceback
        raise StrictJsonError(f"nested too deeply; at most {max_depth} levels are accepted") from None
    _check_values(document)
    return document


def _check_depth(text: str, max_depth: int) -> None:
    if "[" not in text and "{" not in text:
        return
    brackets = _NOT_BRACKET.sub("", _STRING.sub("", text)).encode("ascii")
    if len(brackets) <= max_depth:
        return
    deepest = int(np.cumsum(_STEP[np.frombuffer(brackets, dtype=np.uint8)]).max())
    if deepest > max_depth:
        raise StrictJsonError(f"nested too deeply ({deepest} levels); at most {max_depth} levels are accepted")


def _refuse_constant(name: str) -> float:
    raise StrictJsonError(f"{name} is not JSON (RFC 8259 has no NaN or Infinity); write a finite number")


def _checked_int(text: str) -> int:
    digits = text.lstrip("-")
    if len(digits) > _MAX_INTEGER_DIGITS:
        raise StrictJsonError(f"the number {text[:20]}... ({len(digits)} digits) does not fit a 64-bit float")
    number = int(text)
    try:
        float(number)
    except OverflowError:
        raise StrictJsonError(f"the number {text[:40]} does not fit a 64-bit float") from None
    return number


def _unique_members(pairs: list[tuple[str, Any]]) -> dict[str, Any]:
    document = dict(pairs)
    if len(document) != len(pairs):
        seen: set[str] = set()
        for key, _ in pairs:
            if key in seen:
                raise StrictJsonError(
                    f"the member name {_shown(key)} appears twice in one object; write each name once"
                )
            seen.add(key)
    return document


def _check_values(document: Any) -> None:
    """Refuse floats that overflowed to infinity and unpaired surrogates, walking iteratively."""
    stack = [document]
    while stack:
        value = stack.pop()
        if isinstance(value, dict):
            for key, child in value.items():
                _check_text(key, "member name")
                stack.append(child)
        elif isinstance(value, list):
            stack.extend(value)
        elif isinstance(value, float):
            if value in _INFINITIES:
                raise StrictJsonError(
                    "a number does not fit a 64-bit float (largest about 1.8e308); write a finite number"
                )
        elif isinstance(value, str):
            _check_text(value, "string")


def _check_text(text: str, what: str) -> None:
    if text.isascii():
        return
    try:
        text.encode("utf-8")
    except UnicodeEncodeError as exc:
        code = ord(text[exc.start])
        raise StrictJsonError(
            f"a {what} holds the unpaired UTF-16 surrogate \\u{code:04x} (at character {exc.start}), which is not "
            "Unicode text (RFC 7493 section 2.1); send text without lone surrogate escapes"
        ) from None


def _shown(key: str) -> str:
    return repr(key[:64].encode("utf-8", "backslashreplace").decode("ascii", "backslashreplace"))
