"""Lets the benchmarks reuse the scale-out cluster of tests/deploy (its helpers import as ``scaleout``)."""

from __future__ import annotations

import sys
from pathlib import Path

_DEPLOY = Path(__file__).resolve().parents[1] / "deploy"
if str(_DEPLOY) not in sys.path:
    sys.path.append(str(_DEPLOY))
