"""Reporting precision (report/formatting.py).

Reference: APA Publication Manual, 7th ed. (2020), sec. 6.36 (decimal
places: two or three; no leading zero for statistics that cannot exceed 1)
and sec. 6.42 (exact p to three decimals; p < .001 below that).  These are
published style rules, so the expected strings are written out here.
"""

from __future__ import annotations

import math

import pytest

from scalewright.report.formatting import (MINUS, coef, count, dec, dof, interval, p_equals,
                                           percent, plain, pval)


@pytest.mark.parametrize("value, expected", [
    (0.930054983708562, ".930"), (0.04821000526093277, ".048"), (0.0, ".000"),
    (-0.27150430493795275, f"{MINUS}.272"),
])
def test_bounded_statistics_drop_the_leading_zero(value, expected):
    assert coef(value) == expected


def test_a_heywood_loading_beyond_one_keeps_its_integer_part():
    assert coef(1.0532, 2) == "1.05"


@pytest.mark.parametrize("value, expected", [
    (2.0821956565729976e-56, "< .001"), (0.000999, "< .001"), (0.001, ".001"),
    (0.07095915602319608, ".071"), (1.0, "1.000"),
])
def test_p_values_are_exact_to_three_decimals_and_bounded_below_at_001(value, expected):
    assert pval(value) == expected


def test_p_in_running_text_uses_equals_or_less_than():
    assert p_equals(0.0709) == "p = .071"
    assert p_equals(1e-9) == "p < .001"


def test_unbounded_numbers_keep_the_leading_zero_and_use_the_minus_sign():
    assert dec(-0.4120648547823905) == f"{MINUS}0.412"
    assert dec(195.50656668874944, 2) == "195.51"


def test_a_number_that_rounds_to_zero_is_not_negative():
    assert dec(-0.0001) == "0.000"
    assert coef(-0.0004) == ".000"


@pytest.mark.parametrize("missing", [None, math.nan, math.inf])
def test_missing_values_show_as_an_en_dash(missing):
    assert dec(missing) == coef(missing) == pval(missing) == count(missing) == "\u2013"


def test_intervals_are_bracketed_pairs():
    assert interval([0.033141116419951204, 0.061986381589893454]) == "[.033, .062]"
    assert interval(None) == "\u2013"


def test_counts_group_thousands_with_a_thin_space():
    assert count(1060) == "1\u202f060"
    assert count(208) == "208"


def test_degrees_of_freedom_have_no_thousands_separator():
    # APA 7th ed.: degrees of freedom are among the exceptions to commas in numbers
    # of 1,000 or more (from memory)
    assert dof(1212) == "1212"
    assert dof(1140.0) == "1140"
    assert dof(None) == "\u2013"


def test_percent_has_one_decimal():
    assert percent(4.285714285714286) == "4.3%"


def test_plain_text_for_spreadsheets_uses_ascii_minus_and_no_thin_space():
    assert plain(dec(-0.412)) == "-0.412"
    assert plain(count(1060)) == "1060"
    assert plain("\u2013") == ""
