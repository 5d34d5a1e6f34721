"""Routes that change or preview the active version (role ``operate``).

    POST /models/{model}/activate   {"version": "...", "reason": "...", "accept_breaking": false}
    POST /models/{model}/rollback   {"reason": "..."}
    POST /models/{model}/preview    {"version": "..."}
    POST /models/{model}/outside-domain  {"action": "refuse" | "flag", "reason": "..."}

Activation and rollback go through the store (the same checks and the same
history as the CLI, with the token's name as the actor and ``via: http``) and answer only after
this worker has switched, so the caller's next request here is served by the
new version. Other workers and replicas follow within one poll interval.
Activation compares the contracts of the active version and the candidate on
this worker's recently scored records (without any, narrowed ranges are judged on the active
version's training range; ``range_basis`` in the answer says which) and refuses (409,
``breaking-changes``) a candidate that would break callers unless ``accept_breaking`` is true.
"""

from __future__ import annotations

from typing import Any, Literal

from fastapi import FastAPI, Request
from pydantic import BaseModel, ConfigDict, Field, StrictBool, StrictStr, ValidationError
from starlette.concurrency import run_in_threadpool

from model_store.naming import check_name
from model_store.store.preview import preview
from model_store.store.state import stack_before
from service.body import parse_json, read_body
from service.context import Services
from service.problems import ServiceProblem, validation_problem

__all__ = ["add_operation_routes", "preview_body", "preview_document"]

_MAX_REASON = 1000


class _ActivateBody(BaseModel):
    model_config = ConfigDict(extra="forbid")
    version: StrictStr = Field(min_length=1, max_length=64)
    reason: StrictStr = Field(min_length=1, max_length=_MAX_REASON)
    accept_breaking: StrictBool = False


class _RollbackBody(BaseModel):
    model_config = ConfigDict(extra="forbid")
    reason: StrictStr = Field(min_length=1, max_length=_MAX_REASON)


class _OutsideBody(BaseModel):
    model_config = ConfigDict(extra="forbid")
    action: Literal["refuse", "flag"]
    reason: StrictStr = Field(min_length=1, max_length=_MAX_REASON)


class _PreviewBody(BaseModel):
    model_config = ConfigDict(extra="forbid")
    version: StrictStr = Field(min_length=1, max_length=64)


def add_operation_routes(app: FastAPI, services: Services) -> None:
    """Add these routes to ``app`` (directly, so every route is a plain APIRoute with its path template)."""
    limit = services.settings.max_body_bytes

    @app.post("/models/{model}/activate")
    async def activate_version(model: str, request: Request) -> dict[str, Any]:
        """Make a published version active (checked by the store), then switch this worker."""
        body = _validated(_ActivateBody, await read_body(request, limit))
        actor = _actor(request)

        def run() -> dict[str, Any]:
            check_name(model, what="model name")
            verified: list = []
            compared: list = []
            entry = services.store.activate(model, body.version, reason=body.reason, actor=actor, via="http",
                                            accept_breaking=body.accept_breaking, recent=services.recent.records(model),
                                            on_verified=verified.append, on_compared=compared.append)
            # This worker's sample is empty after a restart: say what narrowed ranges were judged on.
            return {**_switched(services, model, entry, verified),
                    "range_basis": compared[0].range_basis if compared else None}

        return await run_in_threadpool(run)

    @app.post("/models/{model}/rollback")
    async def roll_back(model: str, request: Request) -> dict[str, Any]:
        """Re-activate the version that was active before the current one."""
        body = _validated(_RollbackBody, await read_body(request, limit))
        actor = _actor(request)

        def run() -> dict[str, Any]:
            check_name(model, what="model name")
            verified: list = []
            entry = services.store.rollback(model, reason=body.reason, actor=actor, via="http",
                                            on_verified=verified.append)
            undone = stack_before(services.store.history(model), entry["seq"])[-1]
            # Which step it walked back: the activation it undid (see model_store.store.state).
            return {**_switched(services, model, entry, verified),
                    "undid": {"version": undone.version, "bundle_sha256": undone.digest, "activated_at_seq": undone.seq}}

        return await run_in_threadpool(run)

    @app.post("/models/{model}/outside-domain")
    async def choose_outside_domain(model: str, request: Request) -> dict[str, Any]:
        """Refuse records outside the model's domain, or answer them flagged; recorded in the history."""
        body = _validated(_OutsideBody, await read_body(request, limit))
        actor = _actor(request)

        def run() -> dict[str, Any]:
            check_name(model, what="model name")
            entry = services.store.set_outside_action(model, body.action, reason=body.reason, actor=actor, via="http")
            services.registry.refresh(model, force=True)  # this worker applies it to the next request
            return {"model": model, "outside_domain": body.action, "entry": entry}

        return await run_in_threadpool(run)

    @app.post("/models/{model}/preview")
    async def preview_swap(model: str, request: Request) -> dict[str, Any]:
        """Compare a candidate with the active version on golden vectors and recently scored records."""
        version = preview_body(await read_body(request, limit))
        return await run_in_threadpool(preview_document, services, model, version)


def preview_body(body: bytes) -> str:
    """The candidate version named by a preview request body ``{"version": "..."}`` (422 otherwise)."""
    return _validated(_PreviewBody, body).version


def preview_document(services: Services, model: str, version: str) -> dict[str, Any]:
    """The preview route's answer (also drawn by the preview page): ``version`` against the active
    version on the golden vectors and this worker's recently scored records."""
    check_name(model, what="model name")
    records = services.recent.records(model)
    report = preview(services.store, model, version, records or None)
    return {"model": model, "candidate": version, "recent_records": len(records), "report": report.to_dict()}


def _validated(model: type[BaseModel], body: bytes):
    document = parse_json(body)
    if not isinstance(document, dict):
        raise validation_problem([{"loc": (), "msg": "the body must be a JSON object"}])
    try:
        return model.model_validate(document)
    except ValidationError as exc:
        raise validation_problem(exc.errors()) from None


def _actor(request: Request) -> str:
    caller = getattr(request.state, "caller", None)
    if caller is None or caller.name is None:  # the access rules make this unreachable; stay closed anyway
        raise ServiceProblem(403, "tokens-required", "This route needs tokens", "no authenticated caller")
    return caller.name


def _switched(services: Services, model: str, entry: dict[str, Any], verified: list) -> dict[str, Any]:
    # The bundle the store verified for this change is served as it is: loading and verifying it a
    # second time doubled the time to answer, and kept the other workers' polls waiting for the pointer.
    registry = services.registry
    loaded = registry.adopt(model, verified[0]) if verified else registry.refresh(model, force=True)
    failure = registry.failure(model)
    return {
        "model": model,
        "entry": entry,
        "served_by_this_worker": None if loaded is None else {"version": loaded.version, "bundle_sha256": loaded.digest},
        "load_failure": None if failure is None else failure.to_dict(),
    }
