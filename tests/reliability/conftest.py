"""Fixtures for the reliability suite; it reuses the helpers of the service and store tests.

The service tests' helpers live in the package ``http_api`` (tests/service) and the store tests'
in the module ``store_support`` (tests/store). pytest puts those folders on ``sys.path`` only
when it collects them, which happens after this folder, so they are added here.
"""

from __future__ import annotations

import sys
from pathlib import Path

_TESTS = Path(__file__).resolve().parents[1]
for _folder in (_TESTS / "service", _TESTS / "store"):
    if str(_folder) not in sys.path:
        sys.path.append(str(_folder))

from http_api.conftest import service_models  # noqa: E402,F401  (a session fixture, reused as is)
