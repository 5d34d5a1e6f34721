"""Checks added to schemathesis' own for the fuzzing test (loaded through ``SCHEMATHESIS_HOOKS``).

RFC 9457 section 3: problem details are ``application/problem+json`` objects with ``type``,
``title``, ``status`` (equal to the HTTP status) and ``detail``; rbfgate promises them for every
error the application answers (README, "Errors").
"""

from __future__ import annotations

import json

import schemathesis


@schemathesis.check
def every_error_is_problem_details(ctx, response, case):
    """Every 4xx and 5xx is application/problem+json with the RFC 9457 members."""
    if response.status_code < 400:
        return None
    values = response.headers.get("content-type") or [""]
    media_type = (values[0] if isinstance(values, list) else values).split(";")[0].strip()
    if media_type != "application/problem+json":
        raise AssertionError(f"{response.status_code} answered as {media_type!r}, not application/problem+json")
    body = json.loads(response.content)
    for member, kind in (("type", str), ("title", str), ("status", int), ("detail", str)):
        if not isinstance(body.get(member), kind) or body.get(member) in ("", None):
            raise AssertionError(f"problem details without a proper {member!r}: {body}")
    if body["status"] != response.status_code:
        raise AssertionError(f"problem status {body['status']} differs from the HTTP status {response.status_code}")
    return None
