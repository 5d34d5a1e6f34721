"""The JSON Schema (draft 2020-12) of one record a bundle accepts.

Each feature is a required property of type ``number`` with ``minimum`` and
``maximum`` set to its allowed range (both inclusive, as in the refusal
policy), and the optional record ``id``; ``additionalProperties: false``
mirrors the refusal of unknown features. JSON Schema's ``number`` excludes
booleans and strings, and JSON has no NaN or Infinity, so a record is valid
under this schema exactly when the range rules accept it. The members are the
per-model OpenAPI document's ``Record`` (``model_store.api_document``). A valid
record can still be refused as ``outside_domain`` by the bundle's domain model
(a combination of values unlike the reference rows), which no per-property
schema can express: the annotation ``x-rbfgate-domain`` (an unknown keyword,
which JSON Schema 2020-12 section 6.5 collects as an annotation) states the
domain model's thresholds.
"""

from __future__ import annotations

from typing import Any

from model_store.api_document import record_id_schema, record_properties
from model_store.manifest import Manifest

__all__ = ["DIALECT", "record_schema"]

DIALECT = "https://json-schema.org/draft/2020-12/schema"


def record_schema(manifest: Manifest, digest: str) -> dict[str, Any]:
    """The schema of one record for ``manifest`` (whose bundle digest is ``digest``)."""
    return {
        "$schema": DIALECT,
        "title": f"one record for {manifest.name} {manifest.version}",
        "description": (
            f"bundle sha256 {digest}; send records as {{\"records\": [record, ...]}} to "
            f"POST /score/{manifest.name}/versions/{manifest.version}"
        ),
        "type": "object",
        "properties": record_properties(manifest, record_id_schema()),
        "required": manifest.feature_names,
        "additionalProperties": False,
        "x-rbfgate-domain": _domain_annotation(manifest),
    }


def _domain_annotation(manifest: Manifest) -> dict[str, Any] | None:
    domain = manifest.domain
    if domain is None:
        return None
    return {
        "model": "one-class SVM over the reference rows in the model's scaled space"
                 + (", whitened by the reference rows' Ledoit-Wolf covariance" if domain.space == "whitened" else ""),
        "verdicts": "typical when score >= unusual_below, unusual when outside_below <= score < unusual_below, "
                    "outside (refused as outside_domain unless the model only flags) when score < outside_below",
        "unusual_below": domain.thresholds.unusual_below,
        "outside_below": domain.thresholds.outside_below,
    }
