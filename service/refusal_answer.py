"""The refusal part of a scoring answer, bounded in size whatever the request holds.

A record's problems grow with the model's features, not with the bytes the client sent: 1,000
empty records (3 KB) refuse 1,000 x f ``missing`` problems, which written out in full made a
1.2 MB answer. So an answer carries each problem in full only within a budget, and every
problem in a summary whose size follows the request's own variety:

    results[i]  {"status": "refused", "problem_count": k, "problems": [...k problems...]}
                while the answer's running total of problems stays within DETAILED_PROBLEMS;
                {"status": "refused", "problem_count": k, "problems": null} after that
    refusals    every problem once per distinct (feature, reason, allowed range):
                {"feature", "reason", "allowed", "count", "records": [[first, last], ...]}
                with the records as runs of consecutive indices (inclusive), in request order
    summarised  true when some record's problems are given only in ``refusals``

A client finds record i's problems in ``results[i].problems`` or, when that is null, in the
groups whose runs contain i. Unknown feature names are grouped by name for the first
``NAMED_UNKNOWN_FEATURES`` distinct names and under ``"feature": null`` after that, so a body of
100,000 invented names cannot grow the summary past that either.

Size: the detailed problems take at most DETAILED_PROBLEMS x about 150 bytes; a group costs
about 100 bytes plus 12 bytes per run, and a run ends only where consecutive records differ, so
the summary grows with what the body varies (each change costs the sender bytes too), never
with records x features.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from model_store.refusal import Problem

__all__ = ["DETAILED_PROBLEMS", "NAMED_UNKNOWN_FEATURES", "RefusalAnswer", "summarise_refusals"]

DETAILED_PROBLEMS = 100
NAMED_UNKNOWN_FEATURES = 32
_ECHOED_NAME = 64  # characters of an unknown feature name shown in a group, as refused text values are


@dataclass(frozen=True)
class RefusalAnswer:
    """results: record index -> its refused result; detailed: the flat problems given in full,
    each with its ``record``; groups: the ``refusals`` summary; summarised: see the module doc."""

    results: Mapping[int, dict[str, Any]]
    detailed: list[dict[str, Any]]
    groups: list[dict[str, Any]]
    summarised: bool

    def members(self) -> dict[str, Any]:
        """The top-level members of an answer that holds refusals."""
        return {"refusals": self.groups, "summarised": self.summarised}


def summarise_refusals(
    problems: Mapping[int, Sequence[Problem]], ids: Sequence[Any] | None = None
) -> RefusalAnswer:
    """Build the refused results and the summary from ``problems`` (record index -> its problems);
    ``ids`` (one per record, or None) puts each caller's record id beside the index in ``detailed``."""
    results: dict[int, dict[str, Any]] = {}
    detailed: list[dict[str, Any]] = []
    groups: dict[tuple, dict[str, Any]] = {}
    unknown_names: set[str] = set()
    budget = DETAILED_PROBLEMS
    for index in sorted(problems):
        found = problems[index]
        if len(found) <= budget:
            listed = [problem.to_dict() for problem in found]
            head = {"record": index} if ids is None or ids[index] is None else {"record": index, "id": ids[index]}
            detailed.extend({**head, **item} for item in listed)
            budget -= len(found)
        else:
            listed = None
            budget = 0  # later records are summarised too, so "the first records in full" stays true
        results[index] = {"status": "refused", "problem_count": len(found), "problems": listed}
        for problem in found:
            _add(groups, _group_key(problem, unknown_names), index)
    return RefusalAnswer(results, detailed, list(groups.values()), summarised=len(detailed) < sum(map(len, problems.values())))


def _group_key(problem: Problem, unknown_names: set[str]) -> tuple:
    feature: str | None = problem.feature
    if problem.reason == "unknown_feature":
        if feature not in unknown_names and len(unknown_names) >= NAMED_UNKNOWN_FEATURES:
            feature = None
        else:
            unknown_names.add(feature)
            feature = feature if len(feature) <= _ECHOED_NAME else feature[:_ECHOED_NAME] + "..."
    allowed = tuple(problem.allowed) if problem.allowed is not None else None
    return feature, problem.reason, allowed


def _add(groups: dict[tuple, dict[str, Any]], key: tuple, index: int) -> None:
    group = groups.get(key)
    if group is None:
        feature, reason, allowed = key
        groups[key] = {"feature": feature, "reason": reason, "allowed": None if allowed is None else list(allowed),
                       "count": 1, "records": [[index, index]]}
        return
    group["count"] += 1
    last = group["records"][-1]
    if last[1] == index - 1:
        last[1] = index
    elif last[1] != index:  # the same record twice: several unnamed unknown features
        group["records"].append([index, index])
