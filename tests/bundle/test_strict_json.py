"""Strict JSON (model_store/strict_json.py), the one parser of manifests, signatures and request bodies.

References: RFC 8259 (JSON; section 7 gives the escaped surrogate pair of U+1D11E as its example),
RFC 7493 (I-JSON: section 2.1 forbids unpaired surrogates, section 2.3 duplicate names), IEEE 754
binary64 (largest finite value about 1.8e308).
"""

from __future__ import annotations

import pytest

from model_store.strict_json import StrictJsonError, loads_strict


def test_an_escaped_surrogate_pair_is_one_character():
    # RFC 8259 section 7: "\ud834\udd1e" is the G clef, U+1D11E.
    assert loads_strict('"\\ud834\\udd1e"', max_depth=4) == "\U0001d11e"


@pytest.mark.parametrize("text", ['"\\ud800"', '"a\\udfffb"', '{"\\ud800": 1}', '[{"k": ["\\udbff"]}]'])
def test_an_unpaired_surrogate_anywhere_is_refused(text):
    with pytest.raises(StrictJsonError, match="unpaired UTF-16 surrogate"):
        loads_strict(text, max_depth=8)


@pytest.mark.parametrize("text", ['{"a": 1, "a": 1}', '{"x": {"y": [{"a": 1, "b": 2, "a": 3}]}}'])
def test_a_duplicate_member_name_at_any_depth_is_refused(text):
    with pytest.raises(StrictJsonError, match="'a' appears twice"):
        loads_strict(text, max_depth=8)


def test_nesting_is_measured_before_parsing_so_100000_levels_are_one_line():
    with pytest.raises(StrictJsonError, match=r"nested too deeply \(100000 levels\)"):
        loads_strict("[" * 100_000 + "]" * 100_000, max_depth=64)


def test_brackets_inside_strings_do_not_count_as_nesting():
    text = '{"a": "[[[[{{{{", "b": "\\"]]]]"}'
    assert loads_strict(text, max_depth=1) == {"a": "[[[[{{{{", "b": '"]]]]'}


def test_nesting_at_the_limit_is_accepted():
    assert loads_strict("[" * 5 + "]" * 5, max_depth=5) == [[[[[]]]]]
    with pytest.raises(StrictJsonError):
        loads_strict("[" * 6 + "]" * 6, max_depth=5)


@pytest.mark.parametrize("text", ["NaN", "[Infinity]", '{"x": -Infinity}', "1e400", "[-1e999]", "1" + "0" * 400])
def test_non_finite_and_overflowing_numbers_are_refused(text):
    with pytest.raises(StrictJsonError):
        loads_strict(text, max_depth=4)


def test_an_unterminated_string_of_escaped_quotes_is_a_syntax_error():
    # Every other character is a quote: a scanner that restarted at each one would be quadratic.
    with pytest.raises(StrictJsonError, match="Unterminated string"):
        loads_strict('["' + '\\"' * 200_000, max_depth=4)
