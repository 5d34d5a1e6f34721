"""The column form of the per-model OpenAPI document: the record form's types, a column at a time.

    {"columns": {feature: [value, ...], ...}, "ids": [id | null, ...]}           ScoreColumnsRequest
    {"model", "version", "bundle_sha256", ["refusals", "summarised"], ["ids"],
     "columns": {"status": [...], "label": [...], ...}, "refused": [...]}      ScoreColumnsResponse

Row i of the column form is scored as the record ``{name: columns[name][i], ...}`` with the id
``ids[i]``, so each schema here is derived from the record form's component that
``model_store.api_document`` built (``Record``, ``ScoredResult``, ``Decision``, ``Probability``,
``NearestSupport``, ``Domain``, ``RefusedResult``, ``ScoreResponse``) and the two forms cannot
disagree on a range, a label or a class. A value becomes an array of that value (``items``,
JSON Schema 2020-12 section 10.3.1.2); in the answer each entry may also be ``null`` (``anyOf``,
section 10.2.1.2), a refused row's. An object of values (one per class, or the nearest support's
members) becomes the same object with an array for each value: ``ColumnDecision``,
``ColumnProbability``, ``ColumnNearestSupport``, ``ColumnDomain``. A new member of
``api_document.RESULT_FIELDS`` gets its column here without a change.
"""

from __future__ import annotations

import copy
from typing import Any

from model_store.manifest import Manifest
from model_store.record_ids import RECORD_ID

__all__ = ["column_schemas"]

_SCHEMAS = "#/components/schemas/"
# Record-form components whose column form is a component of its own, named "Column" + the name.
_OBJECTS = ("Decision", "Probability", "NearestSupport", "Domain")
_NULL = {"type": "null"}


def _ref(name: str) -> dict[str, str]:
    return {"$ref": _SCHEMAS + name}


def column_schemas(schemas: dict[str, Any], manifest: Manifest, digest: str, max_records: int) -> dict[str, Any]:
    """The column form's components, from the record form's components ``schemas``."""
    # A bundle with a feature named "id" (exported before record ids) takes none: that column is the feature.
    with_ids = RECORD_ID not in manifest.feature_names
    record = schemas["Record"]
    row_ids = {"type": "array", "items": {"anyOf": [_ref("RecordId"), _NULL]}}
    request: dict[str, Any] = {"columns": _ref("Columns")}
    if with_ids:
        request["ids"] = {**row_ids, "minItems": 1, "maxItems": max_records,
                          "description": "one per row: its record id, or null for none"}
    response = {name: copy.deepcopy(schemas["ScoreResponse"]["properties"][name])
                for name in ("model", "version", "bundle_sha256", "refusals", "summarised")}
    if with_ids:
        response["ids"] = {**row_ids, "description": "present when the request sent ids: each row's id; null when "
                                                     "it had none or it was refused (invalid_id)"}
    refused = schemas["RefusedResult"]["properties"]
    components = {
        "Columns": _object(
            {name: _column(record["properties"][name], nullable=False, rows=max_records)
             for name in record["required"]},
            list(record["required"]),
            "one array per feature, row i of each is record i's value; a row outside these ranges is refused, "
            "and every row when a column is not a feature",
        ),
        "ScoreColumnsRequest": _object(
            request, ["columns"],
            f"the column form: 1 to {max_records} rows for bundle sha256 {digest}, every array (and ids) "
            "the same length",
        ),
        "ColumnResults": _results(schemas["ScoredResult"]),
        "RefusedRow": _object({
            "row": {"type": "integer", "minimum": 0, "description": "index of the row in the request"},
            "problem_count": copy.deepcopy(refused["problem_count"]),
            "problems": {**copy.deepcopy(refused["problems"]),
                         "description": "every problem of the row, or null past the answer's detail budget "
                                        "(then the row's problems are in refusals)"},
        }, ["row", "problem_count", "problems"], "a refused row and its problems, as the record form's refused result"),
        "ScoreColumnsResponse": _object({
            **response,
            "columns": _ref("ColumnResults"),
            "refused": {"type": "array", "items": _ref("RefusedRow"),
                        "description": "the refused rows in row order; empty when none"},
        }, ["model", "version", "bundle_sha256", "columns", "refused"],
            "the answer to the column form: the record form's values, one array entry per row"),
    }
    for name in _OBJECTS:
        if name in schemas:
            components[f"Column{name}"] = _transposed(schemas[name])
    if "ColumnDomain" in components:
        components["ColumnDomain"]["description"] = ("null on a refused row, except one refused as outside_domain "
                                                     "(it has its verdict and score)")
    return components


def _results(scored: dict[str, Any]) -> dict[str, Any]:
    """``ColumnResults``: each member of a scored result (but its id, see ``ids``) as a column."""
    properties: dict[str, Any] = {}
    for name, schema in scored["properties"].items():
        if name == RECORD_ID:
            continue
        target = schema.get("$ref", "").removeprefix(_SCHEMAS)
        if name == "status":
            properties[name] = {"type": "array", "items": {"type": "string", "enum": ["scored", "refused"]}}
        elif target in _OBJECTS:
            properties[name] = _ref(f"Column{target}")
        elif schema.get("type") == "null":  # no such member in this version (no calibration, no domain model)
            properties[name] = copy.deepcopy(schema)
        else:
            properties[name] = _column(schema)
    return _object(properties, [name for name in scored["required"] if name in properties],
                   "one array per member of a scored result, one entry per row; null on a refused row")


def _transposed(schema: dict[str, Any]) -> dict[str, Any]:
    """An object of values as the same object of columns (fixed properties or a map)."""
    transposed = copy.deepcopy(schema)
    if "properties" in schema:
        transposed["properties"] = {name: _column(value) for name, value in schema["properties"].items()}
    if isinstance(schema.get("additionalProperties"), dict):
        transposed["additionalProperties"] = _column(schema["additionalProperties"])
    return transposed


def _column(value: dict[str, Any], *, nullable: bool = True, rows: int | None = None) -> dict[str, Any]:
    """An array of ``value`` (or null, when ``nullable``); its description and ``x-`` members move to the array,
    ``rows`` bounds its length to 1..rows."""
    outer = {key: item for key, item in value.items() if key == "description" or key.startswith("x-")}
    cell = {key: item for key, item in value.items() if key not in outer}
    column: dict[str, Any] = {"type": "array", "items": {"anyOf": [cell, dict(_NULL)]} if nullable else cell}
    if rows is not None:
        column.update(minItems=1, maxItems=rows)
    return {**column, **copy.deepcopy(outer)}


def _object(properties: dict[str, Any], required: list[str], description: str) -> dict[str, Any]:
    return {"type": "object", "description": description, "properties": properties, "required": required,
            "additionalProperties": False}
