"""The service's fast paths give exactly the answers of the rules they stand in for.

Two paths exist only for speed (README, Performance): request bodies are parsed by orjson when
that gives the document ``model_store.strict_json`` would give (``service.body``), and JSON records
are checked a feature column at a time when they are plain (``model_store.record_columns``).
Hypothesis draws bodies and records built to hit every branch (duplicates, depth, long integers,
surrogates, booleans, nulls, strings, nested values, huge integers, out-of-range and boundary
values, unknown members, ids of every kind) and compares each fast answer with the slow one:
the same document or the same 400 message; the same accepted rows, values (bit for bit), ids and
problems (feature, value, reason, allowed range, message) in the same order.
"""

from __future__ import annotations

import json
from collections import defaultdict

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from model_store.manifest import FeatureSpec
from model_store.errors import InputError
from model_store.refusal import check_columns, check_records, from_json
from service.body import MAX_DEPTH, parse_json
from service.problems import ServiceProblem

_SETTINGS = settings(max_examples=300, deadline=None, derandomize=True)

# Two features with finite ranges and one whose range reaches the largest floats.
# (model_construct: the checks read only name and allowed, so no training statistics are needed.)
_FEATURES = [
    FeatureSpec.model_construct(name="a", allowed=(-1.0, 1.0)),
    FeatureSpec.model_construct(name="b", allowed=(0.0, 100.0)),
    FeatureSpec.model_construct(name="c", allowed=(-1.7976931348623157e308, 1.7976931348623157e308)),
]

_values = st.one_of(
    st.floats(allow_nan=True, allow_infinity=True),
    st.sampled_from([-1.0, 1.0, 0.0, -0.0, 100.0, 5e-324, np.nextafter(1.0, 2.0), np.nextafter(-1.0, -2.0)]),
    st.integers(min_value=-5, max_value=150),
    st.integers(min_value=-(10**400), max_value=10**400),
    st.booleans(),
    st.none(),
    st.text(max_size=4),
    st.lists(st.integers(), max_size=2),
    st.dictionaries(st.text(max_size=2), st.integers(), max_size=2),
)
_ids = st.one_of(
    st.integers(min_value=-(2**54), max_value=2**54),
    st.sampled_from([7.0, 7.5, 2.0**53, 2.0**60, "", "x" * 128, "x" * 129, "a\u0007b", "\u0085", "caf\u00e9",
                     "\ud800", True, None, [1], {"k": 1}]),
    st.text(max_size=6),
)


@st.composite
def _record(draw):
    record = {}
    for name in ("a", "b", "c"):
        if draw(st.integers(0, 9)) > 0:  # mostly present
            record[name] = draw(_values) if draw(st.booleans()) else draw(st.floats(-1.0, 1.0))
    if draw(st.integers(0, 3)) == 0:
        record["id"] = draw(_ids)
    if draw(st.integers(0, 7)) == 0:
        record[draw(st.sampled_from(["d", "A", "id ", "\u00e9"]))] = draw(_values)
    return record


def _slow(value):
    """from_json itself, under another identity: check_records then takes its per-value path."""
    return from_json(value)


def _same(got, want) -> None:
    assert got.accepted.tolist() == want.accepted.tolist()
    assert got.values.shape == want.values.shape
    assert got.values.tobytes() == want.values.tobytes()  # bit for bit, -0.0 included
    assert got.ids == want.ids
    assert list(got.problems) == list(want.problems)
    for index, problems in want.problems.items():
        assert [repr(problem) for problem in got.problems[index]] == [repr(problem) for problem in problems]


@_SETTINGS
@given(records=st.lists(_record(), min_size=8, max_size=16), ids=st.booleans(), extra=st.booleans())
def test_column_checks_give_the_per_value_answer(records, ids, extra):
    # At least 8 records: smaller batches take the per-value path anyway (refusal._COLUMN_MIN_RECORDS).
    fast = check_records(_FEATURES, records, from_json, ids=ids, allow_extra=extra)
    _same(fast, check_records(_FEATURES, records, _slow, ids=ids, allow_extra=extra))


@_SETTINGS
@given(record=_record(), ids=st.booleans(), extra=st.booleans())
def test_the_one_record_check_gives_the_per_value_answer(record, ids, extra):
    # One record: plain ones in a few C-level calls (record_columns.plain_record), the rest by the rules.
    fast = check_records(_FEATURES, [record], from_json, ids=ids, allow_extra=extra)
    _same(fast, check_records(_FEATURES, [record], _slow, ids=ids, allow_extra=extra))


@pytest.mark.parametrize("record", [
    {"a": 0.5, "b": 7, "c": -3.25e300},
    {"a": -1.0, "b": 100, "c": 1.7976931348623157e308},  # every bound, reached exactly
    {"a": -0.0, "b": 0, "c": 5e-324},
], ids=["inside", "on the bounds", "signed zero and the smallest subnormal"])
def test_a_plain_record_is_accepted_as_its_floats(record):
    checked = check_records(_FEATURES, [record], from_json, ids=True)
    assert checked.accepted.tolist() == [0] and not checked.problems and checked.ids == [None]
    assert checked.values.tobytes() == np.array([[float(record[name]) for name in "abc"]]).tobytes()


def test_a_mapping_that_invents_missing_keys_gets_the_rules_answer():
    # A defaultdict fills in a missing feature on lookup; the rules see it missing (found in review).
    record = defaultdict(float, {"a": 0.5, "b": 7.0, "d": 1.0})  # c missing, d unknown
    fast = check_records(_FEATURES, [record], from_json, ids=False)
    _same(fast, check_records(_FEATURES, [defaultdict(float, {"a": 0.5, "b": 7.0, "d": 1.0})], _slow, ids=False))
    assert [problem.reason for problem in fast.problems[0]] == ["missing", "unknown_feature"]
    assert "c" not in record  # and the caller's record is left as it was


def test_a_plain_batch_is_accepted_whole_by_the_column_checks():
    records = [{"a": 0.5, "b": 7, "c": -3.25e300, "id": index} for index in range(50)]
    checked = check_records(_FEATURES, records, from_json, ids=True)
    assert checked.accepted.tolist() == list(range(50)) and not checked.problems
    assert checked.values[:, 1].tolist() == [7.0] * 50  # float(7), as from_json gives it


def _strict(data: bytes):
    """What the strict parser alone says: the document, or the 400 detail."""
    from model_store.strict_json import StrictJsonError, loads_strict

    try:
        return "doc", loads_strict(data.decode("utf-8"), max_depth=MAX_DEPTH)
    except (StrictJsonError, UnicodeDecodeError) as exc:
        return "error", type(exc).__name__


def _parsed(data: bytes):
    try:
        return "doc", parse_json(data)
    except ServiceProblem as problem:
        return "error", problem.status


_json_values = st.recursive(
    st.one_of(st.none(), st.booleans(), st.integers(min_value=-(10**25), max_value=10**25),
              st.floats(allow_nan=False, allow_infinity=False), st.text(max_size=5)),
    lambda children: st.one_of(st.lists(children, max_size=3), st.dictionaries(st.text(max_size=3), children, max_size=3)),
    max_leaves=12,
)

# Texts the fast path must hand to the strict parser, each for its own reason.
_TRICKY = [
    b'{"a":1,"a":2}', b'{"records":[{"x":1,"x":1}]}', b'{"a":"x:y"}', b'{"a:b":1}',
    b"[" * (MAX_DEPTH + 1) + b"]" * (MAX_DEPTH + 1), b"[" * MAX_DEPTH + b"]" * MAX_DEPTH,
    b'{"a":123456789012345678901234567890}', b'{"a":18446744073709551616}', b'{"a":-9223372036854775809}',
    b'{"a":0.0012345678901234567}', b'{"a":[0.00012345678901234568,-1234567890123456789]}', b'1234567890123456789012',
    b'{"a":12345678901234567890.5}', b'{"a":1e0000000000000000001}', b'{"a":1e-0000000000000000001}', b'{"a":1e400}', b'{"a":NaN}', b'{"a":Infinity}', b'"\\ud800"', b'{"\\udc00":1}', b'"\\ud83d\\ude00"',
    b'\xef\xbb\xbf{}', b'{"a":"\xff"}', b'{"a":1}x', b'{"a":01}', b'{"a":-0}', b'{"a":1E2}', b'{"a":1e-400}',
]


@_SETTINGS
@given(document=_json_values, duplicate=st.booleans())
def test_fast_parsing_gives_the_strict_parsers_document_or_its_refusal(document, duplicate):
    text = json.dumps(document, ensure_ascii=bool(duplicate))
    if duplicate and text.startswith("{") and len(text) > 2:
        first = text[1:].split(",")[0].rstrip("}")
        text = "{" + first + "," + text[1:]  # the first member written twice
    data = text.encode("utf-8")
    kind, value = _strict(data)
    got_kind, got = _parsed(data)
    assert got_kind == kind
    if kind == "doc":
        assert json.dumps(got) == json.dumps(value) and _types(got) == _types(value)


@pytest.mark.parametrize("data", _TRICKY, ids=lambda data: data[:24].decode("latin-1"))
def test_tricky_bodies_get_the_strict_parsers_answer(data):
    kind, value = _strict(data)
    got_kind, got = _parsed(data)
    assert got_kind == kind
    if kind == "doc":
        assert got == value and _types(got) == _types(value)


def _types(value):
    """The document's shape with every leaf replaced by its type: 1 and 1.0 must not be swapped."""
    if isinstance(value, dict):
        return {key: _types(child) for key, child in value.items()}
    if isinstance(value, list):
        return [_types(child) for child in value]
    return type(value).__name__


def test_a_body_of_floats_is_taken_from_the_fast_parser():
    # Floats between 0.001 and 0.01 are written with 19 or more digits after the point; they must
    # not send a scoring body to the slow parser (the point of the fast path).
    from service.body import _UNDECIDED, _fast_document

    data = json.dumps({"records": [{"a": 0.0012345678901234567, "b": 0.5}] * 3}).encode()
    assert _fast_document(data) is not _UNDECIDED


# The walk reads a short level in Python and a long one (service.body._NUMPY_LEVEL values or more)
# with numpy: every walk test runs on one copy of its records and on enough copies for numpy.
_COPIES = [1, 40]


@_SETTINGS
@given(document=_json_values, copies=st.sampled_from(_COPIES))
def test_numbers_from_two_to_the_63_up_send_a_body_to_the_strict_parser(document, copies):
    # The definition: orjson's document is taken only when every number in it is smaller than
    # 2**63 in magnitude (an integer orjson cannot keep exact becomes a float at least that large).
    from service.body import _UNDECIDED, _fast_document

    def leaves(value):
        if isinstance(value, dict):
            return list(value) + [leaf for child in value.values() for leaf in leaves(child)]
        if isinstance(value, list):
            return [leaf for child in value for leaf in leaves(child)]
        return [value]

    data = json.dumps({"records": [document] * copies}).encode("utf-8")
    numbers = [leaf for leaf in leaves(document) if isinstance(leaf, (int, float))]
    colon_in_a_string = any(isinstance(leaf, str) and ":" in leaf for leaf in leaves(document))
    if any(abs(number) >= 2**63 for number in numbers):
        assert _fast_document(data) is _UNDECIDED
    elif not colon_in_a_string:  # a ":" inside a string is the other reason to ask the strict parser
        assert _fast_document(data) is not _UNDECIDED



@st.composite
def _columns(draw):
    """A column-form body's columns and ids, as service.score_body hands them to check_columns."""
    n_rows = draw(st.integers(1, 14))
    cell = st.one_of(_values, st.floats(-1.0, 1.0))
    columns = {name: draw(st.lists(cell, min_size=n_rows, max_size=n_rows))
               for name in draw(st.lists(st.sampled_from(["a", "b", "c", "d", "\u00e9"]), unique=True, max_size=5))}
    ids = draw(st.none() | st.lists(st.none() | _ids, min_size=n_rows, max_size=n_rows))
    return columns, ids, n_rows


@_SETTINGS
@given(body=_columns())
def test_the_column_form_gives_the_record_forms_answer_row_for_row(body):
    columns, ids, n_rows = body
    records = [{**{name: cells[row] for name, cells in columns.items()},
                **({"id": ids[row]} if ids is not None and ids[row] is not None else {})} for row in range(n_rows)]
    _same(check_columns(_FEATURES, columns, ids, n_rows), check_records(_FEATURES, records, _slow, ids=True))


def test_check_columns_refuses_ids_for_a_bundle_whose_feature_is_named_id():
    # Such a bundle predates record ids: "id" is its feature, so ids could only overwrite it.
    features = [FeatureSpec.model_construct(name="id", allowed=(0.0, 10.0)),
                FeatureSpec.model_construct(name="b", allowed=(0.0, 10.0))]
    with pytest.raises(InputError, match="ids=None"):
        check_columns(features, {"id": [1, 2], "b": [1, None]}, ["x", "y"], 2)
    assert check_columns(features, {"id": [1, 2], "b": [1, None]}, None, 2).accepted.tolist() == [0]


@pytest.mark.parametrize("copies", _COPIES)
def test_text_that_spells_a_huge_number_does_not_count_as_a_number_in_the_walk(copies):
    # A long leaf level is converted with numpy, which reads "1e30" as a number; only real JSON
    # numbers may send a body to the strict parser (the definition in the test above).
    from service.body import _UNDECIDED, _fast_document

    records = [{"a": 0.5, "b": "1e30", "c": None}, {"a": 1.5, "b": True, "c": "inf"}] * copies
    assert _fast_document(json.dumps({"records": records}).encode()) is not _UNDECIDED


@pytest.mark.parametrize("copies", _COPIES)
@pytest.mark.parametrize("huge", ["18446744073709551616", "-9223372036854775809", "1e19", "1" + "0" * 400])
def test_a_huge_number_among_nulls_still_sends_the_body_to_the_strict_parser(huge, copies):
    # null becomes NaN in a long level's conversion; it must not hide the huge number beside it.
    from service.body import _UNDECIDED, _fast_document

    records = ', '.join(['{"a": null, "b": true, "c": ' + huge + '}', '{"a": null, "b": 1, "c": 2}'] * copies)
    assert _fast_document(('{"records": [' + records + ']}').encode()) is _UNDECIDED


@pytest.mark.parametrize("copies", _COPIES)
def test_a_huge_number_beside_text_that_is_no_number_sends_the_body_to_the_strict_parser(copies):
    from service.body import _UNDECIDED, _fast_document

    records = ', '.join(['{"a": "x", "c": 18446744073709551616}'] + ['{"a": "y", "c": 1}'] * (copies - 1))
    assert _fast_document(('{"records": [' + records + ']}').encode()) is _UNDECIDED


@pytest.mark.parametrize("copies", _COPIES)
def test_a_huge_integer_among_small_ones_sends_the_body_to_the_strict_parser(copies):
    # Integers only in the body: the short level's Python max and the long level's numpy
    # conversion must both see the huge one (orjson reads it as a float; the strict parser keeps
    # the exact integer).
    from service.body import _UNDECIDED, _fast_document

    huge = 2**64 + 1
    data = json.dumps({"records": [{"a": 1, "b": 2}] * copies + [{"a": huge, "b": 3}]}).encode()
    assert _fast_document(data) is _UNDECIDED
    assert _fast_document(data.replace(str(huge).encode(), b"4")) is not _UNDECIDED
