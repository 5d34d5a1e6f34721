"""The ``results`` array of a scoring answer, written as JSON a column at a time.

Building one dict tree per record and handing it to a JSON encoder cost about 8 us per scored
record (tests/benchmarks: a fifth of a 1,000-record request's server CPU). Here each column of
``Scores`` is written once by orjson as a JSON array and split into its numbers, class labels and
verdicts become their JSON text once per distinct value, and each record's object is the join of
fixed member names with its column values (``map(b"".join, zip(...))``, no Python code per
record). Refused records (few, and shaped by the refusal policy) are written by orjson from their
dicts. The members and their order are those of ``service.scoring`` (its module docstring)::

    {"id"?, "status": "scored", "label", "decision", "probability",
     "nearest_support": {"distance", "similarity", "label", "index", "percentile"}, "domain"}

Numbers are written by orjson, shortest round-trip form (1e-05 is ``1e-5``): the same float64
values the json module would write, in other digits at most.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from itertools import repeat
from typing import Any

import numpy as np
import orjson

from model_store.scoring import Scores

__all__ = ["encode_results"]

_NULL = b"null"


def encode_results(
    n_records: int,
    scores: Scores | None,
    classes: Sequence[Any],
    scored_at: np.ndarray,
    refused: Mapping[int, dict[str, Any]],
    ids: Sequence[Any] | None,
) -> bytes:
    """The JSON array of ``n_records`` results, in request order.

    scores:     every row that passed the range rules (None when none did)
    scored_at:  (len(scores),) int, the record index of each row of ``scores``, or -1 for a row
                refused after scoring (outside the domain); its result is in ``refused``
    refused:    record index -> its refused result (``service.refusal_answer``, plus ``domain``)
    ids:        one per record, the id to lead its result with, or None
    """
    elements: list[bytes] = [b""] * n_records
    if scores is not None and len(scores.labels):
        scored = [_one_element(scores, classes)] if len(scores.labels) == 1 else _scored_elements(scores, classes)
        if len(scored) == n_records and not refused:
            elements = scored
        else:
            for index, element in zip(scored_at.tolist(), scored):
                if index >= 0:
                    elements[index] = element
    for index, result in refused.items():
        elements[index] = orjson.dumps(result)
    if ids is not None:
        for index, record_id in enumerate(ids):
            if record_id is not None:
                elements[index] = b'{"id":' + orjson.dumps(record_id) + b"," + elements[index][1:]
    return b"[" + b",".join(elements) + b"]"


def _scored_elements(scores: Scores, classes: Sequence[Any]) -> list[bytes]:
    """One JSON object per row of ``scores``."""
    n_rows = len(scores.labels)
    class_text = [orjson.dumps(label) for label in classes]
    label = list(map(class_text.__getitem__, scores.label_index.tolist()))
    by_label = dict(zip(classes, class_text))
    nearest_label = list(map(by_label.__getitem__, scores.nearest_label.tolist()))
    keys = [str(label) for label in classes]  # JSON object keys are strings
    decision = (_numbers(scores.decision) if scores.decision.ndim == 1 else _objects(keys, scores.decision))
    probability = repeat(_NULL, n_rows) if scores.probabilities is None else _objects(keys, scores.probabilities)
    if scores.domain_verdict is None:
        domain = repeat(_NULL, n_rows)
    else:
        verdict_text = {verdict: b'{"verdict":' + orjson.dumps(verdict) + b',"score":'
                        for verdict in set(scores.domain_verdict.tolist())}
        domain = map(b"".join, zip(map(verdict_text.__getitem__, scores.domain_verdict.tolist()),
                                   _numbers(scores.domain_score), repeat(b"}")))
    parts = (
        repeat(b'{"status":"scored","label":'), label,
        repeat(b',"decision":'), decision,
        repeat(b',"probability":'), probability,
        repeat(b',"nearest_support":{"distance":'), _numbers(scores.nearest_distance),
        repeat(b',"similarity":'), _numbers(scores.nearest_similarity),
        repeat(b',"label":'), nearest_label,
        repeat(b',"index":'), _numbers(scores.nearest_index),
        repeat(b',"percentile":'), _numbers(scores.nearest_percentile),
        repeat(b'},"domain":'), domain,
        repeat(b"}"),
    )
    return list(map(b"".join, zip(*parts)))


def _one_element(scores: Scores, classes: Sequence[Any]) -> bytes:
    """``_scored_elements`` of a single row, the same bytes from one dict: for one record the
    column writer's per-column calls cost 12 us against 4 (measured in process; tests/service
    compares the two writers on every kind of bundle)."""
    keys = [str(label) for label in classes]
    decision = scores.decision[0].tolist()
    verdict = None if scores.domain_verdict is None else scores.domain_verdict[0]
    return orjson.dumps({
        "status": "scored",
        "label": classes[int(scores.label_index[0])],
        "decision": dict(zip(keys, decision)) if scores.decision.ndim == 2 else decision,
        "probability": None if scores.probabilities is None else dict(zip(keys, scores.probabilities[0].tolist())),
        "nearest_support": {
            "distance": scores.nearest_distance[0].tolist(),
            "similarity": scores.nearest_similarity[0].tolist(),
            "label": scores.nearest_label[:1].tolist()[0],  # a str or int whatever the array's dtype
            "index": scores.nearest_index[0].tolist(),
            "percentile": scores.nearest_percentile[0].tolist(),
        },
        "domain": None if verdict is None else {"verdict": verdict, "score": scores.domain_score[0].tolist()},
    })


def _numbers(column: np.ndarray) -> list[bytes]:
    """(n,) numbers -> their JSON texts, written by orjson in one call."""
    if len(column) == 0:
        return []
    return orjson.dumps(column.tolist())[1:-1].split(b",")


def _objects(keys: list[str], table: np.ndarray) -> list[bytes]:
    """(n, k) numbers -> one JSON object per row, ``{keys[0]: table[r, 0], ...}``."""
    names = [(b"{" if column == 0 else b",") + orjson.dumps(key) + b":" for column, key in enumerate(keys)]
    parts = []
    for column, name in enumerate(names):
        parts += [repeat(name), _numbers(table[:, column])]
    parts.append(repeat(b"}"))
    return list(map(b"".join, zip(*parts)))
