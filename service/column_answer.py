"""The column form of a scoring answer: one JSON array per result member, one entry per row.

A body sent in the column form (``service.score_body``) is answered in it, so a client that
holds its rows as columns reads its results as columns too::

    "ids"?: [id | null, ...],                      only when the body sent "ids"
    "columns": {
        "status": ["scored" | "refused", ...], "label": [...],
        "decision": [...] | {class: [...]}, "probability": {class: [...]} | null,
        "nearest_support": {"distance": [...], "similarity": [...], "label": [...], "index": [...],
                            "percentile": [...]},
        "domain": {"verdict": [...], "score": [...]} | null},
    "refused": [{"row": i, "problem_count": k, "problems": [...] | null}, ...]

Row i of every array is what the record form's ``results[i]`` says, the same float64 values
written by the same orjson calls; a refused row is null in every column except ``status`` and,
when it was refused as ``outside_domain``, ``domain``. Written from whole columns, so there is no
Python code per row when every row is scored (a 1,000-row answer in about a tenth of the record
form's time, measured in process).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
import orjson

from model_store.scoring import Scores

__all__ = ["encode_columns"]


def encode_columns(
    n_rows: int,
    scores: Scores,
    classes: Sequence[Any],
    rows: np.ndarray,
    answered: np.ndarray,
    refused: Mapping[int, dict[str, Any]],
    ids: Sequence[Any] | None,
) -> bytes:
    """The members ``"ids"``, ``"columns"`` and ``"refused"`` of the answer, as JSON text without braces.

    scores:    every row that passed the range rules, at least one of them answered
    rows:      (len(scores),) int, ascending, the row index of each row of ``scores``
    answered:  (len(scores),) bool, False for a row refused after scoring (outside the domain)
    refused:   row index -> its refused result (``service.refusal_answer``)
    ids:       one per row, the id to echo or None; None as a whole when the body sent no ids
    """
    place = _Placement(n_rows, rows, answered)
    keys = [str(label) for label in classes]  # JSON object keys are strings
    own = dict(zip(classes, classes))  # each label as the bundle states it (an int, say, not a numpy int)
    status = ["refused"] * n_rows if len(place.targets) < n_rows else None
    if status is not None:
        for row in place.targets:
            status[row] = "scored"
    decision = (place.numbers(scores.decision) if scores.decision.ndim == 1
                else _by_class(keys, place.numbers, scores.decision))
    probability = b"null" if scores.probabilities is None else _by_class(keys, place.numbers, scores.probabilities)
    domain = b"null"
    if scores.domain_verdict is not None:
        domain = _object({"verdict": place.values(scores.domain_verdict.tolist(), every=True),
                          "score": place.numbers(scores.domain_score, every=True)})
    columns = _object({
        "status": b"[" + b",".join([b'"scored"'] * n_rows) + b"]" if status is None else orjson.dumps(status),
        "label": place.values(list(map(classes.__getitem__, scores.label_index.tolist()))),
        "decision": decision,
        "probability": probability,
        "nearest_support": _object({
            "distance": place.numbers(scores.nearest_distance),
            "similarity": place.numbers(scores.nearest_similarity),
            "label": place.values(list(map(own.__getitem__, scores.nearest_label.tolist()))),
            "index": place.numbers(scores.nearest_index),
            "percentile": place.numbers(scores.nearest_percentile),
        }),
        "domain": domain,
    })
    listed = [{"row": row, "problem_count": refused[row]["problem_count"], "problems": refused[row]["problems"]}
              for row in sorted(refused)]
    head = b"" if ids is None else b'"ids":' + orjson.dumps(list(ids)) + b","
    return head + b'"columns":' + columns + b',"refused":' + orjson.dumps(listed)


class _Placement:
    """Where the rows of ``scores`` go in the answer's arrays: answered rows, or every scored row."""

    def __init__(self, n_rows: int, rows: np.ndarray, answered: np.ndarray) -> None:
        self.n_rows = n_rows
        self.every = rows.tolist()
        self.answered = np.flatnonzero(answered).tolist()
        self.targets = rows[answered].tolist()

    def numbers(self, column: np.ndarray, every: bool = False) -> bytes:
        """(len(scores),) numbers as a JSON array of n_rows entries, null where a row has none."""
        return self.values(column.tolist(), every)

    def values(self, column: list[Any], every: bool = False) -> bytes:
        targets = self.every if every else self.targets
        if len(targets) == self.n_rows:  # every row is in ``column``, in order
            return orjson.dumps(column)
        placed: list[Any] = [None] * self.n_rows
        if every:
            for row, value in zip(targets, column):
                placed[row] = value
        else:
            for row, position in zip(targets, self.answered):
                placed[row] = column[position]
        return orjson.dumps(placed)


def _by_class(keys: list[str], write, table: np.ndarray) -> bytes:
    """(len(scores), k) numbers -> ``{keys[j]: column j as an array}``."""
    return _object({key: write(table[:, column]) for column, key in enumerate(keys)})


def _object(members: dict[str, bytes]) -> bytes:
    """A JSON object from member names and their members' JSON texts, in this order."""
    return b"{" + b",".join(orjson.dumps(name) + b":" + text for name, text in members.items()) + b"}"
