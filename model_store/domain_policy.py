"""What happens to a record whose domain verdict is ``outside``: refused (the default) or only flagged.

The range rules run before scoring (``model_store.refusal.check_records``); the domain verdict
exists only after it, so this second step runs on the scored rows. With ``refuse`` an outside
record becomes a refusal with the record-level reason ``outside_domain`` (no feature, the domain
score as its value); with ``flag`` it is answered and its verdict says ``outside``. Operators choose
per model through the store (``rbfgate outside-domain``), recorded in the history; ``rbfgate score``
takes ``--flag-outside``. Unusual records are always answered, with their verdict.
"""

from __future__ import annotations

import numpy as np

from model_store.refusal import CheckedBatch, Problem
from model_store.scoring import Scores

__all__ = ["DEFAULT_OUTSIDE_ACTION", "OUTSIDE_ACTIONS", "apply_outside_policy", "domain_answer"]

OUTSIDE_ACTIONS = ("refuse", "flag")
DEFAULT_OUTSIDE_ACTION = "refuse"


def apply_outside_policy(checked: CheckedBatch, scores: Scores | None, action: str) -> np.ndarray:
    """(n_accepted,) bool: the scored rows refused as ``outside_domain``; their problems join ``checked.problems``.

    ``scores`` holds the rows of ``checked.accepted`` in order; without a domain model (or with
    ``flag``) nothing is refused.
    """
    if scores is None or scores.domain_verdict is None or action == "flag":
        return np.zeros(len(checked.accepted), dtype=bool)
    verdicts = scores.domain_verdict
    if len(verdicts) == 1 and verdicts[0] != "outside":  # one record inside the domain: nothing to refuse
        return np.zeros(1, dtype=bool)
    outside = verdicts == "outside"
    for position in np.flatnonzero(outside).tolist():
        checked.problems[int(checked.accepted[position])] = [
            Problem(None, float(scores.domain_score[position]), "outside_domain", None)
        ]
    return outside


def domain_answer(scores: Scores, position: int) -> dict | None:
    """The ``domain`` member of an answer: verdict and score, or None without a domain model."""
    if scores.domain_verdict is None:
        return None
    return {"verdict": str(scores.domain_verdict[position]), "score": float(scores.domain_score[position])}
