"""The pages behind rbfgate's problem types: ``GET /problems/{kind}`` answers a short HTML page.

RFC 9457 section 3.1.1: a problem's ``type`` is a URI reference that, when dereferenced,
should give human-readable documentation of the problem type. Ours are relative
(``/problems/records-refused``), so they resolve against the service that answered; each page
says what the problem means and how to fix it, with no outside links, scripts or styles.

Every kind a ``ServiceProblem`` or ``service.problems.problem_for_error`` can carry must have an
entry in ``PROBLEM_TYPES`` (a test finds the kinds in the code and fetches each page).
"""

from __future__ import annotations

import html
from collections.abc import Mapping
from dataclasses import dataclass

from fastapi import FastAPI
from starlette.responses import Response

from service.problems import ServiceProblem

__all__ = ["PROBLEM_TYPES", "ProblemType", "add_problem_routes", "problem_page"]


@dataclass(frozen=True)
class ProblemType:
    status: int
    title: str
    meaning: str
    fix: str


PROBLEM_TYPES: Mapping[str, ProblemType] = {
    "records-refused": ProblemType(
        422, "Every record was refused",
        "None of the records in the request could be scored: each has a missing, malformed or out-of-range "
        "feature, a member the model does not know, or an invalid id (its message names the rule: at most 128 "
        "characters, no control characters, integers within plus or minus 2^53 - 1). The body summarises every "
        "problem once with the records that have it (refusals), lists the problems of the first records in full "
        "(results, and a flat list with the record index: problems) and says whether some were left to the "
        "summary (summarised).",
        "Fix the features each problem names. GET /models/{model}/versions/{version}/schema gives each "
        "feature's allowed range; GET /models/{model}/openapi.json gives the whole contract.",
    ),
    "invalid-request": ProblemType(
        422, "The request body is not what the route takes",
        "The body is JSON but not what the route takes: a missing or unknown member, a wrong type, an empty "
        "list, or a value the operation cannot use. The problems member points at each part with a JSON pointer.",
        "Send the body the route documents in /openapi.json; scoring takes {\"records\": [{feature: number}]}.",
    ),
    "overloaded": ProblemType(
        503, "The service is busy",
        "Every scoring thread of the worker that answered is busy and its queue of waiting requests is full, "
        "so the request was turned away at once instead of waiting without bound.",
        "Retry after the Retry-After header's seconds, spread retries out, or send fewer records per request.",
    ),
    "malformed-json": ProblemType(
        400, "The request body is not acceptable JSON",
        "The body is not strict JSON (RFC 8259): a syntax error, NaN or Infinity, a number beyond a 64-bit "
        "float, a member name twice in one object, an unpaired surrogate escape such as \\ud800, nesting "
        "deeper than 32 levels, not UTF-8, or an empty body.",
        "Send UTF-8 JSON with finite numbers and unique member names; the detail names the first problem.",
    ),
    "malformed-request": ProblemType(
        400, "Bad Content-Length",
        "The Content-Length header is not a byte count.",
        "Send a Content-Length of decimal digits, or leave it out and let your HTTP client set it.",
    ),
    "incomplete-request": ProblemType(
        408, "The request did not arrive completely",
        "The connection closed, or the body came too slowly (rbfgate serve --read-timeout), before the whole "
        "body arrived. Nothing was scored or changed.",
        "Send the whole request without pausing; scoring can simply be sent again.",
    ),
    "body-too-large": ProblemType(
        413, "The request body is too large",
        "The body is over the service's --max-body-bytes limit (limit_bytes says how many bytes are allowed).",
        "Send fewer records per request.",
    ),
    "too-many-records": ProblemType(
        413, "Too many records in one request",
        "The request holds more records than the service's --max-records limit (limit_records).",
        "Split the records into several requests.",
    ),
    "headers-too-large": ProblemType(
        431, "Request header fields too large",
        "The request target and headers together are over 16 KiB.",
        "Send shorter headers (a shorter token, fewer cookies) and a shorter URL.",
    ),
    "unauthorized": ProblemType(
        401, "A valid token is required",
        "The service runs with a tokens file and the request has no token, a malformed Authorization header, "
        "or a token that is unknown or revoked.",
        "Send Authorization: Bearer <token> with a token from `rbfgate token add`.",
    ),
    "role-not-allowed": ProblemType(
        403, "The token's role does not allow this",
        "The token is valid, but its role (score, operate or audit) does not admit this route.",
        "Use a token with a role the detail names, or ask an operator for one.",
    ),
    "tokens-required": ProblemType(
        403, "This route needs tokens",
        "The route reads the history, downloads bundles or changes the active version, and the service runs "
        "without a tokens file, so nobody may call it.",
        "Restart the service with `rbfgate serve --tokens FILE` and send a token of the role the detail names.",
    ),
    "no-access-rule": ProblemType(
        403, "Forbidden",
        "The route has no access rule, so it is closed. This is a defect of the service, not of the request.",
        "Report it to the service's operators.",
    ),
    "not-found": ProblemType(
        404, "No such model or version",
        "The model or version named in the path is not in the store (or was pruned), or the model has no "
        "active version.",
        "GET /models lists the models and GET /models/{model} their versions.",
    ),
    "check-failed": ProblemType(
        409, "A check refused the request",
        "A verification said no: a stored bundle fails its checksums, golden vectors or signature, a version "
        "conflicts with a published one, there is no version to roll back to, or the history fails its chain.",
        "Read the detail; publish a new version or restore the store from a backup as it says.",
    ),
    "breaking-changes": ProblemType(
        409, "The candidate would break callers",
        "Activating the version would break callers of the active one: a feature added or removed, a unit "
        "changed from one unit to another, a class added or removed, probabilities or the domain model "
        "removed, an allowed range narrowed so that recent inputs would be refused (without recent inputs: so "
        "that part of the active version's training range would be refused), or a domain model that would "
        "refuse as outside_domain records the active version scores. breaking_changes lists each one; "
        "range_basis says what narrowed ranges were judged on (\"recent inputs: N\", this worker's recently "
        "scored records, or \"active version's training range\"). Nothing was changed.",
        "Tell the callers, then activate again with \"accept_breaking\": true (CLI: --accept-breaking); the "
        "history records what was accepted. POST /models/{model}/preview shows the whole comparison.",
    ),
    "model-unavailable": ProblemType(
        503, "The model's active version cannot be served",
        "The active version failed its checks in this worker and no earlier version is loaded.",
        "Retry later; operators: activate a version that passes its checks (GET /readyz shows the failure).",
    ),
    "not-ready": ProblemType(
        503, "Not ready",
        "Some model with an active version has no verified version loaded in this worker yet.",
        "Retry after the Retry-After seconds; the body lists each model's state.",
    ),
    "store-busy": ProblemType(
        503, "The store is busy",
        "Another change held the store's lock for longer than the service waits.",
        "Retry after the Retry-After seconds.",
    ),
    "store-unavailable": ProblemType(
        503, "The store cannot be used",
        "The store directory is missing, read-only or unreadable, so the change or read could not be done.",
        "Retry later; operators: the detail names the directory and what is wrong with it.",
    ),
}


def problem_page(kind: str) -> str:
    """The HTML page of ``kind`` (a key of PROBLEM_TYPES)."""
    entry = PROBLEM_TYPES[kind]
    title = html.escape(entry.title)
    return (
        "<!DOCTYPE html>\n"
        '<html lang="en"><head><meta charset="utf-8">'
        f"<title>{title} ({entry.status})</title></head>\n"
        f"<body>\n<h1>{title}</h1>\n"
        f"<p>Problem type <code>/problems/{html.escape(kind)}</code>, HTTP status {entry.status}, "
        "in RFC 9457 problem details from rbfgate.</p>\n"
        f"<h2>What it means</h2>\n<p>{html.escape(entry.meaning)}</p>\n"
        f"<h2>How to fix it</h2>\n<p>{html.escape(entry.fix)}</p>\n"
        "</body></html>\n"
    )


def add_problem_routes(app: FastAPI, services: object) -> None:
    """``GET /problems/{kind}``: the page of one problem type, 404 for a kind we do not use."""

    @app.get("/problems/{kind}")
    def problem_type(kind: str) -> Response:
        """What one problem type means and how to fix it (text/html)."""
        if kind not in PROBLEM_TYPES:
            raise ServiceProblem(404, "about:blank", "Not Found",
                                 f"no problem type {kind[:64]!r}; the problem details this service sends link to theirs")
        return Response(problem_page(kind), media_type="text/html; charset=utf-8")
