"""The FastAPI application: built from settings, a store and (optionally) a log sink.

    app = create_app(Settings(store_root=Path("store")))        # in tests: TestClient(app)
    uvicorn service.app:create_app_from_environ --factory       # what `rbfgate serve` runs

On start-up (the app's lifespan) the registry loads every active model and a
poller starts following the store; on shutdown the poller stops. Nothing on
this path imports scikit-learn, joblib or pickle-based loading.
"""

from __future__ import annotations

import gc
import inspect
import os
from collections.abc import Callable, Mapping
from contextlib import asynccontextmanager
from typing import Any

from fastapi import Depends, FastAPI
from fastapi.routing import APIRoute
from starlette.concurrency import run_in_threadpool

from model_store.store import Store
from service.access_log import AccessLogMiddleware
from service.admission import ScoringGate
from service.auth import ACCESS_RULES, Authenticator, access_check
from service.context import Services
from service.health_routes import add_health_routes
from service.http_limits import HeaderSizeLimit
from service.log_lines import JsonLines
from service.metrics import ServiceMetrics
from service.model_routes import add_model_routes
from service.openapi import add_openapi_route
from service.operation_routes import add_operation_routes
from service.poller import Poller
from service.problem_types import add_problem_routes
from service.problems import install_problem_handlers
from service.recent import RecentRecords
from service.registry import ModelRegistry
from service.request_ids import RequestIdMiddleware
from service.score_dispatch import ScoreDispatch, score_routes
from service.score_routes import add_score_routes
from service.settings import Settings
from service.view_routes import add_view_routes

__all__ = ["create_app", "create_app_from_environ", "poll_deadline"]

_MULTIPROCESS_ENVIRON_KEY = "PROMETHEUS_MULTIPROC_DIR"


def create_app(
    settings: Settings,
    *,
    store: Any | None = None,
    environ: Mapping[str, str] | None = None,
    write_log: Callable[[dict[str, Any]], None] | None = None,
    freeze_startup: bool = False,
) -> FastAPI:
    """Build the app. ``store`` defaults to ``Store(settings.store_root)``; ``environ`` (default
    ``os.environ``) is read only for prometheus-client's multiprocess directory.
    ``freeze_startup`` (what ``rbfgate serve`` asks for; off for apps built in tests, where one
    process builds many) keeps start-up's objects out of later garbage collections."""
    environ = os.environ if environ is None else environ
    write_log = write_log or JsonLines()
    metrics = ServiceMetrics(environ.get(_MULTIPROCESS_ENVIRON_KEY) or None)
    store = store if store is not None else Store(settings.store_root)
    authenticator = Authenticator(settings.tokens_file)
    registry = ModelRegistry(store, metrics, on_event=write_log, poll_deadline=poll_deadline(settings.poll_seconds),
                             pinned_cache_bytes=settings.pinned_cache_bytes)
    gate = ScoringGate(settings.scoring_threads, settings.scoring_queue)
    services = Services(
        settings=settings,
        store=store,
        registry=registry,
        authenticator=authenticator,
        metrics=metrics,
        recent=RecentRecords(settings.sample_size),
        write_log=write_log,
        gate=gate,
    )
    # Two threads: a store read that hangs (a stuck network filesystem) must never keep a revoked token working.
    pollers = [Poller(settings.poll_seconds, [registry.refresh_all], name="rbfgate-store-poll"),
               Poller(settings.poll_seconds, [authenticator.refresh], name="rbfgate-token-poll")]

    @asynccontextmanager
    async def lifespan(app: FastAPI):
        await run_in_threadpool(registry.refresh_all)
        if freeze_startup:
            _freeze_startup_objects()
        for poller in pollers:
            poller.start()
        try:
            yield
        finally:
            try:
                for poller in pollers:
                    poller.stop()
                gate.close()
                metrics.worker_exited()
            finally:
                # uvicorn ends a signalled worker by re-raising the signal, so atexit never runs:
                # this is where a worker stopped by SIGTERM or Ctrl-C writes its pending log lines.
                _flush(write_log)

    app = FastAPI(
        title="rbfgate",
        lifespan=lifespan,
        docs_url=None,
        redoc_url=None,
        openapi_url=None,
        redirect_slashes=False,
        dependencies=[Depends(access_check(authenticator))],
        **_framework_telemetry_off(),
    )
    for add_routes in (add_score_routes, add_model_routes, add_operation_routes, add_health_routes, add_problem_routes,
                       add_view_routes):
        add_routes(app, services)
    add_openapi_route(app, settings.max_records)
    _check_every_route_has_a_rule(app)
    install_problem_handlers(app)
    # Innermost: the score routes skip FastAPI's routing and dependency machinery, and nothing else.
    app.add_middleware(ScoreDispatch, routes=score_routes(app.routes), authenticator=authenticator)
    app.add_middleware(HeaderSizeLimit)  # inside the access log, so refusals are logged and counted
    app.add_middleware(AccessLogMiddleware, write=write_log, metrics=metrics)
    app.add_middleware(RequestIdMiddleware)  # outermost: every answer the app gives carries X-Request-ID
    app.state.services = services
    return app


def _flush(write_log: Callable[[dict[str, Any]], None]) -> None:
    """Write what a write-behind log sink (``service.log_lines``) still holds; other sinks have nothing pending."""
    flush = getattr(write_log, "flush", None)
    if callable(flush):
        flush()


def poll_deadline(poll_seconds: float) -> float:
    """How long one store poll may run before the worker reports not ready: 10 intervals, at least 2 s.

    A poll reads one small pointer per model and, after a switch, loads one
    bundle (about 1 s for 100,000 support vectors x 50 features, see the
    README's performance section), so only a hung read takes this long.
    """
    return max(2.0, 10.0 * poll_seconds)


def create_app_from_environ() -> FastAPI:
    """The uvicorn factory: settings from the environment ``rbfgate serve`` prepared."""
    _one_blas_thread()
    return create_app(Settings.from_environ(os.environ), freeze_startup=True)


def _one_blas_thread() -> None:
    """Score with one BLAS thread in each worker: the workers, not BLAS threads, share the cores.

    Measured on 2 cores (tests/benchmarks): a 100-record request spent 5 ms in the scorer with
    OpenBLAS's default 2 threads, waking its second thread while the event loop and the other
    workers want the core, and 1 ms with one thread.
    """
    from threadpoolctl import threadpool_limits

    threadpool_limits(limits=1, user_api="blas")  # process-wide, kept for the worker's life


def _freeze_startup_objects() -> None:
    """Leave what start-up built (modules, the app, the loaded bundles) out of every later collection.

    The cyclic collector's oldest generation walks every tracked object; in a worker that is
    ~180,000 objects from start-up, and a 1,000-record request allocates enough containers (one
    dict per record) to set off such a full collection every few hundred requests. Measured
    in process (the app under asyncio, 1,500 requests of 1,000 records): two full collections
    of 110 and 130 ms, each stalling every request in flight, against seven of at most 0.4 ms once
    start-up's objects are frozen (``gc.freeze``, Python 3.7+; garbage is collected first so
    that none of it is kept for good). Objects made later are collected as before.
    """
    gc.collect()
    gc.freeze()


def _check_every_route_has_a_rule(app: FastAPI) -> None:
    for route in app.routes:
        if not isinstance(route, APIRoute):
            raise RuntimeError(f"route {route!r} is not an API route; give it an access rule in service.auth")
        for method in route.methods:
            if (method, route.path) not in ACCESS_RULES:
                raise RuntimeError(f"{method} {route.path} has no entry in service.auth.ACCESS_RULES")


# FastAPI releases with native telemetry (0.165 here) export OpenTelemetry spans, metrics and
# logs (exception messages and stack traces included) whenever a provider is set up anywhere in
# the process. rbfgate's telemetry is its own: Prometheus metrics and one JSON log line per
# request, which carry record values only when operators ask (log_inputs). Switching FastAPI's
# off leaves no second export path that nobody chose, and no provider lookups on every request
# (about 4 % of a one-record request's server CPU: py-spy on a real `rbfgate serve` under wrk,
# 2026-12-03).
_TELEMETRY_OFF = {"tracing": False, "metrics": False, "logs": False, "operation_spans": False, "auto_configure": False}


def _framework_telemetry_off() -> dict[str, Any]:
    """``FastAPI(telemetry=...)`` with every part off, for the FastAPI releases that take it."""
    if "telemetry" in inspect.signature(FastAPI.__init__).parameters:
        return {"telemetry": dict(_TELEMETRY_OFF)}
    return {}
