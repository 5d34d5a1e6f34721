"""Over HTTP: the preview carries the contract comparison, activate refuses a breaking candidate with a
problem listing the breaking changes (RFC 9457 extension member ``breaking_changes``), and
``"accept_breaking": true`` lets it through, recorded in the history.

iris 1.0.0 is calibrated, iris 2.0.0 is not (conftest.py), so switching drops ``probability``;
iris 3.0.0 (made here) is the 1.0.0 model exported without a margin, so every allowed range is
narrowed to 1.0.0's training [min, max], as a routine retrain narrows them. The 409 body is checked
against the service document's ``BreakingChangesProblem`` with the ``jsonschema`` library (JSON
Schema 2020-12, the schema dialect of OpenAPI 3.1).
"""

from __future__ import annotations

from pathlib import Path

import jsonschema
import pytest
from conftest import export_model  # tests/conftest.py

from .cases import GOOD_RECORD, assert_problem, bearer

_TRAINING_RANGE = "active version's training range"


@pytest.fixture(scope="module")
def narrowed(service_models, tmp_path_factory):
    """iris 3.0.0: the 1.0.0 model and reference rows, exported with no margin."""
    iris = service_models.iris1
    return export_model(iris.model, iris.X, tmp_path_factory.mktemp("iris3") / "bundle",
                        y=None, name="iris", version="3.0.0", features=iris.bundle.feature_names, margin=0.0)


def _with_narrowed(make_client, store, tokens, narrowed):
    store.publish(Path(narrowed.source), actor="test-setup")
    return _operate(make_client, store, tokens)


def _operate(make_client, store, tokens):
    path, issued = tokens
    return make_client(store.root, tokens_file=path), bearer(issued["operate"]), bearer(issued["score"])


def test_activating_a_candidate_that_drops_calibration_is_409_listing_the_breaking_change(make_client, store, tokens):
    client, operate, _ = _operate(make_client, store, tokens)
    response = client.post("/models/iris/activate", json={"version": "2.0.0", "reason": "retrained"}, headers=operate)
    body = assert_problem(response, 409)
    assert body["type"] == "/problems/breaking-changes"
    assert [change.split(":")[0] for change in body["breaking_changes"]] == ["probability removed"]
    assert client.get("/models/iris", headers=operate).json()["active"]["version"] == "1.0.0"


def test_accept_breaking_activates_and_the_history_says_what_was_accepted(make_client, store, tokens):
    client, operate, _ = _operate(make_client, store, tokens)
    body = {"version": "2.0.0", "reason": "callers told on ticket OPS-7", "accept_breaking": True}
    response = client.post("/models/iris/activate", json=body, headers=operate)
    assert response.status_code == 200, response.text
    entry = response.json()["entry"]
    assert [change.split(":")[0] for change in entry["accepted_breaking"]] == ["probability removed"]
    history = client.get("/models/iris/history", headers=operate).json()
    assert history["entries"][-1] == entry and history["verification"]["ok"]


def test_accept_breaking_must_be_a_boolean(make_client, store, tokens):
    client, operate, _ = _operate(make_client, store, tokens)
    response = client.post("/models/iris/activate", json={"version": "2.0.0", "reason": "x", "accept_breaking": "yes"},
                           headers=operate)
    assert assert_problem(response, 422)["problems"][0]["pointer"] == "/accept_breaking"


def test_the_preview_shows_the_contract_comparison_on_recent_records(make_client, store, tokens):
    client, operate, score = _operate(make_client, store, tokens)
    client.post("/score/iris", json={"records": [GOOD_RECORD] * 3}, headers=score)
    report = client.post("/models/iris/preview", json={"version": "2.0.0"}, headers=operate).json()["report"]
    assert report["contract"]["recent_inputs"] == 3
    assert [change["kind"] for change in report["contract"]["changes"]] == ["probability_removed"]


def test_without_recent_records_a_range_narrowed_to_the_training_range_activates_and_says_on_what_basis(
        make_client, store, tokens, narrowed):
    client, operate, _ = _with_narrowed(make_client, store, tokens, narrowed)  # a new worker: no sample yet
    response = client.post("/models/iris/activate", json={"version": "3.0.0", "reason": "retrained"}, headers=operate)
    assert response.status_code == 200, response.text
    assert response.json()["range_basis"] == _TRAINING_RANGE
    assert "accepted_breaking" not in response.json()["entry"]


def test_a_recent_record_outside_the_narrowed_range_refuses_activation_naming_the_recent_basis(
        make_client, store, tokens, narrowed, service_models):
    client, operate, score = _with_narrowed(make_client, store, tokens, narrowed)
    iris = service_models.iris1
    feature = iris.bundle.manifest.features[0]
    largest = iris.records(iris.X[iris.X[:, 0].argmax()][None, :])[0]  # the iris flower with the longest sepal
    above = feature.training.max + 0.5 * (feature.allowed[1] - feature.training.max)  # 1.0.0 accepts it, 3.0.0 not
    answer = client.post("/score/iris", json={"records": [{**largest, feature.name: above}]}, headers=score)
    assert answer.json()["results"][0]["status"] == "scored"
    body = assert_problem(client.post("/models/iris/activate", json={"version": "3.0.0", "reason": "retrained"},
                                      headers=operate), 409)
    assert body["range_basis"] == "recent inputs: 1"
    assert [change.split(":")[0] for change in body["breaking_changes"]] == [f"feature {feature.name}"]


def test_the_preview_says_on_what_basis_narrowed_ranges_were_judged(make_client, store, tokens, narrowed):
    client, operate, _ = _with_narrowed(make_client, store, tokens, narrowed)
    report = client.post("/models/iris/preview", json={"version": "3.0.0"}, headers=operate).json()["report"]
    assert report["contract"]["range_basis"] == _TRAINING_RANGE and report["contract"]["breaking"] == []


def test_the_breaking_changes_problem_is_the_type_the_service_document_declares_for_activate(
        make_client, store, tokens):
    client, operate, _ = _operate(make_client, store, tokens)
    document = client.get("/openapi.json", headers=operate).json()
    declared = document["paths"]["/models/{model}/activate"]["post"]["responses"]["409"]["content"]
    assert {"$ref": "#/components/schemas/BreakingChangesProblem"} in declared["application/problem+json"]["schema"]["anyOf"]
    schema = document["components"]["schemas"]["BreakingChangesProblem"]
    assert schema["properties"]["breaking_changes"]["items"] == {"type": "string"}
    body = assert_problem(client.post("/models/iris/activate", json={"version": "2.0.0", "reason": "retrained"},
                                      headers=operate), 409)
    jsonschema.Draft202012Validator({"$ref": "#/components/schemas/BreakingChangesProblem",
                                     "components": document["components"]}).validate(body)
