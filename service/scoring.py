"""Scoring a request body: shape checks, the refusal policy, the scorer, the response.

    body      {"records": [{feature: number, ..., "id"?: str | int}, ...]}     1 to max_records records
    results   one per record, in request order, each led by the record's "id" when it sent one:
              {"status": "scored", "label", "decision", "probability", "nearest_support", "domain"}
              {"status": "refused", "problem_count", "problems": [{"feature", "value", "reason", "allowed"}] or null}
              {"status": "refused", "problem_count", "problems": [{"feature": null, ..., "reason": "outside_domain"}],
               "domain"}
    refusals  with any refused record: each distinct problem once with its record runs
              (``service.refusal_answer``, which bounds the answer's size)

``domain`` is ``{"verdict": "typical" | "unusual" | "outside", "score": number}``, or null for a
bundle without a domain model (format rbfgate-bundle/1). A record whose verdict is ``outside``
is refused with the record-level reason ``outside_domain`` unless the operators chose to flag
only for this model (``model_store.domain_policy``); then it is scored and its verdict says so.

``decision`` is a number for a binary model (scikit-learn's
``decision_function``, positive for the second class) and an object
class -> number for a multiclass one (its ovr-shaped decision). ``probability``
is an object class -> probability, or null when the bundle is uncalibrated.
Class labels become JSON object keys as strings (JSON keys are strings).

Records are checked with ``model_store.refusal.check_records`` (the one
refusal policy, shared with the CLI and the swap preview), and only accepted
rows reach the scorer.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import orjson

from model_store.domain_policy import DEFAULT_OUTSIDE_ACTION, apply_outside_policy, domain_answer
from model_store.refusal import CheckedBatch, check_records, from_json
from model_store.scoring import Scores
from service.problems import ServiceProblem
from service.refusal_answer import RefusalAnswer, summarise_refusals
from service.registry import LoadedModel
from service.result_encoding import encode_results

__all__ = ["ScoredBatch", "read_records", "score_records"]


@dataclass(frozen=True)
class ScoredBatch:
    """The outcome of one request: ``results_json`` (the results array, in request order, as JSON
    text) plus what metrics and logs need."""

    results_json: bytes
    checked: CheckedBatch
    scores: Scores | None  # of every row that passed the range rules, outside_domain refusals included
    refusals: RefusalAnswer
    scored: int

    @property
    def results(self) -> list[dict[str, Any]]:
        """The results as Python values (the pages' try route, the all-refused answer)."""
        return orjson.loads(self.results_json)

    @property
    def refused(self) -> int:
        return len(self.checked.problems)

    def problem_pairs(self, known_features: set[str]) -> list[tuple[str, str]]:
        """(feature, reason) of every problem; unknown feature names are not echoed into metrics."""
        return [
            (problem.feature if problem.feature in known_features
             else "(record)" if problem.feature is None else "(unknown)", problem.reason)
            for problems in self.checked.problems.values()
            for problem in problems
        ]


def read_records(document: Any, max_records: int) -> list[dict[str, Any]]:
    """The records of a parsed body; 422 for a wrong shape, 413 for too many records."""
    if not isinstance(document, dict):
        raise _shape("/", f"the body must be a JSON object {{\"records\": [...]}}, not {_kind(document)}")
    unknown = sorted(set(document) - {"records"})
    if unknown:
        raise _shape(f"/{unknown[0][:64]}", "unknown member; the body holds only \"records\"")
    if "records" not in document:
        raise _shape("/records", "missing; send {\"records\": [{feature: number, ...}]}")
    records = document["records"]
    if not isinstance(records, list):
        raise _shape("/records", f"must be a list of records, not {_kind(records)}")
    if not records:
        raise _shape("/records", "is empty; send at least one record")
    if len(records) > max_records:
        raise ServiceProblem(
            413,
            "too-many-records",
            "Too many records in one request",
            f"the request holds {len(records)} records; the limit is {max_records}; split it into smaller requests",
            extra={"limit_records": max_records},
        )
    for index, record in enumerate(records):
        if not isinstance(record, dict):
            raise _shape(f"/records/{index}", f"each record must be an object {{feature: number}}, not {_kind(record)}")
    return records


def score_records(
    model: LoadedModel, records: list[dict[str, Any]], outside_action: str = DEFAULT_OUTSIDE_ACTION
) -> ScoredBatch:
    """Check ``records`` against the model's features, score the accepted ones, write the results."""
    bundle = model.bundle
    checked = check_records(bundle.manifest.features, records, from_json, ids=True)
    scores = bundle.score(checked.values) if len(checked.accepted) else None
    outside = apply_outside_policy(checked, scores, outside_action)
    refusals = summarise_refusals(checked.problems, checked.ids)
    refused = dict(refusals.results)
    scored_at = checked.accepted
    if outside.any():
        scored_at = np.where(outside, -1, checked.accepted)
        for row in np.flatnonzero(outside).tolist():
            index = int(checked.accepted[row])
            refused[index] = {**refused[index], "domain": domain_answer(scores, row)}
    results = encode_results(len(records), scores, bundle.classes, scored_at, refused, checked.ids)
    return ScoredBatch(results, checked, scores, refusals, scored=len(checked.accepted) - int(outside.sum()))


def _shape(pointer: str, detail: str) -> ServiceProblem:
    return ServiceProblem(
        422,
        "invalid-request",
        "The request body is not what the route takes",
        f"{pointer}: {detail}",
        extra={"problems": [{"pointer": pointer, "detail": detail}]},
    )


def _kind(value: Any) -> str:
    if value is None:
        return "null"
    if isinstance(value, bool):
        return "a boolean"
    kinds = {dict: "an object", list: "a list", str: "a string", int: "a number", float: "a number"}
    return kinds.get(type(value), "a value")
