"""Writing small CSV files for the CLI tests (not a conftest, so ``from conftest import ...`` elsewhere still works)."""

from __future__ import annotations

import csv
from pathlib import Path

__all__ = ["write_csv"]


def write_csv(path: Path, header: list[str], rows) -> Path:
    """Write ``header`` and ``rows`` (lists of values) to ``path``; return ``path``."""
    with open(path, "w", newline="") as handle:
        writer = csv.writer(handle)
        writer.writerow(header)
        writer.writerows(rows)
    return path
