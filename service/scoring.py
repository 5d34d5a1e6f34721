"""Scoring a request body: the refusal policy, the scorer, the response.

    body      {"records": [{feature: number, ..., "id"?: str | int}, ...]}     1 to max_records records,
              or the same rows as columns (``service.score_body``), answered as columns
              (``service.column_answer``)
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
from model_store.refusal import CheckedBatch, check_columns, check_records, from_json
from model_store.scoring import Scores
from service.column_answer import encode_columns
from service.refusal_answer import RefusalAnswer, summarise_refusals
from service.registry import LoadedModel
from service.result_encoding import encode_results
from service.score_body import ColumnBody, check_column_names

__all__ = ["ScoredBatch", "score_records"]


@dataclass(frozen=True)
class ScoredBatch:
    """The outcome of one request: ``answer_json`` (the answer's members after its head, as JSON
    text) and ``results_json`` (the record form's results array; None for a column-form answer
    that scored some row), plus what metrics and logs need."""

    answer_json: bytes
    results_json: bytes | None
    checked: CheckedBatch
    scores: Scores | None  # of every row that passed the range rules, outside_domain refusals included
    refusals: RefusalAnswer
    scored: int
    rows: int

    @property
    def results(self) -> list[dict[str, Any]]:
        """The results as Python values, in the record form (the pages' try route, the all-refused answer)."""
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


def score_records(
    model: LoadedModel, body: list[dict[str, Any]] | ColumnBody, outside_action: str = DEFAULT_OUTSIDE_ACTION,
    *, record_answer: bool = False,
) -> ScoredBatch:
    """Check the body's rows against the model's features, score the accepted ones, write the results:
    in the body's own form, or in the record form whatever the body's form with ``record_answer``."""
    bundle = model.bundle
    if isinstance(body, ColumnBody):
        check_column_names(bundle.feature_names, body)
        checked = check_columns(bundle.manifest.features, body.columns, body.ids, body.n_rows)
        n_rows = body.n_rows
    else:
        checked = check_records(bundle.manifest.features, body, from_json, ids=True)
        n_rows = len(body)
    # The checked rows are finite floats in manifest order: the scorer itself, not Bundle.score's
    # conversion and finiteness check for callers of the library.
    scores = bundle.scorer.score(checked.values) if len(checked.accepted) else None
    outside = apply_outside_policy(checked, scores, outside_action)
    refusals = summarise_refusals(checked.problems, checked.ids)
    scored = len(checked.accepted) - int(outside.sum())
    if isinstance(body, ColumnBody) and scored and not record_answer:
        answer = encode_columns(n_rows, scores, bundle.classes, checked.accepted, ~outside, refusals.results,
                                None if body.ids is None else checked.ids)
        return ScoredBatch(answer, None, checked, scores, refusals, scored, n_rows)
    refused = dict(refusals.results)
    scored_at = checked.accepted
    if outside.any():
        scored_at = np.where(outside, -1, checked.accepted)
        for row in np.flatnonzero(outside).tolist():
            index = int(checked.accepted[row])
            refused[index] = {**refused[index], "domain": domain_answer(scores, row)}
    results = encode_results(n_rows, scores, bundle.classes, scored_at, refused, checked.ids)
    return ScoredBatch(b'"results":' + results, results, checked, scores, refusals, scored, n_rows)
