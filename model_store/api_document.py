"""The OpenAPI 3.1 document for scoring one bundle: what a backend team generates a client from.

    document = api_document(bundle.manifest, bundle.digest)      # a JSON-safe dict

Served at ``GET /models/{model}/openapi.json`` (the active version) and
``GET /models/{model}/versions/{version}/openapi.json``, and written offline by
``rbfgate inspect BUNDLE --openapi``: the same function, so the three are the same document
for one version. Unlike the service-wide document, the types here are this bundle's own:

- ``Record``: one property per feature (``type: number``, inclusive ``minimum``/``maximum``
  as the refusal policy applies them, the unit as ``x-unit`` and in the description), the
  optional ``id`` and ``additionalProperties: false``;
- ``ScoredResult``: the label as an enum of the classes, ``decision`` (a number for a binary
  model, one property per class otherwise), ``probability`` (one property per class when
  calibrated, ``null`` otherwise), the nearest-support diagnostics and the ``domain`` verdict
  (``Domain``, with this version's thresholds as ``x-thresholds``; ``null`` for a bundle without
  a domain model);
- ``RefusedResult`` and ``RecordsRefused``, the 422 body when every record was refused;
- the column form of the body and the answer (``ScoreColumnsRequest``, ``ScoreColumnsResponse``):
  the same types a column at a time, derived from these in ``model_store.api_columns``. The
  request body is ``oneOf`` the two forms, and so is the 200 answer (it takes the body's form).

The result's members are built from one description, ``RESULT_FIELDS``: a new member of
every scored result (say a domain verdict) is one more ``ResultField`` there (and its
component in ``_components`` if it needs one). OpenAPI 3.1 schema objects are JSON Schema
2020-12 (OpenAPI 3.1.0, section 4.8.24); ``x-`` members are specification extensions
(section 4.9).
"""

from __future__ import annotations

import re
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

from model_store.api_columns import column_schemas
from model_store.manifest import Manifest
from model_store.record_ids import ID_CONTROL_RANGES, MAX_ID_INTEGER, MAX_ID_LENGTH, RECORD_ID
from model_store.refusal import REASONS

__all__ = [
    "DEFAULT_MAX_RECORDS",
    "OPENAPI_VERSION",
    "PROBLEM_MEDIA_TYPE",
    "RESULT_FIELDS",
    "ResultField",
    "api_document",
    "problem_type_uri",
    "record_id_schema",
    "record_properties",
]

OPENAPI_VERSION = "3.1.0"
DEFAULT_MAX_RECORDS = 1000  # rbfgate serve --max-records default
PROBLEM_MEDIA_TYPE = "application/problem+json"  # RFC 9457 section 3
_JSON = "application/json"
_SCHEMAS = "#/components/schemas/"
_PROBLEM_BASE = "/problems/"


def problem_type_uri(kind: str) -> str:
    """The ``type`` of rbfgate's own problem details: a relative reference the service resolves."""
    return f"{_PROBLEM_BASE}{kind}"


def _ref(name: str) -> dict[str, str]:
    return {"$ref": _SCHEMAS + name}


@dataclass(frozen=True)
class ResultField:
    """One member of a scored result: its name, whether it is always there, and its schema for a manifest."""

    name: str
    required: bool
    schema: Callable[[Manifest], dict[str, Any]]


def _label_schema(manifest: Manifest) -> dict[str, Any]:
    classes = list(manifest.classifier.classes)
    kind = "integer" if isinstance(classes[0], int) else "string"
    return {"type": kind, "enum": classes, "description": "the predicted class"}


def _decision_schema(manifest: Manifest) -> dict[str, Any]:
    classes = manifest.classifier.classes
    if len(classes) == 2:
        return {"type": "number", "description": f"scikit-learn's decision_function; positive means {classes[1]!r}"}
    return _ref("Decision")


def _probability_schema(manifest: Manifest) -> dict[str, Any]:
    if manifest.is_calibrated:
        return _ref("Probability")
    return {"type": "null", "description": "this version is not calibrated, so it gives no probabilities"}


RESULT_FIELDS: tuple[ResultField, ...] = (
    ResultField(RECORD_ID, False, lambda manifest: _ref("RecordId")),
    ResultField("status", True, lambda manifest: {"type": "string", "const": "scored"}),
    ResultField("label", True, lambda manifest: _ref("Label")),
    ResultField("decision", True, _decision_schema),
    ResultField("probability", True, _probability_schema),
    ResultField("nearest_support", True, lambda manifest: _ref("NearestSupport")),
    ResultField("domain", True, lambda manifest: _domain_schema(manifest)),
)


def _domain_schema(manifest: Manifest) -> dict[str, Any]:
    if manifest.domain is None:
        return {"type": "null", "description": "this version has no domain model (bundle format 1)"}
    return _ref("Domain")


def api_document(manifest: Manifest, digest: str, *, max_records: int = DEFAULT_MAX_RECORDS) -> dict[str, Any]:
    """The OpenAPI 3.1 document for scoring the bundle of ``manifest`` (whose digest is ``digest``)."""
    name, version = manifest.name, manifest.version
    return {
        "openapi": OPENAPI_VERSION,
        "info": {
            "title": f"rbfgate {name} {version}",
            "version": version,
            "description": (
                f"Scoring {name} {version} (bundle sha256 {digest}). Every answer carries X-Request-ID "
                "(yours when you send a valid one: printable ASCII, at most 128 characters); errors are "
                "RFC 9457 problem details whose type resolves to a page on the service."
            ),
        },
        "paths": {
            f"/score/{name}": {"post": _score_operation(
                "score",
                f"Score records with the active version of {name}. The types here are those of {version}; "
                f"GET /models/{name}/openapi.json always describes the active version.",
            )},
            f"/score/{name}/versions/{version}": {"post": _score_operation(
                "scoreVersion", f"Score records with {name} {version}, active or not.",
            )},
        },
        "components": {
            "schemas": _components(manifest, digest, max_records),
            "headers": _headers(),
            "securitySchemes": {"bearer": {"type": "http", "scheme": "bearer",
                                           "description": "a token from `rbfgate token add`, when the service uses tokens"}},
        },
        # RFC 6750 bearer token when the service runs with a tokens file; open otherwise.
        "security": [{}, {"bearer": []}],
    }


def _score_operation(operation_id: str, summary: str) -> dict[str, Any]:
    problem = {PROBLEM_MEDIA_TYPE: {"schema": _ref("Problem")}}
    request_id = {"X-Request-ID": {"$ref": "#/components/headers/RequestId"}}
    versioned = {
        **request_id,
        "Rbfgate-Version": {"$ref": "#/components/headers/Version"},
        "Rbfgate-Bundle-Sha256": {"$ref": "#/components/headers/BundleSha256"},
    }
    errors = {
        "400": "the body is not acceptable JSON",
        "401": "missing or unknown token",
        "403": "the token's role does not allow scoring",
        "404": "no such model or version",
        "408": "the request did not arrive completely in time",
        "409": "the stored bundle failed a check",
        "413": "the body or the number of records (rows) is over the limit",
        "503": "the store is busy, the model cannot be served yet, or the worker's scoring queue is full "
               "(Retry-After)",
    }
    responses: dict[str, Any] = {
        "200": {"description": "at least one record scored; results in request order, in the body's form",
                "headers": versioned,
                "content": {_JSON: {"schema": {"oneOf": [_ref("ScoreResponse"), _ref("ScoreColumnsResponse")]}}}},
        "422": {"description": "every record was refused (RecordsRefused, whichever form the body took), or the "
                               "body has the wrong shape (Problem)",
                "headers": request_id,
                "content": {PROBLEM_MEDIA_TYPE: {"schema": {"anyOf": [_ref("RecordsRefused"), _ref("Problem")]}}}},
    }
    for status, description in errors.items():
        responses[status] = {"description": description, "headers": request_id, "content": problem}
    return {
        "operationId": operation_id,
        "summary": summary,
        "requestBody": {"required": True, "content": {_JSON: {"schema": {
            "oneOf": [_ref("ScoreRequest"), _ref("ScoreColumnsRequest")]}}}},
        "responses": dict(sorted(responses.items())),
    }


def _headers() -> dict[str, Any]:
    return {
        "RequestId": {"required": True, "description": "your X-Request-ID when valid, else one the service made",
                      "schema": {"type": "string", "minLength": 1, "maxLength": 128}},
        "Version": {"required": True, "description": "the version that answered", "schema": {"type": "string"}},
        "BundleSha256": {"required": True, "description": "its bundle digest",
                         "schema": {"type": "string", "pattern": "^[0-9a-f]{64}$"}},
    }


def _components(manifest: Manifest, digest: str, max_records: int) -> dict[str, Any]:
    classes = [str(label) for label in manifest.classifier.classes]
    schemas: dict[str, Any] = {
        "Label": _label_schema(manifest),
        "RefusalReason": {"type": "string", "enum": list(REASONS), "description": "why a record was refused"},
        "RecordId": record_id_schema(),
        "Record": _record_schema(manifest),
        "ScoreRequest": {
            "type": "object",
            "properties": {"records": {"type": "array", "items": _ref("Record"), "minItems": 1, "maxItems": max_records}},
            "required": ["records"],
            "additionalProperties": False,
        },
        "ScoredResult": _object({field.name: field.schema(manifest) for field in RESULT_FIELDS},
                                [field.name for field in RESULT_FIELDS if field.required]),
        "RefusedResult": _object({
            RECORD_ID: _ref("RecordId"),
            "status": {"type": "string", "const": "refused"},
            "problem_count": {"type": "integer", "minimum": 1},
            "problems": {"anyOf": [{"type": "array", "items": _ref("RecordProblem"), "minItems": 1}, {"type": "null"}],
                         "description": "every problem of the record, or null past the answer's detail budget "
                                        "(then the record's problems are in refusals)"},
            "domain": {**_domain_schema(manifest),
                       "description": "present when the record was refused as outside_domain"},
        }, ["status", "problem_count", "problems"]),
        "RefusalGroup": _object({
            "feature": {"anyOf": [{"type": "string"}, {"type": "null"}],
                        "description": "null: a record-level reason (outside_domain), or unknown features past the first 32 distinct names"},
            "reason": _ref("RefusalReason"),
            "allowed": _problem_members()["allowed"],
            "count": {"type": "integer", "minimum": 1},
            "records": {"type": "array", "minItems": 1, "description": "runs [first, last] of record indices",
                        "items": {"type": "array", "items": {"type": "integer", "minimum": 0},
                                  "minItems": 2, "maxItems": 2}},
        }, ["feature", "reason", "allowed", "count", "records"]),
        "RecordProblem": _object(_problem_members(), ["feature", "value", "reason", "allowed"]),
        "NearestSupport": _object({
            "distance": {"type": "number", "minimum": 0, "description": "Euclidean distance in the scaled space"},
            "similarity": {"type": "number", "minimum": 0, "maximum": 1, "description": "exp(-gamma distance^2)"},
            "label": {**_ref("Label"), "description": "the class of the nearest support vector"},
            "index": {"type": "integer", "minimum": 0, "maximum": sum(manifest.classifier.support_per_class) - 1},
            "percentile": {"type": "number", "minimum": 0, "maximum": 100,
                           "description": "of the distance among the reference rows; near 100 is far from the data"},
        }, ["distance", "similarity", "label", "index", "percentile"]),
        "ScoreResponse": _object({
            "model": {"type": "string", "const": manifest.name},
            "version": {"type": "string", "description": "the version that answered"},
            "bundle_sha256": {"type": "string", "pattern": "^[0-9a-f]{64}$"},
            "refusals": {"type": "array", "items": _ref("RefusalGroup"),
                         "description": "present when a record was refused: each distinct problem once"},
            "summarised": {"type": "boolean", "description": "present with refusals: some problems are null"},
            "results": {"type": "array", "items": _result_union()},
        }, ["model", "version", "bundle_sha256", "results"]),
        "RecordsRefused": {
            "type": "object",
            "description": "RFC 9457 problem details of a request whose every record was refused",
            "properties": {
                "type": {"type": "string", "const": problem_type_uri("records-refused")},
                "title": {"type": "string"},
                "status": {"type": "integer", "const": 422},
                "detail": {"type": "string"},
                "model": {"type": "string", "const": manifest.name},
                "version": {"type": "string"},
                "bundle_sha256": {"type": "string", "pattern": "^[0-9a-f]{64}$"},
                "refusals": {"type": "array", "items": _ref("RefusalGroup"), "minItems": 1},
                "summarised": {"type": "boolean"},
                "results": {"type": "array", "items": _ref("RefusedResult")},
                "problems": {"type": "array", "items": _ref("FlatRecordProblem"),
                             "description": "the problems given in full, each with its record index"},
            },
            "required": ["type", "title", "status", "detail", "model", "version", "bundle_sha256", "refusals",
                         "summarised", "results", "problems"],
        },
        "FlatRecordProblem": _object(
            {"record": {"type": "integer", "minimum": 0, "description": "index of the record in the request"},
             RECORD_ID: _ref("RecordId"), **_problem_members()},
            ["record", "feature", "value", "reason", "allowed"],
        ),
        "Problem": {
            "type": "object",
            "description": "RFC 9457 problem details; extension members vary by problem type",
            "properties": {
                "type": {"type": "string", "format": "uri-reference"},
                "title": {"type": "string"},
                "status": {"type": "integer"},
                "detail": {"type": "string"},
            },
            "required": ["type", "title", "status", "detail"],
        },
    }
    if manifest.domain is not None:
        thresholds = manifest.domain.thresholds
        schemas["Domain"] = {
            **_object({
                "verdict": {"type": "string", "enum": ["typical", "unusual", "outside"],
                            "description": "typical when score >= unusual_below, unusual when outside_below <= "
                                           "score < unusual_below, outside below outside_below (refused as "
                                           "outside_domain unless the model only flags)"},
                "score": {"type": "number", "description": "one-class SVM decision over the reference rows; "
                                                           "larger is more typical"},
            }, ["verdict", "score"]),
            "x-thresholds": {"unusual_below": thresholds.unusual_below, "outside_below": thresholds.outside_below},
        }
    if len(classes) > 2:
        schemas["Decision"] = _per_class(classes, {"type": "number"}, "ovr-shaped decision_function, per class")
    if manifest.is_calibrated:
        schemas["Probability"] = _per_class(
            classes, {"type": "number", "minimum": 0, "maximum": 1},
            f"calibrated probability per class ({manifest.calibration.method}); they sum to 1",
        )
    schemas["ScoreRequest"]["description"] = f"1 to {max_records} records for bundle sha256 {digest}"
    schemas.update(column_schemas(schemas, manifest, digest, max_records))
    return schemas


def record_id_schema() -> dict[str, Any]:
    """JSON Schema 2020-12 of a record's ``id``, exactly as ``model_store.record_ids`` accepts it.

    The control characters are refused with ``not`` + ``pattern`` (valid when no character of the
    class occurs anywhere; JSON Schema 2020-12 validation section 6.3.3 and core 10.2.1.4) rather
    than an anchored ``^...$``, whose ``$`` some regex engines also match before a final newline.
    """
    controls = "".join(f"\\u{low:04x}-\\u{high:04x}" for low, high in ID_CONTROL_RANGES)
    return {
        "description": f"your id for the record, echoed on its result; a string of 1 to {MAX_ID_LENGTH} "
                       "characters without control characters (Unicode category Cc), or an integer from "
                       f"-{MAX_ID_INTEGER} to {MAX_ID_INTEGER} (2^53 - 1, the integers every JSON parser keeps "
                       "exact, RFC 8259 section 6); not a feature",
        "anyOf": [{"type": "string", "minLength": 1, "maxLength": MAX_ID_LENGTH, "not": {"pattern": f"[{controls}]"}},
                  {"type": "integer", "minimum": -MAX_ID_INTEGER, "maximum": MAX_ID_INTEGER}],
    }


def record_properties(manifest: Manifest, record_id: dict[str, Any]) -> dict[str, Any]:
    """The members of one record: ``id`` (schema ``record_id``) and each feature as the refusal policy
    checks it (``type: number``, inclusive ``minimum``/``maximum``, unit in ``x-unit`` and the description).

    A feature named ``id`` (only in bundles exported before the name was reserved) stays a feature.
    """
    properties: dict[str, Any] = {RECORD_ID: record_id}
    for feature in manifest.features:
        low, high = feature.allowed
        text = feature.description or feature.name
        prop: dict[str, Any] = {"type": "number", "minimum": low, "maximum": high,
                                "description": f"{text} ({feature.unit})" if feature.unit else text}
        if feature.unit:
            prop["x-unit"] = feature.unit
        properties[feature.name] = prop
    return properties


def _record_schema(manifest: Manifest) -> dict[str, Any]:
    return {
        "type": "object",
        "description": "one record; a record outside these ranges, or with any other member, is refused",
        "properties": record_properties(manifest, _ref("RecordId")),
        "required": manifest.feature_names,
        "additionalProperties": False,
    }


def _problem_members() -> dict[str, Any]:
    return {
        "feature": {"type": ["string", "null"],
                    "description": "the feature (or \"id\") the problem is about; null for outside_domain"},
        "value": {"description": "the value sent (nested values and long text abbreviated)"},
        "reason": _ref("RefusalReason"),
        "allowed": {"anyOf": [{"type": "array", "items": {"type": "number"}, "minItems": 2, "maxItems": 2},
                              {"type": "null"}],
                    "description": "the allowed range [low, high], inclusive"},
        "message": {"type": "string", "description": "invalid_id only: which rule the id breaks, with its limit"},
    }


def _result_union() -> dict[str, Any]:
    return {
        "oneOf": [_ref("ScoredResult"), _ref("RefusedResult")],
        "discriminator": {"propertyName": "status",
                          "mapping": {"scored": _SCHEMAS + "ScoredResult", "refused": _SCHEMAS + "RefusedResult"}},
    }


def _per_class(classes: list[str], value: dict[str, Any], description: str) -> dict[str, Any]:
    """One property per class, or a map keyed by the classes when they do not make distinct names.

    Client generators make an attribute name of each property by dropping everything but letters and
    digits and folding case (common practice; openapi-python-client turns both ``-1`` and ``1`` into
    ``field_1``), and a clash makes them drop the type and every type that uses it. Labels such as
    -1 and 1 therefore get an object whose keys are exactly the classes: ``propertyNames`` with
    ``minProperties`` = ``maxProperties`` = the number of classes (JSON Schema 2020-12, sections
    10.3.2.4 and 6.5), which validates the same answers.
    """
    if _distinct_names(classes):
        return {**_object({label: dict(value) for label in classes}, classes), "description": description}
    return {
        "type": "object",
        "description": f"{description}; keyed by class label (the labels do not make distinct attribute names)",
        "propertyNames": {"enum": list(classes)},
        "additionalProperties": dict(value),
        "minProperties": len(classes),
        "maxProperties": len(classes),
    }


def _distinct_names(labels: list[str]) -> bool:
    folded = [re.sub(r"[^0-9a-z]", "", label.casefold()) for label in labels]
    return all(folded) and len(set(folded)) == len(folded)


def _object(properties: dict[str, Any], required: list[str]) -> dict[str, Any]:
    return {"type": "object", "properties": properties, "required": required, "additionalProperties": False}
