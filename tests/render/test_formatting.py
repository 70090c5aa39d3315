"""Tests of stratagap.render.formatting: the named variants keep each renderer's output."""

import math

import pytest

from stratagap.render.formatting import format_number, format_p, format_p_relation, format_value


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
    (-0.004, 3, "-0.004", "-0.004"), (2.5e6, 2, "2500000.00", "2.5e+06"), (0, 2, "0.00", "0.00"),
    (None, 2, "n/a", "n/a"), (math.nan, 2, "n/a", "n/a"), (math.inf, 3, "n/a", "n/a")])
def test_number_variants(x, digits, number, value):
    assert format_number(x, digits) == number
    assert format_value(x, digits) == value
