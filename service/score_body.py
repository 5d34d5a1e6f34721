"""The two forms of a scoring body and their shape checks, before any record is looked at.

    record form   {"records": [{feature: number, ..., "id"?: str | int}, ...]}
    column form   {"columns": {feature: [value, ...], ...}, "ids"?: [id | null, ...]}

A record form body holds 1 to max_records objects. In the column form,
every array holds the same number of values n, one per row, 1 <= n <= max_records. Row i is the
record ``{name: columns[name][i], ...}`` plus ``"id": ids[i]`` when that id is not null, and is
checked and scored exactly as that record would be (``model_store.refusal.check_columns``): a
feature without a column is ``missing`` on every row, a column that is no feature is
``unknown_feature`` on every row. Sent this way, 1,000 rows of 10 features are one array per
feature instead of 1,000 objects that repeat every name: a smaller body, parsed and converted a
column at a time (tests/benchmarks measures both forms in one run).

Shape errors are 422 with a JSON Pointer (RFC 6901) to the member at fault (``""`` for the body
itself); too many records or rows is 413.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

from model_store.record_ids import RECORD_ID
from service.problems import ServiceProblem

__all__ = ["ColumnBody", "check_column_names", "read_request"]

_MEMBERS = frozenset({"columns", "ids"})
_ECHOED_NAME = 64  # characters of a member name put in a pointer or a detail


@dataclass(frozen=True)
class ColumnBody:
    """columns: name -> its n JSON values; ids: n ids (None where a row has none), or None."""

    columns: dict[str, list[Any]]
    ids: list[Any] | None
    n_rows: int

    def as_document(self) -> dict[str, Any]:
        """The body as it was sent (for ``--log-inputs``)."""
        return {"columns": self.columns} if self.ids is None else {"columns": self.columns, "ids": self.ids}


def read_request(document: Any, max_records: int) -> list[dict[str, Any]] | ColumnBody:
    """The records (record form) or the columns (column form) of a parsed body; 422 for a wrong
    shape, 413 for too many records."""
    if not isinstance(document, dict):
        raise _shape("", f"the body must be a JSON object {{\"records\": [...]}} or {{\"columns\": {{...}}}}, "
                          f"not {_kind(document)}")
    if "records" in document and "columns" in document:
        raise _shape("/columns", "a body holds either \"records\" or \"columns\", not both")
    if "columns" in document or "ids" in document:
        return _read_columns(document, max_records)
    unknown = sorted(set(document) - {"records"})
    if unknown:
        raise _member_shape("", unknown[0], "unknown member; the body holds \"records\" (or \"columns\")")
    if "records" not in document:
        raise _shape("/records", "missing; send {\"records\": [{feature: number, ...}]} "
                                 "or {\"columns\": {feature: [numbers]}}")
    records = document["records"]
    if not isinstance(records, list):
        raise _shape("/records", f"must be a list of records, not {_kind(records)}")
    if not records:
        raise _shape("/records", "is empty; send at least one record")
    if len(records) > max_records:
        raise _too_many(len(records), max_records, "records")
    for index, record in enumerate(records):
        if not isinstance(record, dict):
            raise _shape(f"/records/{index}", f"each record must be an object {{feature: number}}, not {_kind(record)}")
    return records


def _read_columns(document: Mapping[str, Any], max_records: int) -> ColumnBody:
    if "records" in document:
        raise _shape("/ids", "\"ids\" belong to the column form; in the record form each record carries its \"id\"")
    unknown = sorted(set(document) - _MEMBERS)
    if unknown:
        raise _member_shape("", unknown[0], "unknown member; a column-form body holds only \"columns\" and \"ids\"")
    if "columns" not in document:
        raise _shape("/columns", "missing; \"ids\" go beside {\"columns\": {feature: [values]}}")
    columns = document["columns"]
    if not isinstance(columns, dict):
        raise _shape("/columns", f"must be an object {{feature: [values]}}, not {_kind(columns)}")
    ids = document.get("ids")
    if "ids" in document and not isinstance(ids, list):
        raise _shape("/ids", f"must be a list with one id (or null) per row, not {_kind(ids)}")
    for name, cells in columns.items():
        if not isinstance(cells, list):
            raise _member_shape("/columns", name, f"must be a list with one value per row, not {_kind(cells)}")
    if ids is None and not columns:
        raise _shape("/columns", "holds no column; send {feature: [values]} with one list per feature")
    first, n_rows = ("ids", len(ids)) if ids is not None else next((name, len(cells)) for name, cells in columns.items())
    for name, cells in columns.items():
        if len(cells) != n_rows:
            raise _member_shape(
                "/columns", name,
                f"holds {len(cells)} values, but {_named(first)} holds {n_rows}; every column has one value per row")
    if n_rows == 0:
        raise _shape("/ids" if ids is not None else "/columns", "is empty; send at least one row")
    if n_rows > max_records:
        raise _too_many(n_rows, max_records, "rows")
    return ColumnBody(columns, ids, n_rows)


def check_column_names(feature_names: list[str], body: ColumnBody) -> None:
    """422 when the body's ids cannot mean what they say for this model (``RECORD_ID`` and the features)."""
    takes_ids = RECORD_ID not in feature_names
    if takes_ids and RECORD_ID in body.columns:
        raise _shape(f"/columns/{RECORD_ID}",
                     f"{RECORD_ID!r} is not a feature of this model; send record ids as \"ids\", beside \"columns\"")
    if not takes_ids and body.ids is not None:
        raise _shape(
            "/ids", f"this model's bundle has a feature named {RECORD_ID!r} (it predates record ids), so its rows "
            f"carry no ids; send that feature as the column {RECORD_ID!r} and leave out \"ids\"")


def _too_many(count: int, limit: int, what: str) -> ServiceProblem:
    return ServiceProblem(
        413,
        "too-many-records",
        "Too many records in one request",
        f"the request holds {count} {what}; the limit is {limit}; split it into smaller requests",
        extra={"limit_records": limit},
    )


def _shape(pointer: str, detail: str) -> ServiceProblem:
    """422 for the member at ``pointer`` (RFC 6901; "" is the whole body, section 5)."""
    return ServiceProblem(
        422,
        "invalid-request",
        "The request body is not what the route takes",
        f"{pointer or 'the body'}: {detail}",
        extra={"problems": [{"pointer": pointer, "detail": detail}]},
    )


def _kind(value: Any) -> str:
    if value is None:
        return "null"
    if isinstance(value, bool):
        return "a boolean"
    kinds = {dict: "an object", list: "a list", str: "a string", int: "a number", float: "a number"}
    return kinds.get(type(value), "a value")


def _member_shape(parent: str, name: str, detail: str) -> ServiceProblem:
    """A shape problem of the member ``name`` of the object at ``parent``. A name longer than
    ``_ECHOED_NAME`` is not echoed whole: the pointer is then the object's, and the detail names the
    member by its first characters."""
    if len(name) <= _ECHOED_NAME:
        return _shape(f"{parent}/{_escaped(name)}", detail)
    return _shape(parent, f"the member {name[:_ECHOED_NAME]!r}... ({len(name)} characters): {detail}")


def _named(member: str) -> str:
    return "\"ids\"" if member == "ids" else f"the column {member[:_ECHOED_NAME]!r}"


def _escaped(name: str) -> str:
    """A member name as a JSON Pointer reference token (RFC 6901 section 3: ~ is ~0, / is ~1)."""
    return name.replace("~", "~0").replace("/", "~1")
