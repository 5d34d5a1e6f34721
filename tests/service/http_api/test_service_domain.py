"""The domain verdict over HTTP: in every answer, outside_domain refusals, the operators' refuse-or-flag choice.

Reference for the verdicts and scores: the bundle's own scorer (``Bundle.score``), whose one-class
decision tests/bundle/test_domain_model.py checks against scikit-learn's OneClassSVM. Iris:
R. A. Fisher, 1936 (UCI Iris), shipped with scikit-learn.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from prometheus_client.parser import text_string_to_metric_families

from model_store.store import Store

from .cases import GOOD_RECORD, assert_problem, bearer
from .conftest import IRIS_FEATURES

FORMAT_1_BUNDLE = Path(__file__).resolve().parents[2] / "bundle" / "data" / "format1-iris"
# Each value lies inside iris's allowed ranges, but the combination (short wide sepals with the
# longest, thinnest petals) is unlike any iris flower.
ODD_RECORD = {"sepal_length_cm": 4.4, "sepal_width_cm": 4.3, "petal_length_cm": 6.8, "petal_width_cm": 0.2}


def _verdict(bundle, record) -> tuple[str, float]:
    scores = bundle.score(np.array([[record[name] for name in IRIS_FEATURES]]))
    return str(scores.domain_verdict[0]), float(scores.domain_score[0])


def test_every_scored_answer_carries_the_bundles_domain_verdict_and_score(make_client, shared_store, service_models):
    bundle = service_models.iris1.bundle
    body = make_client(shared_store.root).post("/score/iris", json={"records": [GOOD_RECORD]}).json()
    verdict, score = _verdict(bundle, GOOD_RECORD)
    assert body["results"][0]["domain"]["verdict"] == verdict == "typical"
    assert abs(body["results"][0]["domain"]["score"] - score) <= 1e-12 * max(1.0, abs(score))


def test_an_in_range_record_outside_the_domain_is_refused_as_outside_domain(make_client, shared_store, service_models):
    bundle = service_models.iris1.bundle
    assert bundle.score(np.array([[ODD_RECORD[name] for name in IRIS_FEATURES]])).in_range.all()
    verdict, score = _verdict(bundle, ODD_RECORD)
    assert verdict == "outside"
    body = make_client(shared_store.root).post("/score/iris", json={"records": [GOOD_RECORD, ODD_RECORD]}).json()
    refused = body["results"][1]
    assert refused["status"] == "refused"
    assert refused["problems"] == [{"feature": None, "value": score, "reason": "outside_domain", "allowed": None}]
    assert refused["domain"]["verdict"] == "outside"


def test_operators_can_choose_to_flag_only_and_it_is_recorded_in_the_history(make_client, store, tokens):
    tokens_file, issued = tokens
    client = make_client(store.root, tokens_file=tokens_file)
    operate, score = bearer(issued["operate"]), bearer(issued["score"])
    assert_problem(client.post("/models/iris/outside-domain", json={"action": "flag", "reason": "x"}, headers=score), 403)
    response = client.post("/models/iris/outside-domain", json={"action": "flag", "reason": "pilot with human review"},
                           headers=operate)
    assert response.status_code == 200, response.text
    entry = Store(store.root).history("iris")[-1]
    assert (entry["action"], entry["actor"], entry["reason"]) == ("outside-domain-flag", "ops-alice", "pilot with human review")
    assert response.json()["entry"] == entry
    answer = client.post("/score/iris", json={"records": [ODD_RECORD]}, headers=score).json()["results"][0]
    assert answer["status"] == "scored" and answer["domain"]["verdict"] == "outside"
    assert client.get("/models/iris", headers=operate).json()["outside_domain"] == "flag"
    assert Store(store.root).verify_history("iris") == len(Store(store.root).history("iris"))


def test_another_worker_follows_the_choice_at_its_next_poll(make_client, store):
    client = make_client(store.root)  # polls only when told to (poll_seconds is an hour)
    assert client.post("/score/iris", json={"records": [ODD_RECORD]}).status_code == 422  # refused: all records
    store.set_outside_action("iris", "flag", reason="pilot", actor="ops-cli")
    client.app.state.services.registry.refresh_all()
    answer = client.post("/score/iris", json={"records": [ODD_RECORD]}).json()["results"][0]
    assert answer["status"] == "scored" and answer["domain"]["verdict"] == "outside"


def test_verdicts_are_counted_per_model_version_and_verdict(make_client, store):
    client = make_client(store.root)
    store.set_outside_action("iris", "flag", reason="count them", actor="ops-cli")
    client.app.state.services.registry.refresh_all()
    client.post("/score/iris", json={"records": [GOOD_RECORD, GOOD_RECORD, ODD_RECORD]})
    samples = {
        (sample.name, frozenset(sample.labels.items())): sample.value
        for family in text_string_to_metric_families(client.get("/metrics").text)
        for sample in family.samples
    }
    labels = {"model": "iris", "version": "1.0.0"}
    assert samples[("rbfgate_domain_verdicts_total", frozenset({**labels, "verdict": "typical"}.items()))] == 2
    assert samples[("rbfgate_domain_verdicts_total", frozenset({**labels, "verdict": "outside"}.items()))] == 1


def test_a_format_1_bundle_answers_with_domain_null(make_client, tmp_path):
    store = Store(tmp_path / "store", create=True)
    store.publish(FORMAT_1_BUNDLE, actor="test-setup")
    store.activate("iris-v1", "1.0.0", reason="old bundle", actor="test-setup")
    record = {"sepal_length": 5.1, "sepal_width": 3.5, "petal_length": 1.4, "petal_width": 0.2}
    body = make_client(store.root).post("/score/iris-v1", json={"records": [record]}).json()
    assert body["results"][0]["status"] == "scored" and body["results"][0]["domain"] is None


def test_the_record_schema_states_the_domain_thresholds(make_client, shared_store, service_models):
    schema = make_client(shared_store.root).get("/models/iris/versions/1.0.0/schema").json()
    thresholds = service_models.iris1.bundle.manifest.domain.thresholds
    assert schema["x-rbfgate-domain"]["outside_below"] == thresholds.outside_below
    assert schema["x-rbfgate-domain"]["unusual_below"] == thresholds.unusual_below
