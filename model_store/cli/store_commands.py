"""Store commands (publish, versions, activate, rollback, history, preview, prune, keygen, sign)."""

from __future__ import annotations


def register(subparsers) -> None:
    """Add the store commands to the ``rbfgate`` parser."""
