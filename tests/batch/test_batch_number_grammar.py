"""The vectorised column checks refuse exactly what the record-by-record policy refuses.

Reference: ``model_store.refusal.check_records`` with ``from_text`` is the policy as the README
states it (plain ASCII decimals; ``nan``/``inf`` not finite; empty missing); Python's ``float``
is the reference parser (correctly rounded, IEEE 754-2008 section 5.12). The column checks
must agree with both on any text, bit for bit.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from model_store.column_checks import check_columns
from model_store.manifest import FeatureSpec
from model_store.refusal import check_records, from_text

_DIGITS = st.text(alphabet="0123456789", min_size=1, max_size=25)
_DECIMAL = st.builds(
    lambda sign, whole, frac, exp: f"{sign}{whole}{frac}{exp}",
    st.sampled_from(["", "+", "-"]),
    _DIGITS,
    st.sampled_from(["", "."]) | _DIGITS.map(lambda d: "." + d),
    st.sampled_from([""]) | st.builds(lambda e, s, d: f"{e}{s}{d}", st.sampled_from("eE"),
                                      st.sampled_from(["", "+", "-"]), st.text("0123456789", min_size=1, max_size=4)),
)
_PADDING = st.sampled_from(["", " ", "\t", "  ", "\u00a0", "\u2003", "\n"])
_ODD = st.sampled_from(["", "nan", "-inf", "Infinity", "1_000", "0x1f", "\u0661\u0662", "1e", ".", "-", "1.2.3",
                        "١", "1e400", "-1e400", "1e-400", "4.9e-324", "abc", "5,0", "1 0"])
_TEXT = st.builds(lambda left, core, right: left + core + right, _PADDING, _DECIMAL | _ODD, _PADDING) | st.text(max_size=8)


def _feature(name: str, low: float, high: float) -> FeatureSpec:
    return FeatureSpec(name=name, unit="", description="", allowed=[low, high],
                       training={"min": low, "max": high, "mean": 0.0, "std": 1.0})


FEATURES = [_feature("a", -1e300, 1e300), _feature("b", -5.0, 5.0)]


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.lists(st.tuples(_TEXT, _TEXT), min_size=1, max_size=40))
def test_column_checks_agree_with_the_record_policy_on_any_text(rows):
    records = [{"a": a, "b": b} for a, b in rows]
    expected = check_records(FEATURES, records, from_text, allow_extra=True)
    columns = [pa.array([a for a, _ in rows], pa.string()), pa.array([b for _, b in rows], pa.string())]
    got = check_columns(FEATURES, columns, n_rows=len(rows))
    assert got.accepted.tolist() == expected.accepted.tolist()
    assert got.values.tobytes() == expected.values.tobytes()  # bit for bit, signed zeros included
    assert {k: [p.describe() for p in v] for k, v in got.problems.items()} == \
        {k: [p.describe() for p in v] for k, v in expected.problems.items()}


@settings(max_examples=300, deadline=None)
@given(st.lists(_DECIMAL, min_size=1, max_size=50))
def test_grammar_decimals_parse_to_the_same_double_as_python_float(texts):
    wide = [_feature("a", -np.finfo(float).max, np.finfo(float).max)]
    got = check_columns(wide, [pa.array(texts, pa.string())], n_rows=len(texts))
    finite = [float(text) for text in texts if np.isfinite(float(text))]
    assert got.values[:, 0].tolist() == finite


def test_numeric_columns_follow_the_json_policy_nulls_nan_and_range():
    column = pa.array([1.0, None, float("nan"), float("inf"), 7.0, -0.0], pa.float64())
    got = check_columns([FEATURES[1]], [column], n_rows=6)
    assert got.accepted.tolist() == [0, 5]
    reasons = {k: [p.reason for p in v] for k, v in got.problems.items()}
    assert reasons == {1: ["null"], 2: ["not_finite"], 3: ["not_finite"], 4: ["out_of_range"]}


def test_integers_beyond_two_to_the_53_round_as_python_float_does():
    big = 2**63 - 1  # int64 max; float() rounds it to 2**63 (IEEE 754 round to nearest)
    got = check_columns([FEATURES[0]], [pa.array([big, 3], pa.int64())], n_rows=2)
    assert got.values[:, 0].tolist() == [float(big), 3.0]
