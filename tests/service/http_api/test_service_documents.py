"""The OpenAPI documents: the service-wide one and one per model and version.

References: the OpenAPI 3.1.0 specification, whose schema openapi-spec-validator checks
(``OpenAPIV31SpecValidator``); OpenAPI 3.1.0 section 4.8.10 (operationId: unique, "tools and
libraries MAY use the operationId to uniquely identify an operation"); JSON Schema 2020-12
(schema objects in OpenAPI 3.1), checked with the ``jsonschema`` library against real answers.
Models: iris 1.0.0 (three string classes, sigmoid calibration), iris 2.0.0 (uncalibrated),
cancer 1.0.0 (two integer classes, uncalibrated); see conftest.py.
"""

from __future__ import annotations

import re
from pathlib import Path

import jsonschema
import pytest
from fastapi.routing import APIRoute
from openapi_spec_validator import validate
from openapi_spec_validator.validation import OpenAPIV31SpecValidator

from model_store.store import Store

from .cases import GOOD_RECORD

_SHORT_VERB = re.compile(r"^[a-z][A-Za-z]{2,23}$")  # camelCase, at most 24 characters


def _document(client, path):
    response = client.get(path)
    assert response.status_code == 200, response.text
    return response.json()


def _validator(document, component):
    """A JSON Schema validator for one component, resolving the document's other components."""
    return jsonschema.Draft202012Validator({"$ref": f"#/components/schemas/{component}",
                                            "components": document["components"]})


def _operation_ids(document):
    return [operation.get("operationId") for item in document["paths"].values() for operation in item.values()]


@pytest.mark.parametrize("path", [
    "/openapi.json", "/models/iris/openapi.json", "/models/iris/versions/2.0.0/openapi.json",
    "/models/cancer/openapi.json",
])
def test_every_document_is_valid_openapi_3_1(shared_client, path):
    validate(_document(shared_client, path), cls=OpenAPIV31SpecValidator)


@pytest.mark.parametrize("path", ["/openapi.json", "/models/iris/openapi.json"])
def test_every_operation_has_a_unique_short_operation_id(shared_client, path):
    ids = _operation_ids(_document(shared_client, path))
    assert all(operation_id and _SHORT_VERB.match(operation_id) for operation_id in ids), ids
    assert len(set(ids)) == len(ids)


def test_operation_ids_are_set_explicitly_not_derived_from_handler_names(shared_client):
    document = _document(shared_client, "/openapi.json")
    handlers = {route.name for route in shared_client.app.routes if isinstance(route, APIRoute)}
    ids = set(_operation_ids(document))
    assert not ids & handlers  # FastAPI would otherwise generate e.g. score_with_active_version_score__model__post
    assert {"score", "scoreVersion", "listModels", "activate", "getModelDocument"} <= ids


def test_the_service_document_lists_every_route(shared_client):
    document = _document(shared_client, "/openapi.json")
    documented = {(method.upper(), path) for path, item in document["paths"].items() for method in item}
    routes = {(method, route.path) for route in shared_client.app.routes for method in route.methods}
    pages = {(method, path) for method, path in routes if path == "/" or path.startswith("/view/")}
    assert documented == routes - pages  # the pages and their data routes are not API operations


def test_the_model_document_is_the_active_versions_document(shared_client):
    assert _document(shared_client, "/models/iris/openapi.json") == _document(
        shared_client, "/models/iris/versions/1.0.0/openapi.json")


def test_the_record_type_spells_out_each_feature(shared_client, service_models):
    record = _document(shared_client, "/models/iris/openapi.json")["components"]["schemas"]["Record"]
    features = service_models.iris1.bundle.manifest.features
    assert record["required"] == [feature.name for feature in features]
    assert record["additionalProperties"] is False
    for feature in features:
        prop = record["properties"][feature.name]
        assert (prop["type"], prop["minimum"], prop["maximum"]) == ("number", *feature.allowed)
        assert prop["description"]
    assert "id" in record["properties"] and "id" not in record["required"]


def test_the_label_is_an_enum_of_the_classes_with_their_json_type(shared_client, service_models):
    iris = _document(shared_client, "/models/iris/openapi.json")["components"]["schemas"]["Label"]
    cancer = _document(shared_client, "/models/cancer/openapi.json")["components"]["schemas"]["Label"]
    assert (iris["type"], iris["enum"]) == ("string", list(service_models.iris1.bundle.classes))
    assert (cancer["type"], cancer["enum"]) == ("integer", [0, 1])


def test_probability_has_one_property_per_class_only_when_calibrated(shared_client):
    calibrated = _document(shared_client, "/models/iris/versions/1.0.0/openapi.json")["components"]["schemas"]
    plain = _document(shared_client, "/models/iris/versions/2.0.0/openapi.json")["components"]["schemas"]
    assert calibrated["Probability"]["required"] == ["setosa", "versicolor", "virginica"]
    assert calibrated["ScoredResult"]["properties"]["probability"] == {"$ref": "#/components/schemas/Probability"}
    assert "Probability" not in plain
    assert plain["ScoredResult"]["properties"]["probability"]["type"] == "null"


@pytest.mark.parametrize("model", ["iris", "cancer"])
def test_a_real_partly_refused_answer_matches_the_documented_200_body(shared_client, service_models, model):
    published = service_models.iris1 if model == "iris" else service_models.cancer1
    good = published.records(published.X[:2])
    bad = {**good[0], published.bundle.feature_names[0]: 1e9, "id": "far"}
    response = shared_client.post(f"/score/{model}", json={"records": [good[0], {**good[1], "id": 7}, bad]})
    assert response.status_code == 200
    _validator(_document(shared_client, f"/models/{model}/openapi.json"), "ScoreResponse").validate(response.json())


def test_a_real_all_refused_answer_matches_the_documented_422_body(shared_client):
    response = shared_client.post("/score/iris", json={"records": [{**GOOD_RECORD, "sepal_length_cm": 99.0, "id": "a"}]})
    assert response.status_code == 422
    document = _document(shared_client, "/models/iris/openapi.json")
    _validator(document, "RecordsRefused").validate(response.json())
    assert response.json()["type"] == document["components"]["schemas"]["RecordsRefused"]["properties"]["type"]["const"]


def test_a_model_without_an_active_version_has_only_version_documents(make_client, tmp_path, service_models):
    store = Store(tmp_path / "store", create=True)
    store.publish(Path(service_models.cancer1.bundle.source), actor="test")
    client = make_client(store.root)
    response = client.get("/models/cancer/openapi.json")
    assert response.status_code == 404
    assert "no active version" in response.json()["detail"]
    assert client.get("/models/cancer/versions/1.0.0/openapi.json").status_code == 200


def test_the_record_id_has_the_same_limits_in_the_model_document_and_the_record_schema(shared_client):
    document = _document(shared_client, "/models/iris/openapi.json")["components"]["schemas"]["RecordId"]
    schema = _document(shared_client, "/models/iris/versions/1.0.0/schema")["properties"]["id"]
    assert document == schema
    text, integer = document["anyOf"]
    assert (integer["minimum"], integer["maximum"]) == (-(2**53 - 1), 2**53 - 1)  # RFC 8259 section 6
    assert not jsonschema.Draft202012Validator(text).is_valid("P\u00850001")  # NEL: Unicode category Cc
