"""The files the pages load, shipped inside the package (``model_store/view/assets``).

Only the names in ``ASSET_TYPES`` are ever served or inlined: a request for anything else is a
404, whatever is on disk, so no path from a request reaches the file system.
"""

from __future__ import annotations

from functools import lru_cache
from pathlib import Path

from model_store.errors import NotFoundError

__all__ = ["ASSET_DIR", "ASSET_TYPES", "asset_bytes", "asset_text"]

ASSET_DIR = Path(__file__).with_name("assets")
_JS = "text/javascript; charset=utf-8"
ASSET_TYPES = {
    "vendor/vega.min.js": _JS,
    "vendor/vega-lite.min.js": _JS,
    "vendor/vega-interpreter.js": _JS,
    "charts.js": _JS,
    "card.js": _JS,
    "client.js": _JS,
    "models.js": _JS,
    "timeline.js": _JS,
    "cardpage.js": _JS,
    "try.js": _JS,
    "preview.js": _JS,
    "offline.js": _JS,
    "view.css": "text/css; charset=utf-8",
}


@lru_cache(maxsize=None)
def asset_bytes(name: str) -> bytes:
    """The bytes of one listed asset (read once per process)."""
    if name not in ASSET_TYPES:
        raise NotFoundError(f"no page asset named {name[:80]!r}")
    return (ASSET_DIR / name).read_bytes()


def asset_text(name: str) -> str:
    return asset_bytes(name).decode("utf-8")
