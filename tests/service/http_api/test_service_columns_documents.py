"""The column form of the scoring body and answer in both OpenAPI documents.

Contract: /work/notes/columns_spec.md ("the columnar scoring body", fixed 2026-12-03): a body is
EITHER ``{"records": [...]}`` OR ``{"columns": {feature: [value, ...]}, "ids": [id | null, ...]}``,
and the 200 answer takes the body's form. References: OpenAPI 3.1.0 (schema objects are JSON
Schema 2020-12, section 4.8.24); JSON Schema 2020-12 core ``oneOf`` (10.2.1.3), ``anyOf``
(10.2.1.2), ``items`` (10.3.1.2), ``additionalProperties`` (10.3.2.3) and validation ``type``
(6.1.1), ``enum`` (6.1.2), ``minItems``/``maxItems`` (6.4.2/6.4.1), checked with the ``jsonschema``
library's Draft 2020-12 validator. The example bodies and answers are written by hand from the
contract; the tests marked "real" score through the service and need its column form.
Models: iris 1.0.0 (three string classes, sigmoid calibration), cancer 1.0.0 (two integer
classes, uncalibrated); see conftest.py.
"""

from __future__ import annotations

import jsonschema
import pytest

from model_store.api_document import api_document

from .cases import GOOD_RECORD

_JSON = "application/json"


def _document(client, path):
    response = client.get(path)
    assert response.status_code == 200, response.text
    return response.json()


def _validator(document, schema):
    """A Draft 2020-12 validator for ``schema`` (a component name or a schema), resolving the document's components."""
    if isinstance(schema, str):
        schema = {"$ref": f"#/components/schemas/{schema}"}
    return jsonschema.Draft202012Validator({**schema, "components": document["components"]})


def _body_schema(document, path):
    return document["paths"][path]["post"]["requestBody"]["content"][_JSON]["schema"]


def _answer_schema(document, path):
    return document["paths"][path]["post"]["responses"]["200"]["content"][_JSON]["schema"]


def _iris_columns(rows=2):
    return {name: [value] * rows for name, value in GOOD_RECORD.items()}


def _iris_answer(bundle):
    """A hand-written 200 answer to a three-row column body for iris 1.0.0 (row 1 refused), per the contract."""
    low, high = bundle.manifest.features[0].allowed
    return {
        "model": "iris", "version": "1.0.0", "bundle_sha256": bundle.digest,
        "refusals": [{"feature": "sepal_length_cm", "reason": "out_of_range", "allowed": [low, high], "count": 1,
                      "records": [[1, 1]]}],
        "summarised": False,
        "ids": ["a", None, 7],
        "columns": {
            "status": ["scored", "refused", "scored"],
            "label": ["setosa", None, "virginica"],
            "decision": {"setosa": [2.2, None, -0.3], "versicolor": [0.9, None, 1.1], "virginica": [-0.2, None, 2.3]},
            "probability": {"setosa": [0.97, None, 0.01], "versicolor": [0.02, None, 0.1],
                            "virginica": [0.01, None, 0.89]},
            "nearest_support": {"distance": [0.4, None, 1.2], "similarity": [0.85, None, 0.3],
                                "label": ["setosa", None, "virginica"], "index": [3, None, 30],
                                "percentile": [12.5, None, 60.0]},
            "domain": {"verdict": ["typical", None, "unusual"], "score": [0.5, None, 0.01]},
        },
        "refused": [{"row": 1, "problem_count": 1, "problems": [
            {"feature": "sepal_length_cm", "value": 99.0, "reason": "out_of_range", "allowed": [low, high]}]}],
    }


def _cancer_answer(bundle):
    """A hand-written 200 answer for cancer 1.0.0 (binary, integer labels, uncalibrated), nothing refused."""
    return {
        "model": "cancer", "version": "1.0.0", "bundle_sha256": bundle.digest,
        "columns": {
            "status": ["scored", "scored"],
            "label": [0, 1],
            "decision": [-1.25, 0.75],
            "probability": None,
            "nearest_support": {"distance": [2.0, 1.5], "similarity": [0.1, 0.2], "label": [0, 1], "index": [5, 9],
                                "percentile": [40.0, 20.0]},
            "domain": {"verdict": ["typical", "typical"], "score": [0.3, 0.4]},
        },
        "refused": [],
    }


@pytest.fixture(scope="module")
def iris_document(shared_client):
    return _document(shared_client, "/models/iris/openapi.json")


@pytest.fixture(scope="module")
def cancer_document(shared_client):
    return _document(shared_client, "/models/cancer/openapi.json")


@pytest.fixture(scope="module")
def service_document(shared_client):
    return _document(shared_client, "/openapi.json")


# ---- the per-model document: the request ------------------------------------------------------------------

def test_a_column_body_with_ids_is_exactly_one_of_the_two_request_forms(iris_document):
    body = {"columns": _iris_columns(3), "ids": ["P-1", None, 7]}
    validator = _validator(iris_document, _body_schema(iris_document, "/score/iris"))
    validator.validate(body)  # oneOf: valid under exactly one of ScoreRequest, ScoreColumnsRequest
    assert not _validator(iris_document, "ScoreRequest").is_valid(body)


def test_a_column_that_is_a_number_not_an_array_is_invalid(iris_document):
    body = {"columns": {**_iris_columns(), "sepal_length_cm": 5.1}}
    assert _validator(iris_document, "ScoreColumnsRequest").is_valid({"columns": _iris_columns()})
    assert not _validator(iris_document, "ScoreColumnsRequest").is_valid(body)


def test_an_unknown_column_is_invalid_as_an_unknown_member_of_a_record_is(iris_document):
    # The record schema's policy (additionalProperties: false) applies to columns alike.
    validator = _validator(iris_document, "ScoreColumnsRequest")
    assert validator.is_valid({"columns": _iris_columns()})
    assert not _validator(iris_document, "Record").is_valid({**GOOD_RECORD, "colour": 1.0})
    assert not validator.is_valid({"columns": {**_iris_columns(), "colour": [1.0, 2.0]}})


def test_a_column_named_id_is_invalid_record_ids_go_in_ids(iris_document):
    validator = _validator(iris_document, "ScoreColumnsRequest")
    assert validator.is_valid({"columns": _iris_columns(), "ids": ["a", "b"]})
    assert not validator.is_valid({"columns": {**_iris_columns(), "id": ["a", "b"]}})


def test_a_missing_feature_column_is_invalid_as_a_missing_record_member_is(iris_document):
    validator = _validator(iris_document, "ScoreColumnsRequest")
    columns, record = _iris_columns(), dict(GOOD_RECORD)
    assert validator.is_valid({"columns": columns})
    del columns["petal_width_cm"], record["petal_width_cm"]
    assert not _validator(iris_document, "Record").is_valid(record)
    assert not validator.is_valid({"columns": columns})


def test_each_cell_has_the_range_of_its_record_member(iris_document, service_models):
    columns = iris_document["components"]["schemas"]["Columns"]["properties"]
    for feature in service_models.iris1.bundle.manifest.features:
        items = columns[feature.name]["items"]
        assert (items["type"], items["minimum"], items["maximum"]) == ("number", *feature.allowed)
    low, _ = service_models.iris1.bundle.manifest.features[0].allowed
    assert not _validator(iris_document, "ScoreColumnsRequest").is_valid(
        {"columns": {**_iris_columns(), "sepal_length_cm": [5.1, low - 1]}})


def test_a_null_cell_or_a_boolean_cell_is_invalid_in_the_request(iris_document):
    validator = _validator(iris_document, "ScoreColumnsRequest")
    assert validator.is_valid({"columns": {**_iris_columns(), "sepal_length_cm": [5.1, 5.2]}})
    assert not validator.is_valid({"columns": {**_iris_columns(), "sepal_length_cm": [5.1, None]}})
    assert not validator.is_valid({"columns": {**_iris_columns(), "sepal_length_cm": [5.1, True]}})


def test_ids_hold_record_ids_or_null(iris_document):
    validator = _validator(iris_document, "ScoreColumnsRequest")
    assert validator.is_valid({"columns": _iris_columns(3), "ids": ["P-1", None, -12]})
    for wrong in ([True, None, 1], [1.5, None, 1], ["", None, 1], ["a\u0007", None, 1]):
        assert not validator.is_valid({"columns": _iris_columns(3), "ids": wrong}), wrong


def test_a_body_with_both_records_and_columns_is_neither_form(iris_document):
    validator = _validator(iris_document, _body_schema(iris_document, "/score/iris/versions/1.0.0"))
    assert validator.is_valid({"records": [GOOD_RECORD]}) and validator.is_valid({"columns": _iris_columns(1)})
    assert not validator.is_valid({"records": [GOOD_RECORD], "columns": _iris_columns(1)})


def test_every_array_of_the_body_holds_1_to_max_records_rows(service_models):
    bundle = service_models.iris1.bundle
    document = api_document(bundle.manifest, bundle.digest, max_records=3)
    validator = _validator(document, "ScoreColumnsRequest")
    assert validator.is_valid({"columns": _iris_columns(3), "ids": [1, 2, 3]})
    assert not validator.is_valid({"columns": _iris_columns(4)})
    assert not validator.is_valid({"columns": _iris_columns(0)})
    assert not validator.is_valid({"columns": _iris_columns(3), "ids": [1, 2, 3, 4]})


def test_a_bundle_with_a_feature_named_id_has_that_column_and_no_ids(service_models):
    # Bundles exported before the name "id" was reserved: there "id" is a feature (record form alike).
    bundle = service_models.iris1.bundle
    features = [bundle.manifest.features[0].model_copy(update={"name": "id"}), *bundle.manifest.features[1:]]
    document = api_document(bundle.manifest.model_copy(update={"features": features}), bundle.digest)
    columns = {"id": [5.1], **{name: [GOOD_RECORD[name]] for name in bundle.feature_names[1:]}}
    assert _validator(document, "Record").is_valid({"id": 5.1, **{k: v for k, v in GOOD_RECORD.items()
                                                                  if k != "sepal_length_cm"}})
    assert _validator(document, "ScoreColumnsRequest").is_valid({"columns": columns})
    assert not _validator(document, "ScoreColumnsRequest").is_valid({"columns": columns, "ids": ["a"]})
    assert "ids" not in document["components"]["schemas"]["ScoreColumnsResponse"]["properties"]


# ---- the per-model document: the answer -------------------------------------------------------------------

def test_a_multiclass_calibrated_column_answer_is_exactly_one_of_the_two_answer_forms(iris_document, service_models):
    answer = _iris_answer(service_models.iris1.bundle)
    _validator(iris_document, _answer_schema(iris_document, "/score/iris")).validate(answer)
    assert not _validator(iris_document, "ScoreResponse").is_valid(answer)


def test_a_binary_uncalibrated_column_answer_matches_the_documented_answer(cancer_document, service_models):
    _validator(cancer_document, "ScoreColumnsResponse").validate(_cancer_answer(service_models.cancer1.bundle))


def test_a_binary_models_decision_is_one_array_not_one_per_class(cancer_document, service_models):
    validator = _validator(cancer_document, "ScoreColumnsResponse")
    answer = _cancer_answer(service_models.cancer1.bundle)
    assert validator.is_valid(answer)
    answer["columns"]["decision"] = {"0": [1.25, -0.75], "1": [-1.25, 0.75]}
    assert not validator.is_valid(answer)


def test_an_uncalibrated_models_probability_is_null(cancer_document, service_models):
    validator = _validator(cancer_document, "ScoreColumnsResponse")
    answer = _cancer_answer(service_models.cancer1.bundle)
    assert validator.is_valid(answer)
    answer["columns"]["probability"] = {"0": [0.2, 0.7], "1": [0.8, 0.3]}
    assert not validator.is_valid(answer)


def test_answer_columns_are_arrays_of_the_record_forms_types_or_null(iris_document, service_models):
    validator = _validator(iris_document, "ScoreColumnsResponse")
    assert validator.is_valid(_iris_answer(service_models.iris1.bundle))
    for member, wrong in [("label", ["setosa", None, "daisy"]),  # not a class
                          ("label", "setosa"),  # a value, not an array
                          ("status", ["scored", None, "scored"]),  # status is never null
                          ("decision", {"setosa": [2.2, None, -0.3], "versicolor": [0.9, None, 1.1]})]:  # no virginica
        answer = _iris_answer(service_models.iris1.bundle)
        answer["columns"][member] = wrong
        assert not validator.is_valid(answer), (member, wrong)


def test_a_probability_above_1_is_invalid_in_a_column_as_in_a_result(iris_document, service_models):
    validator = _validator(iris_document, "ScoreColumnsResponse")
    answer = _iris_answer(service_models.iris1.bundle)
    assert validator.is_valid(answer)
    answer["columns"]["probability"]["setosa"][0] = 1.5
    assert not validator.is_valid(answer)
    assert not _validator(iris_document, "Probability").is_valid({"setosa": 1.5, "versicolor": 0, "virginica": 0})


def test_a_refused_row_names_its_row_and_its_problems_are_the_record_forms(iris_document, service_models):
    validator = _validator(iris_document, "ScoreColumnsResponse")
    answer = _iris_answer(service_models.iris1.bundle)
    answer["refused"][0]["problems"] = None  # past the detail budget, as in the record form
    assert validator.is_valid(answer)
    del answer["refused"][0]["row"]
    assert not validator.is_valid(answer)
    answer = _iris_answer(service_models.iris1.bundle)
    answer["refused"][0]["problems"][0]["reason"] = "too_big"  # not a RefusalReason
    assert not validator.is_valid(answer)


# ---- the service document ---------------------------------------------------------------------------------

@pytest.mark.parametrize("path", ["/score/{model}", "/score/{model}/versions/{version}"])
def test_the_service_takes_exactly_one_of_the_two_body_forms(service_document, path):
    validator = _validator(service_document, _body_schema(service_document, path))
    validator.validate({"records": [GOOD_RECORD]})
    validator.validate({"columns": _iris_columns(2), "ids": ["a", None]})
    validator.validate({"columns": {}, "ids": ["a"]})  # rows from ids; every feature then missing (refused)
    assert not validator.is_valid({"records": [GOOD_RECORD], "columns": _iris_columns(1)})
    assert not validator.is_valid({"columns": {"sepal_length_cm": 5.1}})


def test_the_service_bounds_every_column_and_ids_by_max_records(service_document):
    validator = _validator(service_document, "ScoreColumnsRequest")
    limit = service_document["components"]["schemas"]["ScoreRequest"]["properties"]["records"]["maxItems"]
    assert validator.is_valid({"columns": {"x": [1.0] * limit}, "ids": [None] * limit})
    assert not validator.is_valid({"columns": {"x": [1.0] * (limit + 1)}})
    assert not validator.is_valid({"columns": {"x": []}})
    assert not validator.is_valid({"columns": {"x": [1.0]}, "ids": [None] * (limit + 1)})


@pytest.mark.parametrize("model", ["iris", "cancer"])
def test_the_service_answer_is_exactly_one_of_the_two_answer_forms(service_document, service_models, model):
    answer = _iris_answer(service_models.iris1.bundle) if model == "iris" else _cancer_answer(
        service_models.cancer1.bundle)
    _validator(service_document, _answer_schema(service_document, "/score/{model}")).validate(answer)
    assert not _validator(service_document, "ScoreResponse").is_valid(answer)


def test_the_service_answer_refuses_a_column_that_is_not_an_array(service_document, service_models):
    validator = _validator(service_document, "ScoreColumnsResponse")
    answer = _iris_answer(service_models.iris1.bundle)
    assert validator.is_valid(answer)
    answer["columns"]["nearest_support"]["distance"] = 0.4
    assert not validator.is_valid(answer)


# ---- real column answers (the service's column form) ------------------------------------------------------

@pytest.mark.parametrize("model", ["iris", "cancer"])
def test_a_real_partly_refused_column_answer_matches_both_documents(shared_client, service_models, service_document,
                                                                    model):
    published = service_models.iris1 if model == "iris" else service_models.cancer1
    names = published.bundle.feature_names
    rows = published.X[:3].copy()
    rows[2, 0] = 1e9  # row 2 out of range
    body = {"columns": {name: rows[:, position].tolist() for position, name in enumerate(names)},
            "ids": ["a", None, "far"]}
    response = shared_client.post(f"/score/{model}", json=body)
    assert response.status_code == 200, response.text
    answer = response.json()
    assert answer["columns"]["status"] == ["scored", "scored", "refused"]
    document = _document(shared_client, f"/models/{model}/openapi.json")
    _validator(document, _answer_schema(document, f"/score/{model}")).validate(answer)
    _validator(service_document, _answer_schema(service_document, "/score/{model}")).validate(answer)


def test_a_real_all_refused_column_answer_matches_the_documented_422_body(shared_client, iris_document):
    body = {"columns": {**_iris_columns(1), "sepal_length_cm": [99.0]}, "ids": ["a"]}
    response = shared_client.post("/score/iris", json=body)
    assert response.status_code == 422, response.text
    assert response.json()["type"] == "/problems/records-refused"
    _validator(iris_document, "RecordsRefused").validate(response.json())
