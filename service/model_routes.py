"""Read-only routes for backend teams and auditors.

    GET /models                                      each model, its active and served version
    GET /models/{model}                              its published versions, which is active
    GET /models/{model}/versions/{version}           the manifest metadata an auditor needs
    GET /models/{model}/versions/{version}/schema    JSON Schema 2020-12 of one record
    GET /models/{model}/openapi.json                 OpenAPI 3.1 document for scoring the active version
    GET /models/{model}/versions/{version}/openapi.json   the same for one version
    GET /models/{model}/versions/{version}/bundle    the single-file bundle (deterministic tar)
    GET /models/{model}/history                      the hash-chained trail and its verification
    GET /models/{model}/history?at=TIME              the version live at an RFC 3339 time, from the verified trail

Metadata leaves out the golden vectors' inputs (they are reference rows,
often training data); the bundle download, which holds them, needs a token.
"""

from __future__ import annotations

import base64
import hashlib
import tempfile
from typing import Any

from fastapi import FastAPI, Request
from starlette.responses import JSONResponse, Response, StreamingResponse

from model_store.api_document import api_document
from model_store.archive import pack_members
from model_store.digest import canonical_json, sha256_bytes
from model_store.errors import HistoryError, NotFoundError
from model_store.manifest import Manifest
from model_store.naming import check_name
from model_store.store.timeline import parse_moment
from service.context import Services
from service.schema import record_schema

__all__ = ["add_model_routes", "history_document"]

_CHUNK = 1 << 16
_TAR = "application/x-tar"
_OCTETS = "application/octet-stream"
_SPOOL_BYTES = 16 * 1024 * 1024


def add_model_routes(app: FastAPI, services: Services) -> None:
    """Add these routes to ``app`` (directly, so every route is a plain APIRoute with its path template)."""
    store = services.store
    registry = services.registry

    @app.get("/models")
    def list_models() -> dict[str, Any]:
        """Every model in the store with its active version and the version this worker serves."""
        return {"models": [_model_summary(services, name) for name in store.models()]}

    @app.get("/models/{model}")
    def describe_model(model: str) -> dict[str, Any]:
        """A model's published versions, oldest first, and which one is active."""
        versions = _versions(services, model)
        return {
            **_model_summary(services, model),
            "outside_domain": store.outside_action(model),
            "versions": [
                {"version": info.version, "bundle_sha256": info.digest, "created": info.created,
                 "published_at": info.published_at, "active": info.active}
                for info in versions
            ],
        }

    @app.get("/models/{model}/versions/{version}")
    def describe_version(model: str, version: str) -> dict[str, Any]:
        """What an auditor needs to know about one published version."""
        info = _version_info(services, model, version)
        document, manifest, digest = _manifest(services, model, version)
        serving = registry.serving(model)
        signed = store.signature(model, version) is not None
        return {
            "model": model,
            "version": version,
            "bundle_sha256": digest,
            "published_at": info.published_at,
            "active": info.active,
            "served_by_this_worker": serving is not None and serving.version == version,
            "signed": signed,
            **_auditor_view(document, manifest),
            "links": {
                "schema": f"/models/{model}/versions/{version}/schema",
                "bundle": f"/models/{model}/versions/{version}/bundle",
                "score": f"/score/{model}/versions/{version}",
            },
        }

    @app.get("/models/{model}/versions/{version}/schema")
    def version_schema(model: str, version: str) -> Response:
        """JSON Schema (draft 2020-12) of one record this version accepts."""
        _, manifest, digest = _manifest(services, model, version)
        return JSONResponse(record_schema(manifest, digest), media_type="application/schema+json")

    @app.get("/models/{model}/openapi.json")
    def model_document(model: str) -> dict[str, Any]:
        """OpenAPI 3.1 document for scoring the model, typed by its active version's features and classes."""
        _versions(services, model)
        record = store.active(model)
        if record is None:
            raise NotFoundError(
                f"model {model!r} has no active version, so no document describes POST /score/{model}; "
                f"GET /models/{model}/versions/VERSION/openapi.json describes a published version"
            )
        return _document(services, model, record.version)

    @app.get("/models/{model}/versions/{version}/openapi.json")
    def version_document(model: str, version: str) -> dict[str, Any]:
        """OpenAPI 3.1 document for scoring one published version (what `rbfgate inspect --openapi` writes)."""
        _version_info(services, model, version)
        return _document(services, model, version)

    @app.get("/models/{model}/versions/{version}/bundle")
    def download_bundle(model: str, version: str, request: Request) -> Response:
        """The version's single-file bundle, verified before it is sent."""
        # Never hand out a bundle that fails its checks, and ship exactly the bytes that were checked.
        bundle, members = store.verified_members(model, version)
        spool = tempfile.SpooledTemporaryFile(max_size=_SPOOL_BYTES)
        pack_members(members, spool)
        size = spool.tell()
        spool.seek(0)
        tar_digest = hashlib.sha256()
        while block := spool.read(_CHUNK):
            tar_digest.update(block)
        spool.seek(0)
        headers = {
            "Content-Disposition": f'attachment; filename="{model}-{version}.tar"',
            "Content-Length": str(size),
            "Rbfgate-Bundle-Sha256": bundle.digest,
            # RFC 9530 section 3: the SHA-256 of the bytes sent, base64 in a structured-field byte sequence.
            "Repr-Digest": f"sha-256=:{base64.b64encode(tar_digest.digest()).decode('ascii')}:",
        }
        return StreamingResponse(_chunks(spool), media_type=_bundle_media_type(request), headers=headers)

    @app.get("/models/{model}/history")
    def model_history(model: str, at: str | None = None) -> dict[str, Any]:
        """Every entry, oldest first, with its verification; with ``at``, the version live at that time.

        The same document as ``rbfgate history NAME --verify --json`` (or ``--at TIME --json``).
        """
        if at is not None:
            _versions(services, model)
            return store.live_at(model, parse_moment(at)).to_dict()
        return history_document(services, model)


def history_document(services: Services, model: str) -> dict[str, Any]:
    """The history route's answer (also drawn by the timeline page): entries and their verification."""
    _versions(services, model)
    return services.store.history_document(model)


def _model_summary(services: Services, name: str) -> dict[str, Any]:
    try:
        record = services.store.active(name)
    except HistoryError:  # a pointer put there by hand: unexplained_pointer (from the registry) says so
        record = None
    serving = services.registry.serving(name)
    failure = services.registry.failure(name)
    return {
        "model": name,
        "active": None if record is None else {
            "version": record.version, "bundle_sha256": record.digest, "activated_at": record.activated_at,
        },
        "served_by_this_worker": None if serving is None else {"version": serving.version, "bundle_sha256": serving.digest},
        "load_failure": None if failure is None else failure.to_dict(),
        "unexplained_pointer": services.registry.unexplained(name),
        "folder_mismatch": services.registry.folder_mismatch(name),
    }


def _versions(services: Services, name: str):
    check_name(name, what="model name")
    versions = services.store.versions(name)
    if not versions:
        raise NotFoundError(f"no model named {name!r} in the store; GET /models lists the models")
    return versions


def _version_info(services: Services, name: str, version: str):
    check_name(version, what="model version")
    for info in _versions(services, name):
        if info.version == version:
            return info
    raise NotFoundError(f"model {name!r} has no published version {version!r}; GET /models/{name} lists them")


def _manifest(services: Services, name: str, version: str) -> tuple[dict[str, Any], Manifest, str]:
    """The raw manifest document, its parsed form and the bundle digest, read from the store."""
    loaded = services.registry.serving(name)
    if loaded is not None and loaded.version == version:
        return loaded.bundle.document, loaded.bundle.manifest, loaded.digest
    return services.store.manifest(name, version)


def _document(services: Services, name: str, version: str) -> dict[str, Any]:
    _, manifest, digest = _manifest(services, name, version)
    return api_document(manifest, digest, max_records=services.settings.max_records)


def _auditor_view(document: dict[str, Any], manifest: Manifest) -> dict[str, Any]:
    classifier = manifest.classifier
    return {
        "format": manifest.format,
        "created": manifest.created,
        "creator": manifest.creator,
        "features": [feature.model_dump() for feature in manifest.features],
        "scaler": {"kind": manifest.scaler.kind},
        "kernel": manifest.kernel.model_dump(),
        "classifier": {
            "estimator": classifier.estimator,
            "classes": list(classifier.classes),
            "support_vectors": sum(classifier.support_per_class),
            "support_per_class": list(classifier.support_per_class),
            "break_ties": classifier.break_ties,
            "decision_function_shape": classifier.decision_function_shape,
        },
        "calibration": {"method": manifest.calibration.method},
        "training": document.get("training"),
        "reference_distance": document.get("reference_distance"),
        "domain": None if manifest.domain is None else manifest.domain.model_dump(),
        "refusal_report": None if manifest.refusal_report is None else manifest.refusal_report.model_dump(),
        "golden": {
            "vectors": len(manifest.golden.inputs),
            "with_probabilities": manifest.golden.probabilities is not None,
        },
        "files": {name: entry.model_dump() for name, entry in manifest.files.items()},
    }


def _bundle_media_type(request: Request) -> str:
    """application/x-tar, or application/octet-stream for a client that asks only for that (RFC 9110
    section 12.5.1): generated clients know octet-stream as a file download, not x-tar."""
    accept = request.headers.get("accept", "")
    return _OCTETS if _OCTETS in accept and _TAR not in accept else _TAR


def _chunks(spool):
    try:
        while block := spool.read(_CHUNK):
            yield block
    finally:
        spool.close()
