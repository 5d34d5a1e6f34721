"""The pages under ``/view/`` for auditors and operators, and the JSON they draw.

    GET  /                                                   redirects to /view/
    GET  /view/                                              Models
    GET  /view/models/{model}                                Timeline
    GET  /view/models/{model}/versions/{version}             Model card
    GET  /view/models/{model}/try                            Try a record
    GET  /view/models/{model}/preview                        Preview a switch
    GET  /view/assets/{name}                                 scripts, style sheet, vendored Vega files
    GET  /view/data/session                                  who the caller is and what the role table lets them do
    GET  /view/data/models                                   models, active versions, this worker's traffic
    GET  /view/data/models/{model}/versions/{version}/card   the model card document
    GET  /view/data/models/{model}/timeline                  history, its verification, the timeline plot
    POST /view/data/models/{model}/try                       score records, answered 200 even when all are refused
    POST /view/data/models/{model}/preview                   the preview route's answer plus its plot

Pages and assets are public: a page is a fixed shell with no model data, which fetches its data
with the caller's bearer token. Each data route has the role rule of the JSON route it draws
(``service.auth``), and is built by the same functions, so a page shows nothing its caller could
not read as JSON. Page assembly and plot specifications live in ``model_store.view``; this module
only routes. The routes stay out of ``/openapi.json``: they serve the pages, not API clients,
and may change with them. ``try`` differs from ``POST /score/{model}`` in two ways only: an answer where every
record is refused is a 200 document (the page shows each refusal by its field), and trying is not
traffic, so it stays out of the metrics and the preview's sample of recent records.
"""

from __future__ import annotations

import hashlib
import json
from typing import Any

from fastapi import FastAPI, Request
from starlette.concurrency import run_in_threadpool
from starlette.responses import RedirectResponse, Response

from model_store.naming import check_name
from model_store.view import charts
from model_store.view.assets import ASSET_TYPES, asset_bytes
from model_store.view.pages import page_html
from model_store.view.sources import store_card
from model_store.view.timeline import timeline_data
from service.auth import ACCESS_RULES, AccessRule
from service.body import parse_json, read_body
from service.context import Services, version_headers
from service.metrics import TRAFFIC_KEYS
from service.model_routes import history_document
from service.operation_routes import preview_body, preview_document
from service.problems import ServiceProblem
from service.score_routes import active_model
from service.score_body import read_request
from service.scoring import score_records

__all__ = ["PAGE_SECURITY_HEADERS", "add_view_routes"]

# No inline script, no eval (Vega runs with its expression interpreter), nothing from elsewhere.
PAGE_SECURITY_HEADERS = {
    "Content-Security-Policy": "default-src 'none'; script-src 'self'; style-src 'self' 'unsafe-inline'; "
                               "img-src 'self' data: blob:; connect-src 'self'; form-action 'self'; "
                               "base-uri 'none'; frame-ancestors 'none'",
    "X-Content-Type-Options": "nosniff",
    "Referrer-Policy": "no-referrer",
}
# What the session route reports, each read off the role table for one representative route.
_PERMISSIONS = {
    "read_metadata": ("GET", "/models"),
    "score": ("POST", "/score/{model}"),
    "read_history": ("GET", "/models/{model}/history"),
    "download_bundle": ("GET", "/models/{model}/versions/{version}/bundle"),
    "operate": ("POST", "/models/{model}/activate"),
}


def add_view_routes(app: FastAPI, services: Services) -> None:
    """Add these routes to ``app`` (directly, so every route is a plain APIRoute with its path template)."""
    store = services.store
    limit = services.settings.max_body_bytes

    @app.get("/", include_in_schema=False)
    def root() -> Response:
        """The pages start at /view/."""
        return RedirectResponse("/view/", status_code=307)

    @app.get("/view/", include_in_schema=False)
    def models_page() -> Response:
        return _page("models")

    @app.get("/view/models/{model}", include_in_schema=False)
    def timeline_page(model: str) -> Response:
        return _page("timeline", model=check_name(model, what="model name"))

    @app.get("/view/models/{model}/versions/{version}", include_in_schema=False)
    def card_page(model: str, version: str) -> Response:
        return _page("card", model=check_name(model, what="model name"), version=check_name(version, what="model version"))

    @app.get("/view/models/{model}/try", include_in_schema=False)
    def try_page(model: str) -> Response:
        return _page("try", model=check_name(model, what="model name"))

    @app.get("/view/models/{model}/preview", include_in_schema=False)
    def preview_page(model: str) -> Response:
        return _page("preview", model=check_name(model, what="model name"))

    @app.get("/view/assets/{name:path}", include_in_schema=False)
    def asset(name: str, request: Request) -> Response:
        data = asset_bytes(name)  # NotFoundError for any name not listed in ASSET_TYPES
        tag = '"' + hashlib.sha256(data).hexdigest()[:32] + '"'
        headers = {"ETag": tag, "Cache-Control": "no-cache", "X-Content-Type-Options": "nosniff"}
        if request.headers.get("if-none-match") == tag:
            return Response(status_code=304, headers=headers)
        return Response(data, media_type=ASSET_TYPES[name], headers=headers)

    @app.get("/view/data/session", include_in_schema=False)
    def session(request: Request) -> dict[str, Any]:
        """Whether tokens are on, who the presented token belongs to, and what its role may do."""
        authenticator = services.authenticator
        caller, detail = None, None
        if authenticator.enabled:
            try:
                found = authenticator.check(ACCESS_RULES[("GET", "/models")], request.headers.get("authorization"))
                caller = {"name": found.name, "role": found.role}
            except ServiceProblem as problem:
                detail = problem.detail
        role = None if caller is None else caller["role"]
        may = {key: _admits(ACCESS_RULES[route], authenticator.enabled, role) for key, route in _PERMISSIONS.items()}
        return {"tokens": authenticator.enabled, "caller": caller, "detail": detail, "may": may}

    @app.get("/view/data/models", include_in_schema=False)
    def models_data(request: Request) -> dict[str, Any]:
        """GET /models, with each model's last switch (for callers who may read history) and its traffic."""
        history_allowed = _caller_admitted(services, request, ("GET", "/models/{model}/history"))
        traffic = services.metrics.traffic()
        models = []
        for name in store.models():
            record = store.active(name)
            counts = traffic.get(name, dict.fromkeys(TRAFFIC_KEYS, 0))
            records = counts["scored"] + counts["refused"]
            models.append({
                "model": name,
                "active": None if record is None else {"version": record.version, "activated_at": record.activated_at},
                "last_switch": _last_switch(store.history(name)) if history_allowed else None,
                "traffic": {"requests": counts["requests"], "records": {"scored": counts["scored"], "refused": counts["refused"]},
                            "refused_share": counts["refused"] / records if records else None,
                            "domain_verdicts": {verdict: counts[verdict] for verdict in ("typical", "unusual", "outside")}},
            })
        shown = {item["model"]: item["traffic"]["records"] for item in models if item["traffic"]["requests"]}
        return {"models": models, "charts": {"traffic": charts.traffic_chart(shown) if shown else None}}

    @app.get("/view/data/models/{model}/versions/{version}/card", include_in_schema=False)
    async def card_data(model: str, version: str) -> dict[str, Any]:
        """The model card of one published version (the same checks as loading it to serve)."""
        check_name(model, what="model name")
        check_name(version, what="model version")
        return await run_in_threadpool(store_card, store, model, version)

    @app.get("/view/data/models/{model}/timeline", include_in_schema=False)
    def timeline(model: str) -> dict[str, Any]:
        """GET /models/{model}/history, with which version was live when and its plot."""
        document = history_document(services, model)
        return {**document, "timeline": timeline_data(document["entries"], now=store.now())}

    @app.post("/view/data/models/{model}/try", include_in_schema=False)
    async def try_records(model: str, request: Request) -> Response:
        """Score records with the active version, as POST /score/{model} does (the operators' outside-domain
        choice included), answering 200 with the results in the record form."""
        body = await read_body(request, limit)

        def run() -> Response:
            loaded = active_model(services, model)
            records = read_request(parse_json(body), services.settings.max_records)
            batch = score_records(loaded, records, services.registry.outside_action(loaded.name), record_answer=True)
            document = {"model": loaded.name, "version": loaded.version, "bundle_sha256": loaded.digest,
                        "results": batch.results}
            content = json.dumps(document, ensure_ascii=False, allow_nan=False, separators=(",", ":"))
            return Response(content, media_type="application/json", headers=version_headers(loaded))

        return await run_in_threadpool(run)

    @app.post("/view/data/models/{model}/preview", include_in_schema=False)
    async def preview_data(model: str, request: Request) -> dict[str, Any]:
        """POST /models/{model}/preview's answer, and the plot of its change distribution."""
        version = preview_body(await read_body(request, limit))
        document = await run_in_threadpool(preview_document, services, model, version)
        distribution = document["report"].get("change_distribution")
        return {"preview": document,
                "charts": {"changes": charts.change_distribution_chart(distribution) if distribution else None}}


def _page(kind: str, **names: str) -> Response:
    return Response(page_html(kind, **names), media_type="text/html; charset=utf-8",
                    headers={**PAGE_SECURITY_HEADERS, "Cache-Control": "no-store"})


def _admits(rule: AccessRule, tokens_on: bool, role: str | None) -> bool:
    if rule.public:
        return True
    if not tokens_on:
        return rule.open_without_tokens
    return role is not None and role in rule.roles


def _caller_admitted(services: Services, request: Request, route: tuple[str, str]) -> bool:
    try:
        services.authenticator.check(ACCESS_RULES[route], request.headers.get("authorization"))
    except ServiceProblem:
        return False
    return True


def _last_switch(entries: list[dict[str, Any]]) -> dict[str, Any] | None:
    for entry in reversed(entries):
        if entry["action"] in ("activate", "rollback"):
            return {key: entry.get(key) for key in ("time", "action", "version", "actor", "reason", "via")}
    return None
