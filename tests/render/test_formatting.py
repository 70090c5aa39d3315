"""Tests of stratagap.render.formatting: the named variants keep each renderer's output."""

import math

import pytest

from stratagap.render.formatting import (column_decimals, format_column, format_number, format_p,
                                         format_p_relation, format_pp, format_risk, format_sig,
                                         format_value)


@pytest.mark.parametrize("p, bare, relation", [
    (0.5, "0.5000", "= 0.500"), (0.0123, "0.0123", "= 0.012"), (0.00987, "0.0099", "= 0.0099"),
    (0.0001, "0.0001", "= 0.0001"), (0.00009, "< 0.0001", "< 0.0001"), (0.0, "< 0.0001", "< 0.0001"),
    (None, "n/a", "n/a")])
def test_p_value_variants(p, bare, relation):
    # the summary and the report write the bare value; the verdict's sentence, "p = 0.012"
    assert format_p(p) == bare
    assert format_p_relation(p) == relation


def test_bare_p_value_of_a_non_finite_float_is_missing():
    assert format_p(math.nan) == format_p(math.inf) == "n/a"


@pytest.mark.parametrize("x, digits, number, value", [
    (1234.5678, 2, "1234.57", "1,234.57"), (0.004, 2, "0.00", "0.004"),
    (-0.004, 3, "-0.004", "-0.004"), (2.5e6, 2, "2500000.00", "2,500,000.00"), (0, 2, "0.00", "0.00"),
    (None, 2, "n/a", "n/a"), (math.nan, 2, "n/a", "n/a"), (math.inf, 3, "n/a", "n/a")])
def test_number_variants(x, digits, number, value):
    assert format_number(x, digits) == number
    assert format_value(x, digits) == value


# issue 10: no scientific notation for amounts such as 1,500 or 3,570 (they read as "1.5e+03")
@pytest.mark.parametrize("x, text", [
    (1500, "1,500"), (3570, "3,570"), (1300.13, "1,300"), (-8497.52, "-8,500"), (1999.6, "2,000"),
    (2.5e6, "2,500,000"), (0.0046146, "0.00461"), (-0.042021, "-0.0420"), (12.345, "12.3"),
    (0.0, "0"), (3e-9, "3e-09"), (None, "n/a"), (math.nan, "n/a")])
def test_significant_digits_without_exponent(x, text):
    assert format_sig(x) == text
    assert "e+" not in format_sig(x)


def test_one_number_of_decimals_per_column():
    # the per-stratum risk differences of the NHEFS run, in percentage points
    column = format_column([-0.00014, -0.025, 0.0154, -0.009, -0.0043], scale=100)
    assert column == ["-0.01", "-2.50", "1.54", "-0.90", "-0.43"]
    assert len({c.split(".")[1].__len__() for c in column}) == 1
    # amounts: the largest sets the decimals, thousands separated, no exponent
    assert format_column([1300.13, -28.71, 2628.96]) == ["1,300", "-29", "2,629"]
    assert format_column([None, 0.5]) == ["n/a", "0.500"]
    assert column_decimals([]) == 0 and column_decimals([0.00001], max_decimals=4) == 4


def test_risks_and_percentage_points():
    assert format_pp(-0.0046146) == "-0.46 pp"
    assert format_risk(0.19172) == "19.2 %"
    assert format_pp(None) == format_risk(math.nan) == "n/a"
