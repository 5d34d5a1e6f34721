"""A model's state as its history says it is: trail lines, pointer, activation stack, version events.

Rollback walks back step by step. The activation stack is the path of
activations that led to the active version: ``activate`` pushes a version
(re-activating the active one pushes nothing), ``rollback`` pops the top.
So each rollback returns to the version that was active before the current
one was activated, and when the previous step was itself a rollback, the next
rollback continues backwards from where that one landed, never forward again
to a version a rollback left. Example: activate 1.0.0, activate 2.0.0,
activate 3.0.0, rollback (to 2.0.0), rollback (to 1.0.0); a third rollback
is refused: 1.0.0 was the first version activated, and the rollbacks undid
every activation after it. ``activate`` reaches any stored version at any time.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, NamedTuple

from model_store.store.history import HistoryLine
from model_store.store.pointer import Pointer

__all__ = ["ModelState", "Step", "activation_stack", "apply_entry", "rollback_refusal", "stack_before", "stored_versions"]


class Step(NamedTuple):
    """One step of the activation stack: the version, its digest, and the seq of the entry that pushed it."""

    version: str
    digest: str
    seq: int


def activation_stack(entries: list[dict[str, Any]]) -> list[Step]:
    """``[Step, ...]`` oldest first; the last element is the active version."""
    stack: list[Step] = []
    for entry in entries:
        apply_entry(stack, entry)
    return stack


def apply_entry(stack: list[Step], entry: dict[str, Any]) -> None:
    """Fold one entry into the activation ``stack`` (in place); entries other than activate and rollback leave it."""
    if entry["action"] == "activate":
        if not stack or stack[-1].version != entry["version"]:
            stack.append(Step(entry["version"], entry["digest"], entry["seq"]))
    elif entry["action"] == "rollback":
        if len(stack) >= 2:
            stack.pop()
        if not stack or stack[-1].version != entry["version"]:
            # Only a trail written by hand gets here (a rollback always lands on the step below);
            # follow what the entry says so that the pointer check names the discrepancy.
            stack[-1:] = [Step(entry["version"], entry["digest"], entry["seq"])]


def stack_before(entries: list[dict[str, Any]], seq: int) -> list[Step]:
    """The activation stack just before the entry ``seq`` was written."""
    return activation_stack([entry for entry in entries if entry["seq"] < seq])


def rollback_refusal(name: str, entries: list[dict[str, Any]]) -> str:
    """Why ``name`` cannot roll back (its stack has fewer than two steps), in words an operator can check."""
    stack = activation_stack(entries)
    if not stack:
        return f"cannot roll back {name}: no version of it was ever activated; use 'rbfgate activate {name} VERSION'"
    first = stack[0]
    rollbacks = [entry for entry in entries if entry["action"] == "rollback"]
    if not rollbacks:
        reason = f"{first.version} is the only version ever made active (at seq {first.seq})"
    else:
        undone = sorted({entry["version"] for entry in entries if entry["action"] == "activate"} - {first.version})
        reason = (
            f"{first.version} was the first version activated (seq {first.seq}), and the rollbacks at seq "
            f"{', '.join(str(entry['seq']) for entry in rollbacks)} have undone every activation after it "
            f"(of {', '.join(undone)}); a rollback never goes forward again to a version a rollback left"
        )
    return (
        f"cannot roll back {name}: {reason}, so there is no earlier step to return to; "
        f"use 'rbfgate activate {name} VERSION' to make any stored version active"
    )


@dataclass
class ModelState:
    """What a writer holding the lock knows about one model."""

    name: str
    lines: list[HistoryLine]
    pointer: Pointer  # the genesis pointer until the first entry moves its head

    @property
    def entries(self) -> list[dict[str, Any]]:
        return [item.entry for item in self.lines]

    @property
    def last_entry(self) -> dict[str, Any] | None:
        return self.lines[-1].entry if self.lines else None

    def stack(self) -> list[Step]:
        return activation_stack(self.entries)

    def active_version(self) -> str | None:
        stack = self.stack()
        return stack[-1].version if stack else None

    def rollback_target(self) -> Step | None:
        """The step rollback would return to, or None."""
        stack = self.stack()
        return stack[-2] if len(stack) >= 2 else None

    def last_event(self, version: str) -> dict[str, Any] | None:
        """The latest publish or prune entry of ``version``: is it in the store as far as history knows?"""
        for entry in reversed(self.entries):
            if entry["version"] == version and entry["action"] in ("publish", "prune"):
                return entry
        return None

    def published_digest(self, version: str) -> str | None:
        """The digest ``version`` was first published with, even if it was pruned since."""
        for entry in self.entries:
            if entry["version"] == version and entry["action"] == "publish":
                return entry["digest"]
        return None


def stored_versions(entries: list[dict[str, Any]]) -> dict[str, dict[str, Any]]:
    """``{version: its publish entry}`` for every version whose last publish or prune entry is a publish."""
    last: dict[str, dict[str, Any]] = {}
    for entry in entries:
        if entry["action"] in ("publish", "prune") and entry["version"] is not None:
            last[entry["version"]] = entry
    return {version: entry for version, entry in last.items() if entry["action"] == "publish"}
