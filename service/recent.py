"""A bounded sample of recently scored records, per model, for the swap preview.

``POST /models/{model}/preview`` scores these records with both the active and
the candidate version, so an operator sees how today's traffic would move.
The sample lives in this worker's memory only (never on disk, never in logs)
and keeps the last ``size`` accepted records of each model.
"""

from __future__ import annotations

import threading
from collections import deque
from itertools import repeat

import numpy as np

__all__ = ["RecentRecords"]


class RecentRecords:
    """The last ``size`` scored records of each model, as ``{feature: value}`` dicts."""

    def __init__(self, size: int) -> None:
        self.size = size
        self._samples: dict[str, deque] = {}
        self._lock = threading.Lock()

    def add(self, model: str, feature_names: list[str], values: np.ndarray) -> None:
        """Keep the accepted rows ``values`` (n, f), raw units, in manifest feature order."""
        if self.size == 0 or len(values) == 0:
            return
        rows = values[-self.size:].tolist()
        names = tuple(feature_names)
        with self._lock:
            sample = self._samples.setdefault(model, deque(maxlen=self.size))
            # (names, row) pairs, made into dicts only when the preview reads them: scoring pays for
            # one tolist and one extend, not a dict per record.
            sample.extend(zip(repeat(names), rows))

    def records(self, model: str) -> list[dict[str, float]]:
        with self._lock:
            kept = list(self._samples.get(model, ()))
        return [dict(zip(names, row)) for names, row in kept]
