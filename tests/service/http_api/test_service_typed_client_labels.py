"""A typed client for a model whose class labels are -1, 0 and 1 (signed integers, the label
convention of libsvm's own data files, common practice for SVMs).

Generators turn each per-class property name into an attribute name by dropping what is not a
letter or digit (openapi-python-client: ``-1`` and ``1`` both become ``field_1``), so labels that
differ only in sign, case or punctuation cannot be one property each: the generator then drops
the per-class type and every type that uses it, scored results included. The per-model document
describes such per-class objects as a map keyed by the labels instead.

Model: wine (Forina et al., PARVUS, 1988; UCI "Wine", shipped with scikit-learn), its classes
0, 1, 2 relabelled -1, 0, 1, StandardScaler + SVC with sigmoid calibration. Expected values are
scikit-learn's own ``predict``, ``decision_function`` and ``predict_proba`` (reference.py).
"""

from __future__ import annotations

import importlib

import jsonschema
import pytest
from conftest import export_model  # tests/conftest.py
from sklearn.calibration import CalibratedClassifierCV
from sklearn.datasets import load_wine
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler
from sklearn.svm import SVC

from model_store.store import Store

from .generated_client import generated_client
from .reference import sklearn_reference

_PACKAGE = "signed_labels_client"
_FEATURES = ["alcohol", "malic_acid", "ash", "alcalinity_of_ash"]


@pytest.fixture(scope="module")
def signed(tmp_path_factory):
    data = load_wine()
    X, y = data.data[:, :4], data.target - 1  # classes -1, 0, 1
    model = CalibratedClassifierCV(make_pipeline(StandardScaler(), SVC()), method="sigmoid", ensemble=False).fit(X, y)
    root = tmp_path_factory.mktemp("signed-labels")
    bundle = export_model(model, X, root / "bundle", y=y, name="wine", version="1.0.0", features=_FEATURES)
    store = Store(root / "store", create=True)
    store.publish(bundle.source, actor="test-setup")
    store.activate("wine", "1.0.0", reason="first release", actor="test-setup")
    return store, model, X


@pytest.fixture
def client(make_client, signed):
    store, _, _ = signed
    return make_client(store.root)


def test_a_client_generated_for_labels_minus_one_zero_one_reads_decision_and_probability(client, signed,
                                                                                        tmp_path):
    _, model, X = signed
    document = client.get("/models/wine/openapi.json").json()
    answer = client.post("/score/wine", json={"records": [dict(zip(_FEATURES, X[0].tolist()))]})
    assert answer.status_code == 200, answer.text
    with generated_client(document, tmp_path, _PACKAGE):  # fails if the generator dropped a type
        models = importlib.import_module(f"{_PACKAGE}.models")
        [result] = models.ScoreResponse.from_dict(answer.json()).results
        assert isinstance(result, models.ScoredResult)
        expected = sklearn_reference(model, X[:1])
        for column, label in enumerate(model.classes_.tolist()):
            assert result.decision[str(label)] == pytest.approx(expected["decision"][0, column], abs=1e-9)
            assert result.probability[str(label)] == pytest.approx(expected["probabilities"][0, column], abs=1e-9)
        assert result.label.value == int(expected["labels"][0])


def test_the_map_of_labels_still_names_every_class_exactly(client, signed):
    _, model, X = signed
    document = client.get("/models/wine/openapi.json").json()
    labels = [str(label) for label in model.classes_.tolist()]
    for name in ("Decision", "Probability"):
        schema = document["components"]["schemas"][name]
        assert schema["propertyNames"] == {"enum": labels}
        assert schema["minProperties"] == schema["maxProperties"] == len(labels)
    # A real answer validates under the document (JSON Schema 2020-12, checked by the jsonschema library).
    answer = client.post("/score/wine", json={"records": [dict(zip(_FEATURES, row)) for row in X[:3].tolist()]})
    validator = jsonschema.Draft202012Validator({"$ref": "#/components/schemas/ScoreResponse",
                                                 "components": document["components"]})
    validator.validate(answer.json())
