"""POST /score: the numbers equal scikit-learn's and rbfgate's scorer, in request order.

References: scikit-learn ``predict`` / ``decision_function`` / ``predict_proba`` and
``pairwise_distances_argmin_min`` (see reference.py); for the nearest-support percentile, which
scikit-learn does not have, the empirical distribution function of the reference rows' nearest
distances (textbook definition), computed from scikit-learn's distances.
"""

from __future__ import annotations

import numpy as np
from sklearn.metrics.pairwise import euclidean_distances

from .cases import assert_problem
from .reference import assert_close, sklearn_reference

# Every 7th iris row plus jittered copies: in range, mixed classes (iris: Fisher 1936).
_RNG = np.random.default_rng(7)


def _iris_rows(published) -> np.ndarray:
    X = published.X[::7]
    jittered = X + _RNG.normal(scale=0.05, size=X.shape)
    low, high = np.array([f.allowed for f in published.bundle.manifest.features]).T
    return np.clip(np.vstack([X, jittered]), low, high)


def _score(client, published, rows, version: str | None = None):
    path = f"/score/{published.name}" + (f"/versions/{version}" if version else "")
    response = client.post(path, json={"records": published.records(rows)})
    assert response.status_code == 200, response.text
    return response.json()


def test_multiclass_calibrated_scores_equal_sklearn(make_client, shared_store, service_models):
    published = service_models.iris1
    rows = _iris_rows(published)
    body = _score(make_client(shared_store.root), published, rows)
    reference = sklearn_reference(published.model, rows)
    classes = published.bundle.classes
    results = body["results"]
    assert [result["status"] for result in results] == ["scored"] * len(rows)
    assert [result["label"] for result in results] == reference["labels"].tolist()
    decision = np.array([[result["decision"][label] for label in classes] for result in results])
    assert_close(decision, reference["decision"], "decision_function (ovr shape)")
    probability = np.array([[result["probability"][label] for label in classes] for result in results])
    assert_close(probability, reference["probabilities"], "predict_proba")


def test_binary_decision_is_a_number_and_probability_null(make_client, shared_store, service_models):
    published = service_models.cancer1
    rows = published.X[::25]
    body = _score(make_client(shared_store.root), published, rows)
    reference = sklearn_reference(published.model, rows)
    decisions = [result["decision"] for result in body["results"]]
    assert all(isinstance(value, float) for value in decisions)
    assert_close(decisions, reference["decision"], "decision_function (binary: positive means classes_[1])")
    assert [result["label"] for result in body["results"]] == reference["labels"].tolist()
    assert all(result["probability"] is None for result in body["results"])  # uncalibrated SVC


def test_nearest_support_equals_sklearn_and_the_scorer(make_client, shared_store, service_models):
    published = service_models.cancer1
    rows = published.X[1::25]
    body = _score(make_client(shared_store.root), published, rows)
    nearest = [result["nearest_support"] for result in body["results"]]
    reference = sklearn_reference(published.model, rows)
    assert_close([n["distance"] for n in nearest], reference["nearest_distance"], "nearest distance", 1e-7)
    assert_close([n["similarity"] for n in nearest], reference["nearest_similarity"], "exp(-gamma d^2)", 1e-7)
    assert [n["index"] for n in nearest] == reference["nearest_index"].tolist()
    assert [n["label"] for n in nearest] == reference["nearest_label"].tolist()


def test_nearest_percentile_is_the_rank_among_the_reference_distances(make_client, shared_store, service_models):
    # The bundle interpolates 101 quantiles (steps of 1 %) of the reference rows' nearest distances,
    # so its percentile is within one step plus one row (100 / n points) of 100 x ECDF(distance).
    # A reference row that is a support vector counts its distance to the nearest *other* one
    # (leave-self-out): scikit-learn's euclidean_distances to every support vector, the row's own
    # entry (support_ gives the rows) set aside.
    published = service_models.cancer1  # exported with every breast cancer row as its reference
    rows = published.X[::20] + _RNG.normal(scale=0.2, size=published.X[::20].shape) * published.X.std(axis=0)
    low, high = np.array([f.allowed for f in published.bundle.manifest.features]).T
    rows = np.clip(rows, low, high)
    body = _score(make_client(shared_store.root), published, rows)
    percentiles = np.array([result["nearest_support"]["percentile"] for result in body["results"]])
    distances = sklearn_reference(published.model, rows)["nearest_distance"]
    scaler, svc = published.model[0], published.model[-1]
    all_distances = euclidean_distances(scaler.transform(published.X), svc.support_vectors_)
    all_distances[svc.support_, np.arange(len(svc.support_))] = np.inf
    reference_distances = np.sort(all_distances.min(axis=1))
    assert distances.min() > 1e-3  # off the support vectors, where sklearn's distance is rounding noise
    ecdf = 100.0 * np.searchsorted(reference_distances, distances, side="right") / len(reference_distances)
    assert np.ptp(ecdf) > 20  # the rows spread over the distribution
    assert np.max(np.abs(percentiles - ecdf)) <= 1.0 + 200.0 / len(reference_distances)


def test_response_names_model_version_and_digest_in_body_and_headers(make_client, shared_store, service_models):
    published = service_models.iris1
    response = make_client(shared_store.root).post("/score/iris", json={"records": published.records(published.X[:1])})
    body = response.json()
    assert (body["model"], body["version"], body["bundle_sha256"]) == ("iris", "1.0.0", published.bundle.digest)
    assert response.headers["Rbfgate-Version"] == "1.0.0"
    assert response.headers["Rbfgate-Bundle-Sha256"] == published.bundle.digest
    assert response.headers["content-type"] == "application/json"


def test_pinned_version_scores_with_that_version(make_client, shared_store, service_models):
    published = service_models.iris2  # published, not active
    rows = _iris_rows(published)
    body = _score(make_client(shared_store.root), published, rows, version="2.0.0")
    assert (body["version"], body["bundle_sha256"]) == ("2.0.0", published.bundle.digest)
    reference = sklearn_reference(published.model, rows)
    decision = np.array([[r["decision"][c] for c in published.bundle.classes] for r in body["results"]])
    assert_close(decision, reference["decision"], "decision_function of version 2.0.0")
    assert all(result["probability"] is None for result in body["results"])


def test_mixed_batch_keeps_request_order_and_scores_the_rest(make_client, shared_store, service_models):
    published = service_models.iris1
    good = published.records(published.X[[0, 60, 120]])
    bad = dict(good[0], petal_width_cm=99.0)  # far outside iris (max 2.5 cm)
    body = make_client(shared_store.root).post("/score/iris", json={"records": [good[0], bad, good[1], good[2]]}).json()
    assert [result["status"] for result in body["results"]] == ["scored", "refused", "scored", "scored"]
    reference = sklearn_reference(published.model, published.X[[0, 60, 120]])
    assert [body["results"][i]["label"] for i in (0, 2, 3)] == reference["labels"].tolist()
    problem = body["results"][1]["problems"]
    low, high = published.bundle.manifest.features[3].allowed
    assert problem == [{"feature": "petal_width_cm", "value": 99.0, "reason": "out_of_range", "allowed": [low, high]}]


def test_integer_valued_features_are_numbers(make_client, shared_store, service_models):
    # RFC 8259 section 6: JSON does not distinguish integers from other numbers.
    published = service_models.iris1
    record = {"sepal_length_cm": 5, "sepal_width_cm": 3, "petal_length_cm": 1.4, "petal_width_cm": 0.2}
    body = make_client(shared_store.root).post("/score/iris", json={"records": [record]}).json()
    reference = sklearn_reference(published.model, np.array([[5.0, 3.0, 1.4, 0.2]]))  # the same values as floats
    assert body["results"][0]["label"] == reference["labels"][0]
    assert_close([body["results"][0]["decision"][c] for c in published.bundle.classes], reference["decision"][0],
                 "decision_function")


def test_all_records_refused_is_422_with_the_results(make_client, shared_store, service_models):
    published = service_models.iris1
    record = dict(published.records(published.X[:1])[0], sepal_length_cm=-1.0)
    response = make_client(shared_store.root).post("/score/iris", json={"records": [record, {"colour": "red"}]})
    body = assert_problem(response, 422)
    assert body["version"] == "1.0.0" and response.headers["Rbfgate-Version"] == "1.0.0"
    assert [result["status"] for result in body["results"]] == ["refused", "refused"]
    assert {(p["record"], p["feature"], p["reason"]) for p in body["problems"]} >= {
        (0, "sepal_length_cm", "out_of_range"),
        (1, "colour", "unknown_feature"),
        (1, "sepal_length_cm", "missing"),
    }


def test_max_records_is_accepted_and_one_more_is_413(make_client, shared_store, service_models):
    published = service_models.cancer1
    client = make_client(shared_store.root, max_records=20)
    records = published.records(published.X[:21])
    assert client.post("/score/cancer", json={"records": records[:20]}).status_code == 200
    body = assert_problem(client.post("/score/cancer", json={"records": records}), 413)
    assert body["limit_records"] == 20
