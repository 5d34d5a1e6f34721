"""The column form of a scoring body: ``{"columns": {feature: [values]}, "ids"?: [...]}``, answered as columns.

The specification is the record form itself: row i of a column-form body is scored and refused
exactly as the record ``{name: columns[name][i], ...}`` (plus ``"id": ids[i]`` when not null), and
row i of every answer column is what the record form's ``results[i]`` says, bit for bit. The first
tests check that on random bodies (missing columns, unknown columns, nulls, booleans, strings,
non-finite and out-of-range values, valid and invalid ids) against the record form sent to the same
app; the rest pin the column form's own shape rules (JSON Pointers are RFC 6901).
"""

from __future__ import annotations

import json

import numpy as np
import pytest

from model_store.record_ids import MAX_ID_INTEGER

_NEAREST = ("distance", "similarity", "label", "index", "percentile")


def _records(columns: dict, ids: list | None, n_rows: int) -> list[dict]:
    """The record form of a column-form body (the rule the service states)."""
    records = []
    for row in range(n_rows):
        record = {name: cells[row] for name, cells in columns.items()}
        if ids is not None and ids[row] is not None:
            record["id"] = ids[row]
        records.append(record)
    return records


def _row_as_result(answer: dict, row: int) -> dict:
    """Row ``row`` of a column-form answer, written as the record form's result for that row."""
    columns = answer["columns"]
    result = {}
    if answer.get("ids") is not None and answer["ids"][row] is not None:
        result["id"] = answer["ids"][row]
    domain = columns["domain"]
    row_domain = None if domain is None else {"verdict": domain["verdict"][row], "score": domain["score"][row]}
    if columns["status"][row] == "refused":
        [refused] = [item for item in answer["refused"] if item["row"] == row]
        result.update(status="refused", problem_count=refused["problem_count"], problems=refused["problems"])
        if row_domain is not None and row_domain["verdict"] is not None:
            result["domain"] = row_domain
        return result
    decision = columns["decision"]
    probability = columns["probability"]
    result.update(
        status="scored",
        label=columns["label"][row],
        decision=decision[row] if isinstance(decision, list) else {key: values[row] for key, values in decision.items()},
        probability=None if probability is None else {key: values[row] for key, values in probability.items()},
        nearest_support={member: columns["nearest_support"][member][row] for member in _NEAREST},
        domain=row_domain,
    )
    return result


def _random_cell(rng: np.random.Generator, low: float, high: float):
    kind = rng.choice(12)
    if kind == 0:
        return None
    if kind == 1:
        return bool(rng.integers(2))
    if kind == 2:
        return "1.5"
    if kind == 3:
        return high + 1.0 + float(rng.random())  # out of range
    if kind == 4:
        return int(round(low)) if low <= round(low) <= high else low  # an int inside the range
    if kind == 5:
        return [1.0]
    return float(low + (high - low) * rng.random())


def _random_id(rng: np.random.Generator, row: int):
    kind = rng.choice(8)
    if kind == 0:
        return None
    if kind == 1:
        return "" if rng.integers(2) else "x" * 129  # invalid strings
    if kind == 2:
        return MAX_ID_INTEGER + 1  # invalid integer
    if kind == 3:
        return float(row)  # 7.0 is the integer 7
    if kind == 4:
        return True  # invalid kind
    return f"row-{row}" if rng.integers(2) else row


def _random_body(rng: np.random.Generator, published, features: list[str], ranges: list[tuple[float, float]]
                 ) -> tuple[dict, list | None, int]:
    """Rows drawn from the model's own training rows (inside its domain), some cells spoiled."""
    n_rows = int(rng.integers(1, 40))
    rows = published.X[rng.integers(len(published.X), size=n_rows)]
    clean = rng.random() < 0.4  # some bodies are all plain values (the columns' fast path)
    columns = {}
    for position, (name, (low, high)) in enumerate(zip(features, ranges)):
        if not clean and rng.random() < 0.1 / len(features):
            continue  # a feature without a column
        column = rows[:, position].tolist()
        if not clean:
            column = [_random_cell(rng, low, high) if rng.random() < 0.03 else cell for cell in column]
        columns[name] = column
    if not clean and rng.random() < 0.25:
        columns["not_a_feature"] = [1.0] * n_rows
    order = list(columns)
    rng.shuffle(order)  # column order is the client's; the problem order must not depend on it
    columns = {name: columns[name] for name in order}
    ids = None
    if rng.random() < 0.6:
        ids = [(_random_id(rng, row) if not clean else row) for row in range(n_rows)]
    if not columns and ids is None:
        ids = list(range(n_rows))
    return columns, ids, n_rows


def _published(service_models, model: str):
    return {"iris": service_models.iris1, "cancer": service_models.cancer1}[model]


@pytest.mark.parametrize("model", ["iris", "cancer"])
def test_every_row_of_a_random_column_body_is_answered_as_its_record_would_be(shared_client, service_models, model):
    published = _published(service_models, model)
    specs = published.bundle.manifest.features
    features, ranges = [spec.name for spec in specs], [tuple(spec.allowed) for spec in specs]
    rng = np.random.default_rng(20261203)
    compared = {"scored": 0, "refused": 0, "all refused": 0}
    for _ in range(60):
        columns, ids, n_rows = _random_body(rng, published, features, ranges)
        body = {"columns": columns} if ids is None else {"columns": columns, "ids": ids}
        as_columns = shared_client.post(f"/score/{model}", json=body)
        as_records = shared_client.post(f"/score/{model}", json={"records": _records(columns, ids, n_rows)})
        assert as_columns.status_code == as_records.status_code, (body, as_columns.text)
        expected = as_records.json()
        if as_records.status_code == 422:
            assert as_columns.json() == expected  # every row refused: the same problem document
            compared["all refused"] += 1
            continue
        answer = as_columns.json()
        for member in ("model", "version", "bundle_sha256", "refusals", "summarised"):
            assert answer.get(member) == expected.get(member), member
        assert ("ids" in answer) == (ids is not None)
        assert {len(values) for values in _arrays(answer["columns"])} == {n_rows}
        for row, result in enumerate(expected["results"]):
            assert _row_as_result(answer, row) == result, (row, body)
            compared[result["status"]] += 1
    assert min(compared.values()) > 0, compared  # the bodies reached every kind of answer


def _arrays(member) -> list[list]:
    if isinstance(member, list):
        return [member]
    if isinstance(member, dict):
        return [array for value in member.values() for array in _arrays(value)]
    return []  # null: uncalibrated, or no domain model


def _iris_columns(service_models, rows: slice = slice(0, 3)) -> dict[str, list[float]]:
    published = service_models.iris1
    return {name: published.X[rows, position].tolist() for position, name in enumerate(published.bundle.feature_names)}


def _pointer_problem(answer, pointer: str) -> str:
    assert answer.status_code == 422, answer.text
    body = answer.json()
    assert body["type"].endswith("/problems/invalid-request")
    [problem] = body["problems"]
    assert problem["pointer"] == pointer
    return problem["detail"]


def test_a_column_body_is_answered_in_columns_one_entry_per_row(shared_client, service_models):
    answer = shared_client.post("/score/iris", json={"columns": _iris_columns(service_models)})
    assert answer.status_code == 200
    document = answer.json()
    assert "results" not in document and "ids" not in document and document["refused"] == []
    assert document["columns"]["status"] == ["scored"] * 3
    # iris 1.0.0 is calibrated with three string labels: probability is class -> column (scikit-learn's classes_ order)
    assert list(document["columns"]["probability"]) == ["setosa", "versicolor", "virginica"]
    assert document["columns"]["label"] == service_models.iris1.model.predict(service_models.iris1.X[:3]).tolist()


def test_the_pinned_version_route_takes_the_column_form_too(shared_client, service_models):
    answer = shared_client.post("/score/iris/versions/2.0.0", json={"columns": _iris_columns(service_models)})
    assert answer.status_code == 200
    assert answer.json()["version"] == "2.0.0" and answer.json()["columns"]["probability"] is None  # uncalibrated


def test_a_binary_model_answers_its_decision_as_one_column(shared_client, service_models):
    published = service_models.cancer1
    columns = {name: published.X[:4, position].tolist() for position, name in enumerate(published.bundle.feature_names)}
    document = shared_client.post("/score/cancer", json={"columns": columns}).json()
    # scikit-learn's decision_function is the reference (1e-9, the bundle's exactness promise)
    np.testing.assert_allclose(document["columns"]["decision"], published.model.decision_function(published.X[:4]),
                               rtol=1e-9, atol=1e-9)


def test_a_feature_without_a_column_refuses_every_row_as_missing(shared_client, service_models):
    columns = _iris_columns(service_models)
    del columns["petal_width_cm"]
    answer = shared_client.post("/score/iris", json={"columns": columns})
    assert answer.status_code == 422  # every row refused: the record form's problem document
    [group] = answer.json()["refusals"]
    assert (group["feature"], group["reason"], group["records"]) == ("petal_width_cm", "missing", [[0, 2]])


def test_a_column_that_is_no_feature_refuses_every_row_naming_it(shared_client, service_models):
    columns = {**_iris_columns(service_models), "colour": ["blue"] * 3}
    groups = shared_client.post("/score/iris", json={"columns": columns}).json()["refusals"]
    assert [(group["feature"], group["reason"], group["count"]) for group in groups] == [("colour", "unknown_feature", 3)]


def test_one_bad_cell_refuses_only_its_row(shared_client, service_models):
    columns = _iris_columns(service_models)
    columns["sepal_length_cm"][1] = True  # a boolean is not a number (RFC 8259 keeps true and numbers apart)
    document = shared_client.post("/score/iris", json={"columns": columns}).json()
    assert document["columns"]["status"] == ["scored", "refused", "scored"]
    assert document["columns"]["label"][1] is None and document["columns"]["nearest_support"]["distance"][1] is None
    [refused] = document["refused"]
    assert refused["row"] == 1 and refused["problems"][0]["reason"] == "not_a_number"


def test_null_in_ids_means_that_row_has_no_id_and_an_invalid_id_refuses_its_row_only(shared_client, service_models):
    answer = shared_client.post("/score/iris", json={"columns": _iris_columns(service_models), "ids": ["a", None, ""]})
    document = answer.json()
    assert document["ids"] == ["a", None, None]
    assert document["columns"]["status"] == ["scored", "scored", "refused"]
    assert document["refused"][0]["problems"][0]["reason"] == "invalid_id"


def test_columns_of_different_lengths_are_a_shape_error_naming_both_lengths(shared_client, service_models):
    columns = _iris_columns(service_models)
    columns["petal_length_cm"] = columns["petal_length_cm"][:2]
    detail = _pointer_problem(shared_client.post("/score/iris", json={"columns": columns}), "/columns/petal_length_cm")
    assert "holds 2 values" in detail and "holds 3" in detail


def test_ids_of_another_length_than_the_columns_are_a_shape_error(shared_client, service_models):
    answer = shared_client.post("/score/iris", json={"columns": _iris_columns(service_models), "ids": [1, 2]})
    assert "holds 3 values, but \"ids\" holds 2" in _pointer_problem(answer, "/columns/sepal_length_cm")


@pytest.mark.parametrize(("body", "pointer"), [
    ({"columns": [1.0, 2.0]}, "/columns"),
    ({"columns": {"sepal_length_cm": 5.1}}, "/columns/sepal_length_cm"),
    ({"columns": {"a/b~c": 5.1}}, "/columns/a~1b~0c"),  # RFC 6901 section 3: "/" is ~1 and "~" is ~0
    ({"columns": {}}, "/columns"),
    ({"columns": {"sepal_length_cm": []}}, "/columns"),
    ({"columns": {"sepal_length_cm": [5.1]}, "ids": "a"}, "/ids"),
    ({"columns": {"sepal_length_cm": [5.1]}, "records": []}, "/columns"),  # either form, not both
    ({"columns": {"sepal_length_cm": [5.1]}, "abc": 1, "records": []}, "/columns"),  # the clash is named first
    ({"columns": {"sepal_length_cm": [5.1]}, "limit": 3}, "/limit"),
    ({"ids": [1]}, "/columns"),  # ids without columns: columns is what is missing
    ({"ids": [1], "records": [{}]}, "/ids"),  # ids belong to the column form
    ({"columns": {}, "ids": []}, "/ids"),  # the rows are counted by ids, so ids is what is empty
    ({"columns": {"x" * 100: 5.1}}, "/columns"),  # a long name is not echoed whole: the object's pointer
])
def test_a_column_body_of_the_wrong_shape_is_refused_with_a_pointer_to_the_fault(shared_client, body, pointer):
    _pointer_problem(shared_client.post("/score/iris", json=body), pointer)


def test_a_column_named_id_is_refused_because_ids_go_beside_the_columns(shared_client, service_models):
    answer = shared_client.post("/score/iris", json={"columns": {**_iris_columns(service_models), "id": [1, 2, 3]}})
    assert "send record ids as \"ids\"" in _pointer_problem(answer, "/columns/id")


def test_more_rows_than_the_limit_is_413_naming_the_limit(make_client, store, service_models):
    client = make_client(store.root, max_records=2)
    answer = client.post("/score/iris", json={"columns": _iris_columns(service_models)})
    assert answer.status_code == 413 and answer.json()["limit_records"] == 2 and "holds 3 rows" in answer.json()["detail"]


def test_the_pages_try_route_answers_a_column_body_in_the_record_form(shared_client, service_models):
    answer = shared_client.post("/view/data/models/iris/try", json={"columns": _iris_columns(service_models)})
    assert answer.status_code == 200 and [result["status"] for result in answer.json()["results"]] == ["scored"] * 3


def test_the_log_line_counts_rows_and_logs_the_columns_when_inputs_are_logged(make_client, store, service_models):
    logs: list = []
    client = make_client(store.root, logs=logs, log_inputs=True)
    columns = _iris_columns(service_models)
    client.post("/score/iris", json={"columns": columns, "ids": [1, 2, 3]})
    [line] = [event for event in logs if event.get("path") == "/score/iris"]
    assert line["records"] == 3 and line["inputs"] == {"columns": columns, "ids": [1, 2, 3]}


def test_a_row_refused_as_outside_the_domain_keeps_its_verdict_and_score_in_the_domain_columns(shared_client):
    from .cases import GOOD_RECORD
    from .test_service_domain import ODD_RECORD  # inside every range, unlike any iris flower

    columns = {name: [GOOD_RECORD[name], ODD_RECORD[name]] for name in GOOD_RECORD}
    as_records = shared_client.post("/score/iris", json={"records": [GOOD_RECORD, ODD_RECORD]}).json()
    document = shared_client.post("/score/iris", json={"columns": columns}).json()
    assert document["columns"]["status"] == ["scored", "refused"]
    assert document["columns"]["domain"]["verdict"] == ["typical", "outside"]
    assert document["columns"]["domain"]["score"][1] == as_records["results"][1]["domain"]["score"]
    assert document["refused"][0]["problems"][0]["reason"] == "outside_domain"
    assert document["columns"]["label"] == [as_records["results"][0]["label"], None]


def test_a_long_column_name_is_named_by_its_first_characters_and_its_length(shared_client):
    detail = _pointer_problem(shared_client.post("/score/iris", json={"columns": {"x" * 100: 5.1}}), "/columns")
    assert f"'{'x' * 64}'... (100 characters)" in detail and "must be a list" in detail


def test_the_pages_try_route_follows_the_operators_outside_domain_choice(make_client, store):
    from .cases import GOOD_RECORD
    from .test_service_domain import ODD_RECORD

    store.set_outside_action("iris", "flag", reason="pilot with human review", actor="ops-cli")
    client = make_client(store.root)
    tried = client.post("/view/data/models/iris/try", json={"records": [GOOD_RECORD, ODD_RECORD]}).json()["results"]
    scored = client.post("/score/iris", json={"records": [GOOD_RECORD, ODD_RECORD]}).json()["results"]
    assert [result["status"] for result in tried] == [result["status"] for result in scored] == ["scored", "scored"]


@pytest.mark.parametrize("body", [[1, 2], "records", 5])
def test_a_body_that_is_no_object_points_at_the_whole_document(shared_client, body):
    # RFC 6901 section 5: "" is the whole document ("/" would be its member named "").
    detail = _pointer_problem(shared_client.post("/score/iris", json=body), "")
    assert detail.startswith("must be a JSON object") or "must be a JSON object" in detail
