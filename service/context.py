"""What the routes share: the settings and the per-worker services built from them."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

from service.admission import ScoringGate
from service.auth import Authenticator
from service.metrics import ServiceMetrics
from service.recent import RecentRecords
from service.registry import LoadedModel, ModelRegistry
from service.settings import Settings

__all__ = ["Services", "version_headers"]


@dataclass(frozen=True)
class Services:
    """Built once per worker by ``service.app.create_app``; ``store`` is a ``model_store.store.Store``."""

    settings: Settings
    store: Any
    registry: ModelRegistry
    authenticator: Authenticator
    metrics: ServiceMetrics
    recent: RecentRecords
    write_log: Callable[[dict[str, Any]], None]
    gate: ScoringGate


def version_headers(model: LoadedModel) -> dict[str, str]:
    """The response headers naming the version and bundle digest that answered."""
    return {"Rbfgate-Model": model.name, "Rbfgate-Version": model.version, "Rbfgate-Bundle-Sha256": model.digest}
