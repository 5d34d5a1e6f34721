"""Bundle commands (demo, train, export, score, inspect, verify)."""

from __future__ import annotations


def register(subparsers) -> None:
    """Add the bundle commands to the ``rbfgate`` parser."""
