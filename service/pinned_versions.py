"""Pinned versions: published versions a request names explicitly, kept loaded in a cache bounded by bytes.

A request may score with a version other than the active one (``/score/{model}/versions/{version}``).
Each worker keeps such versions loaded in a least-recently-used cache whose budget is bytes of loaded
arrays (``Bundle.resident_bytes``, ``--pinned-cache-bytes``), not a count: one large bundle weighs as
much as many small ones. A version larger than the whole budget is loaded for each request and never
kept, so it cannot evict everything else.
"""

from __future__ import annotations

import threading
from collections import OrderedDict
from collections.abc import Callable
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from service.registry import LoadedModel

__all__ = ["PinnedVersions"]


class PinnedVersions:
    """LRU cache of loaded versions keyed by (model, version), at most ``budget_bytes`` of arrays."""

    def __init__(self, budget_bytes: int) -> None:
        self._budget_bytes = budget_bytes
        self._loaded: OrderedDict[tuple[str, str], LoadedModel] = OrderedDict()
        # Held while loading too: two requests for the same version load it once.
        self._lock = threading.Lock()

    def get(self, name: str, version: str, load: Callable[[str, str], LoadedModel]) -> LoadedModel:
        """The cached (name, version), or ``load(name, version)``'s result, kept when it fits the budget."""
        key = (name, version)
        with self._lock:
            cached = self._loaded.get(key)
            if cached is not None:
                self._loaded.move_to_end(key)
                return cached
            loaded = load(name, version)
            if loaded.bundle.resident_bytes <= self._budget_bytes:
                self._loaded[key] = loaded
                while self._bytes() > self._budget_bytes:
                    self._loaded.popitem(last=False)
            return loaded

    def size(self) -> tuple[int, int]:
        """(versions, bytes) held."""
        with self._lock:
            return len(self._loaded), self._bytes()

    def _bytes(self) -> int:
        return sum(item.bundle.resident_bytes for item in self._loaded.values())
