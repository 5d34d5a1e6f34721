"""A backend team's view: a client generated from the demo model's own OpenAPI document, against a
real ``rbfgate serve``.

openapi-python-client (a generator of the OpenAPI community, not ours) turns
``GET /models/pallet-checks/openapi.json`` into a typed package; the test imports it and reads a
typed label (an enum of the classes), a typed probability (one attribute per class) and a typed
refusal (the 422 body as ``RecordsRefused``), in the records form and in the column form (the
request body and the 200 answer are ``oneOf`` the two forms; /work/notes/columns_spec.md). Values
are checked against the bundle's own scorer, which the bundle tests check against scikit-learn.
Documents are validated with
openapi-spec-validator against the OpenAPI 3.1 specification's schema.
"""

from __future__ import annotations

import importlib
import json
import subprocess
import sys
from pathlib import Path

import httpx
import numpy as np
import pytest
from openapi_spec_validator import validate
from openapi_spec_validator.validation import OpenAPIV31SpecValidator

from model_store import load_bundle

from .generated_client import generated_client
from .server import ServeProcess

_MODEL, _VERSION = "pallet-checks", "1.0.0"
_PACKAGE = "pallet_checks_client"
# Readings inside every allowed range of the demo (model_store/demo.py generates similar pallets).
_PALLET = {"core_temp_c": 3.2, "surface_temp_c": 4.4, "humidity_pct": 81.0, "transit_hours": 9.5,
           "door_open_min": 4.0, "peak_shock_g": 1.3}


@pytest.fixture(scope="module")
def demo(tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("typed-client") / "demo"
    subprocess.run([sys.executable, "-m", "model_store", "demo", "--out", str(out)], check=True,
                   capture_output=True, timeout=600)
    return out


@pytest.fixture(scope="module")
def server(demo):
    with ServeProcess(demo.parent, "--store", demo / "store") as running:
        yield running


@pytest.fixture(scope="module")
def document(server) -> dict:
    response = httpx.get(f"{server.url}/models/{_MODEL}/openapi.json", timeout=30)
    assert response.status_code == 200
    return response.json()


@pytest.fixture(scope="module")
def generated(document, tmp_path_factory):
    """The package openapi-python-client generates from the per-model document, imported."""
    with generated_client(document, tmp_path_factory.mktemp("generated"), _PACKAGE) as package:
        yield package


def _score(generated, server, *records):
    client_module = importlib.import_module(f"{_PACKAGE}.client")
    score = importlib.import_module(f"{_PACKAGE}.api.default.score")
    models = importlib.import_module(f"{_PACKAGE}.models")
    body = models.ScoreRequest(records=[models.Record(**record) for record in records])
    with client_module.Client(base_url=server.url) as client:
        return score.sync_detailed(client=client, body=body), models


def _expected(demo: Path, record: dict):
    bundle = load_bundle(demo / "bundles" / f"{_MODEL}-{_VERSION}")
    scores = bundle.score(np.array([[record[name] for name in bundle.feature_names]]))
    return bundle, scores


def test_the_per_model_document_is_valid_openapi_3_1(document):
    validate(document, cls=OpenAPIV31SpecValidator)


def test_generated_client_reads_a_typed_label_and_probability(generated, server, demo):
    response, models = _score(generated, server, {**_PALLET, "id": "P-0001"})
    assert response.status_code == 200
    [result] = response.parsed.results
    bundle, scores = _expected(demo, _PALLET)
    assert isinstance(result, models.ScoredResult)
    assert isinstance(result.label, models.Label)  # an enum of the classes, not a string
    assert result.label.value == scores.labels[0]
    assert {member.value for member in models.Label} == set(bundle.classes)
    assert isinstance(result.probability, models.Probability)
    for column, label in enumerate(bundle.classes):
        assert getattr(result.probability, label) == pytest.approx(scores.probabilities[0, column], abs=1e-12)
    assert result.nearest_support.percentile == pytest.approx(scores.nearest_percentile[0], abs=1e-12)
    assert result.id == "P-0001"


def test_generated_client_reads_a_typed_refusal(generated, server):
    too_warm = {**_PALLET, "core_temp_c": 19.0, "id": 15}
    response, models = _score(generated, server, too_warm)
    assert response.status_code == 422
    refused = response.parsed
    assert isinstance(refused, models.RecordsRefused)
    [result] = refused.results
    assert isinstance(result, models.RefusedResult)
    [problem] = result.problems
    assert problem.reason is models.RefusalReason.OUT_OF_RANGE
    assert problem.feature == "core_temp_c"
    assert (result.id, refused.problems[0].id, refused.problems[0].record) == (15, 15, 0)


def test_generated_client_tells_scored_and_refused_results_apart_in_one_answer(generated, server):
    response, models = _score(generated, server, _PALLET, {**_PALLET, "peak_shock_g": 99.0})
    assert response.status_code == 200
    assert [type(result) for result in response.parsed.results] == [models.ScoredResult, models.RefusedResult]


def test_generated_client_scores_a_column_body_and_reads_the_column_answer(generated, server, demo):
    client_module = importlib.import_module(f"{_PACKAGE}.client")
    score = importlib.import_module(f"{_PACKAGE}.api.default.score")
    models = importlib.import_module(f"{_PACKAGE}.models")
    too_warm = {**_PALLET, "core_temp_c": 19.0}
    columns = models.Columns(**{name: [_PALLET[name], too_warm[name]] for name in _PALLET})
    body = models.ScoreColumnsRequest(columns=columns, ids=["P-0001", None])
    with client_module.Client(base_url=server.url) as client:
        response = score.sync_detailed(client=client, body=body)
    assert response.status_code == 200, response.content
    answer = response.parsed
    assert isinstance(answer, models.ScoreColumnsResponse)
    bundle, scores = _expected(demo, _PALLET)
    results = answer.columns
    assert [status.value for status in results.status] == ["scored", "refused"]
    assert isinstance(results.label[0], models.Label) and results.label[0].value == scores.labels[0]
    assert results.label[1] is None
    assert isinstance(results.probability, models.ColumnProbability)
    for column, label in enumerate(bundle.classes):
        scored, refused = getattr(results.probability, label)
        assert scored == pytest.approx(scores.probabilities[0, column], abs=1e-12) and refused is None
    assert results.nearest_support.percentile[0] == pytest.approx(scores.nearest_percentile[0], abs=1e-12)
    assert answer.ids == ["P-0001", None]
    [refused_row] = answer.refused
    [problem] = refused_row.problems
    assert (refused_row.row, problem.reason, problem.feature) == (1, models.RefusalReason.OUT_OF_RANGE, "core_temp_c")


def test_inspect_writes_the_document_the_service_serves(demo, document):
    bundle_dir = demo / "bundles" / f"{_MODEL}-{_VERSION}"
    completed = subprocess.run([sys.executable, "-m", "model_store", "inspect", str(bundle_dir), "--openapi"],
                               capture_output=True, text=True, timeout=120, check=True)
    assert json.loads(completed.stdout) == document


def test_a_supplied_request_id_is_echoed_and_logged_by_the_real_server(server):
    supplied = "checkout-7f3a 2026/12/01"
    response = httpx.post(f"{server.url}/score/{_MODEL}", json={"records": [_PALLET]},
                          headers={"X-Request-ID": supplied}, timeout=30)
    assert response.headers["X-Request-ID"] == supplied
    [logged] = server.wait_for_log(lambda event: event.get("request_id") == supplied)
    assert (logged["event"], logged["route"], logged["status"]) == ("request", "/score/{model}", 200)
