"""GET /healthz, /readyz and /metrics: open to all, and never showing feature values.

/healthz answers 200 while the process runs. /readyz answers 200 when every
model with an active version has a verified version loaded in this worker
(``"state": "degraded"`` when an older version keeps serving because the
active one failed its checks, or the store could not be read on the last
poll), and 503 problem details while some active model has nothing loaded, its
pointer is not explained by its history, or the folder of its active version
does not hold what its publish entry recorded.
Orchestrators treat 2xx as ready (common practice, e.g. Kubernetes probes).
"""

from __future__ import annotations

from typing import Any

from fastapi import FastAPI
from starlette.responses import Response

from service.context import Services
from service.problems import ServiceProblem

__all__ = ["add_health_routes"]


def add_health_routes(app: FastAPI, services: Services) -> None:
    """Add these routes to ``app`` (directly, so every route is a plain APIRoute with its path template)."""

    # /healthz and /readyz are coroutines: they run on the event loop and never wait for a thread,
    # so scoring (on its own threads, service.admission) or a slow metadata read cannot delay them.
    @app.get("/healthz")
    async def alive() -> dict[str, Any]:
        """The process is up and answering."""
        return {"status": "alive"}

    @app.get("/readyz")
    async def ready() -> dict[str, Any]:
        """Whether every active model is loaded and self-tested in this worker."""
        is_ready, report = services.registry.readiness()
        report["tokens"] = services.authenticator.status()
        if not is_ready:
            missing = [entry["model"] for entry in report["models"] if entry["serving"] is None]
            unexplained = [entry["model"] for entry in report["models"] if entry["unexplained_pointer"]]
            unbound = [entry["model"] for entry in report["models"] if entry["folder_mismatch"]]
            reasons = [
                *([f"the active pointer of {', '.join(unexplained)} is not explained by its history, see "
                   "unexplained_pointer"] if unexplained else []),
                *([f"the folder of the active version of {', '.join(unbound)} does not hold what its publish entry "
                   "recorded, see folder_mismatch"] if unbound else []),
                *([f"no verified version loaded yet for {', '.join(missing)}"] if missing else []),
                *([report["store_error"]]
                  if report["store_error"] and not (missing or unexplained or unbound) else []),
            ]
            detail = "; ".join(reasons) or "the models are still loading"
            raise ServiceProblem(503, "not-ready", "Not ready", detail, extra=report, headers={"Retry-After": "1"})
        return report

    @app.get("/metrics")
    def metrics() -> Response:
        """Prometheus text exposition of this service (all workers in multiprocess mode)."""
        content, content_type = services.metrics.render()
        return Response(content, media_type=content_type)
