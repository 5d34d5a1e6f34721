"""GET .../schema: a JSON Schema 2020-12 document that agrees with the refusal policy.

References: the JSON Schema 2020-12 meta-schema, checked by the ``jsonschema`` library
(``Draft202012Validator.check_schema``); JSON Schema Validation 2020-12 sections 6.1.1
(type), 6.2.2/6.2.4 (inclusive maximum/minimum), 6.5.3 (required); Core section 10.3.2.3
(additionalProperties). The refusal policy is ``model_store.refusal.check_records``.
"""

from __future__ import annotations

import jsonschema
from hypothesis import given, settings
from hypothesis import strategies as st

from model_store.refusal import check_records, from_json

from .cases import GOOD_RECORD


def _schema(client, model="iris", version="1.0.0"):
    response = client.get(f"/models/{model}/versions/{version}/schema")
    assert response.status_code == 200
    assert response.headers["content-type"] == "application/schema+json"
    return response.json()


def test_schema_is_valid_under_the_2020_12_meta_schema(shared_client):
    client = shared_client
    for model, version in (("iris", "1.0.0"), ("iris", "2.0.0"), ("cancer", "1.0.0")):
        schema = _schema(client, model, version)
        assert schema["$schema"] == "https://json-schema.org/draft/2020-12/schema"
        jsonschema.Draft202012Validator.check_schema(schema)


def test_schema_lists_every_feature_with_its_allowed_range(shared_client, service_models):
    schema = _schema(shared_client)
    features = service_models.iris1.bundle.manifest.features
    assert schema["required"] == [feature.name for feature in features]
    assert schema["additionalProperties"] is False
    for feature in features:
        prop = schema["properties"][feature.name]
        assert (prop["type"], prop["minimum"], prop["maximum"]) == ("number", *feature.allowed)


_EDGE_NUMBERS = st.sampled_from([-1e300, -1.0, 0.0, 0.5, 1.9, 2.5, 4.3, 5.0, 7.9, 8.5, 1e300])
_VALUES = st.one_of(
    _EDGE_NUMBERS,
    st.floats(-20, 20),
    st.integers(-20, 20),
    st.none(),
    st.booleans(),
    st.text(max_size=3),
    st.lists(st.integers(), max_size=2),
)
_NAMES = st.sampled_from(["sepal_length_cm", "sepal_width_cm", "petal_length_cm", "petal_width_cm", "colour", "id"])
# Record ids (the service's rule, model_store.record_ids.ID_RULE): strings of 1 to 128 characters
# without a Unicode category Cc character, or integers within ±(2**53 - 1) (RFC 8259 section 6);
# each side of every limit, and characters either side of the Cc ranges (U+001F/U+0020,
# U+007E/U+007F, U+009F/U+00A0), with a final newline (which "$" would let through in Python).
_IDS = st.sampled_from(["", "a", "x" * 128, "x" * 129, 2**53 - 1, 2**53, -(2**53 - 1), -(2**53), 0, True,
                        "a\x1f", "a ", "~", "\x7f", "\x9f", "\xa0", "a\n", "\u2028"])


@settings(max_examples=300, deadline=None)
@given(base=st.sampled_from([{}, GOOD_RECORD]), drawn=st.dictionaries(_NAMES, _VALUES, max_size=5),
       record_id=st.none() | _IDS)
def test_schema_accepts_exactly_the_records_the_refusal_policy_accepts(shared_client, service_models, base, drawn,
                                                                       record_id):
    record = {**base, **drawn}  # from a scoreable record, so that acceptance is as common as refusal
    if record_id is not None:
        record["id"] = record_id
    features = service_models.iris1.bundle.manifest.features
    schema = _schema(shared_client)
    valid = jsonschema.Draft202012Validator(schema).is_valid(record)
    accepted = len(check_records(features, [record], from_json, ids=True).accepted) == 1  # as the service checks
    assert valid == accepted, record


def test_allowed_bounds_are_inclusive_in_both(shared_client, service_models):
    features = service_models.iris1.bundle.manifest.features
    schema = _schema(shared_client)
    lows = {feature.name: feature.allowed[0] for feature in features}
    highs = {feature.name: feature.allowed[1] for feature in features}
    for record in (lows, highs):
        assert jsonschema.Draft202012Validator(schema).is_valid(record)
        assert len(check_records(features, [record], from_json).accepted) == 1

