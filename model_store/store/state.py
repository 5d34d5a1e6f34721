"""A model's state as its history says it is: trail lines, pointer, activation stack, version events.

The activation stack is the undo stack of activations: ``activate`` pushes
a version (re-activating the current one pushes nothing), ``rollback`` pops
it. So rollback always returns to the version that was active before the
current one, and rolling back twice goes back two activations, never
forward again to the version that was just rolled back.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from model_store.store.history import HistoryLine
from model_store.store.pointer import Pointer

__all__ = ["ModelState", "activation_stack"]


def activation_stack(entries: list[dict[str, Any]]) -> list[tuple[str, str]]:
    """``[(version, digest), ...]`` oldest first; the last element is the active version."""
    stack: list[tuple[str, str]] = []
    for entry in entries:
        if entry["action"] == "activate":
            if not stack or stack[-1][0] != entry["version"]:
                stack.append((entry["version"], entry["digest"]))
        elif entry["action"] == "rollback":
            if len(stack) >= 2:
                stack.pop()
            if not stack or stack[-1][0] != entry["version"]:
                stack[-1:] = [(entry["version"], entry["digest"])]
    return stack


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

    def stack(self) -> list[tuple[str, str]]:
        return activation_stack(self.entries)

    def active_version(self) -> str | None:
        stack = self.stack()
        return stack[-1][0] if stack else None

    def rollback_target(self) -> tuple[str, str] | None:
        """The (version, digest) rollback would return to, or None."""
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
