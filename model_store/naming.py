"""Safe model names and versions.

Names and versions become directory names in the store and file names of
archives, so they are checked before they touch a path: letters, digits and
``.``, ``_``, ``-``; starting with a letter or digit; no ``..``; at most 64
characters.
"""

from __future__ import annotations

import re

from model_store.errors import InvalidNameError

__all__ = ["MAX_NAME_LENGTH", "check_name"]

MAX_NAME_LENGTH = 64
_SAFE = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]*")


def check_name(value: str, *, what: str = "model name") -> str:
    """Return ``value`` unchanged if it is a safe name, else raise ``InvalidNameError``."""
    if not isinstance(value, str) or not value:
        raise InvalidNameError(f"{what} is empty; expected 1 to {MAX_NAME_LENGTH} characters of A-Z a-z 0-9 . _ -")
    if len(value) > MAX_NAME_LENGTH:
        raise InvalidNameError(
            f"{what} {value[:20]!r}... is {len(value)} characters long; the limit is {MAX_NAME_LENGTH}"
        )
    if not _SAFE.fullmatch(value) or ".." in value:
        raise InvalidNameError(
            f"{what} {value!r} is not allowed; use letters, digits, '.', '_' and '-', "
            "start with a letter or digit, and do not use '..'"
        )
    return value
