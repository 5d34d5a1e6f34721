"""Record ids: the caller's ``"id"`` member of a JSON record, echoed on its result and never scored.

A record id (``RECORD_ID``) is a string of 1 to ``MAX_ID_LENGTH`` characters none of which is a
control character (Unicode general category Cc: U+0000-U+001F and U+007F-U+009F, The Unicode
Standard, section 4.5), or an integer within ±``MAX_ID_INTEGER`` = ±(2^53 - 1): RFC 8259 section 6
warns that integers beyond that range are not exact in every JSON parser (IEEE 754 doubles), so a
caller's id could come back changed. Anything else is refused as ``invalid_id`` by the refusal
policy (``model_store.refusal``), with ``id_problem``'s message naming the rule broken and its
limit. Exporting refuses a feature of that name, so the member cannot mean two things.
"""

from __future__ import annotations

import re
from typing import Any

__all__ = [
    "ID_CONTROL_RANGES",
    "ID_RULE",
    "MAX_ID_INTEGER",
    "MAX_ID_LENGTH",
    "RECORD_ID",
    "id_problem",
    "plainly_valid_id",
    "printable_id",
]

RECORD_ID = "id"
MAX_ID_LENGTH = 128
MAX_ID_INTEGER = 2**53 - 1  # RFC 8259 section 6: [-(2**53)+1, (2**53)-1] is exact in every parser
# Unicode general category Cc, exactly these two ranges (C0 controls with DEL, C1 controls).
ID_CONTROL_RANGES = ((0x00, 0x1F), (0x7F, 0x9F))
ID_RULE = (
    f"a record id must be a string of 1 to {MAX_ID_LENGTH} characters without control characters, or an "
    f"integer from -{MAX_ID_INTEGER} to {MAX_ID_INTEGER} (2^53 - 1); it is echoed on the result, never scored"
)

# What id_problem accepts, decided without a Python loop over the characters: an int within the
# limit (not a bool), or a string of 1 to MAX_ID_LENGTH characters with no control character and
# no lone surrogate. Anything else (7.0, say) is left to id_problem itself.
_ID_REFUSED_CHARACTERS = re.compile(
    "[" + "".join(f"\\u{low:04x}-\\u{high:04x}" for low, high in ID_CONTROL_RANGES) + "\\ud800-\\udfff]"
)


def plainly_valid_id(value: Any) -> bool:
    """True when ``id_problem(value)`` is None, for the ids most records carry (an int or a str), in
    one regular-expression search; False means only "let ``id_problem`` decide"."""
    kind = type(value)
    if kind is int:
        return -MAX_ID_INTEGER <= value <= MAX_ID_INTEGER
    return kind is str and 0 < len(value) <= MAX_ID_LENGTH and _ID_REFUSED_CHARACTERS.search(value) is None


def printable_id(value: Any) -> Any:
    """An invalid id as it can be echoed: a lone surrogate becomes its escape (UTF-8 cannot hold it)."""
    if isinstance(value, str):
        return value.encode("utf-8", "backslashreplace").decode("utf-8")
    return value


def id_problem(value: Any) -> str | None:
    """Why ``value`` is not a valid record id (one phrase naming the limit), or None when it is one."""
    if isinstance(value, str):
        if not value:
            return f"the id is empty; a string id has 1 to {MAX_ID_LENGTH} characters"
        if len(value) > MAX_ID_LENGTH:
            return f"the id has {len(value)} characters; a string id has at most {MAX_ID_LENGTH}"
        for position, character in enumerate(value, start=1):
            code = ord(character)
            if any(low <= code <= high for low, high in ID_CONTROL_RANGES):
                return (f"the id holds the control character U+{code:04X} at character {position}; an id must not "
                        "hold control characters (Unicode category Cc: U+0000-U+001F, U+007F-U+009F)")
            if 0xD800 <= code <= 0xDFFF:  # a lone surrogate (JSON "\ud800") could not be echoed as UTF-8
                return f"the id holds the lone surrogate U+{code:04X} at character {position}, which UTF-8 cannot carry"
        return None
    # JSON does not tell 7 from 7.0 (RFC 8259 section 6; JSON Schema 2020-12 counts 7.0 as an
    # "integer", validation section 6.1.1), so an integral float is the integer it equals.
    if isinstance(value, float) and value.is_integer():
        value = int(value)
    if isinstance(value, int) and not isinstance(value, bool):
        if abs(value) > MAX_ID_INTEGER:
            return (f"the integer id is outside -{MAX_ID_INTEGER} to {MAX_ID_INTEGER} (2^53 - 1), beyond which JSON "
                    "parsers need not keep integers exact (RFC 8259 section 6); send it as a string")
        return None
    return f"the id is {_kind(value)}; {ID_RULE}"


def _kind(value: Any) -> str:
    if value is None:
        return "null"
    if isinstance(value, bool):
        return "a boolean"
    if isinstance(value, float):
        return "a number written with a fraction or an exponent"
    if isinstance(value, (dict, list)):
        return "an object" if isinstance(value, dict) else "a list"
    return f"a {type(value).__name__}"
