"""The statistics, their permutation moments and the tie rule (stratagap.inference.statistic).

Independent values: brute-force enumeration of every within-stratum assignment of tiny strata
(itertools), and the closed form of the variance of a sample total drawn without replacement,
``Var S = n1 n0 / (n (n - 1)) sum (v - vbar)^2`` (Cochran 1977, Sampling Techniques, 3rd ed.,
thm. 2.2; from memory). Tolerances are for exact arithmetic (1e-12).
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

from stratagap._base.layout import StratumLayout
from stratagap.inference.statistic import (TIE_RTOL, Statistic, exposed_sum_moments,
                                           studentized_columns, tie_tolerance)


def _assignments(labels, t):
    """Every exposure vector that keeps the exposed count of each stratum (brute force)."""
    strata = [np.flatnonzero(labels == s) for s in np.unique(labels)]
    choices = [itertools.combinations(ix, int(t[ix].sum())) for ix in strata]
    for pick in itertools.product(*[list(c) for c in choices]):
        z = np.zeros(labels.size, dtype=np.int8)
        for ix in pick:
            z[list(ix)] = 1
        yield z


def _direct(y, z, labels, estimand, name):
    """The statistic from group means and variances, stratum by stratum (no exposed sums)."""
    n, n1 = labels.size, z.sum()
    num = den = 0.0
    for s in np.unique(labels):
        a, b = y[(labels == s) & (z == 1)], y[(labels == s) & (z == 0)]
        w = (a.size + b.size) / n if estimand == "ate" else a.size / n1
        num += w * (a.mean() - b.mean())
        if name == "studentized":
            den += w**2 * (a.var(ddof=1) / a.size + b.var(ddof=1) / b.size)
    if name == "sum":
        return y[z == 1].sum()
    return num / np.sqrt(den) if name == "studentized" else num


def _tiny(seed=0):
    rng = np.random.default_rng(seed)
    labels = np.repeat([0, 1, 2], [6, 5, 4])
    t = np.array([1, 1, 0, 0, 0, 1, 1, 0, 1, 0, 0, 1, 0, 1, 0], dtype=np.int8)
    return rng.normal(size=labels.size).round(3), t, labels


@settings(max_examples=40, deadline=None)
@given(st.lists(st.floats(-20, 20, allow_nan=False), min_size=2, max_size=8), st.data())
def test_exposed_sum_moments_equal_enumeration_of_one_stratum(v, data):
    v = np.array(v)
    n = v.size
    n1 = data.draw(st.integers(1, n - 1))
    sums = np.array([v[list(ix)].sum() for ix in itertools.combinations(range(n), n1)])
    ss = np.sum((v - v.mean()) ** 2)
    mean, var = exposed_sum_moments(float(n), float(n1), v.sum(), ss)
    assert mean == pytest.approx(sums.mean(), rel=1e-12, abs=1e-9)
    # Cochran 1977, thm. 2.2: n1 n0 / (n (n - 1)) sum (v - vbar)^2, against all C(n, n1) subsets
    assert var == pytest.approx(sums.var(), rel=1e-9, abs=1e-9)


def test_a_stratum_of_one_unit_has_no_spread():
    mean, var = exposed_sum_moments(np.array([1.0, 4.0]), np.array([1.0, 2.0]),
                                    np.array([3.0, 10.0]), np.array([0.0, 5.0]))
    assert mean.tolist() == [3.0, 5.0] and var[0] == 0.0
    assert var[1] == pytest.approx(2 * 2 / (4 * 3) * 5.0, rel=1e-15)


@pytest.mark.parametrize("estimand", ["ate", "att"])
@pytest.mark.parametrize("name", ["mean_difference", "sum", "studentized"])
def test_statistic_from_exposed_sums_equals_the_direct_one_for_every_assignment(estimand, name):
    y, t, labels = _tiny(1)
    lay = StratumLayout.build(labels, t, estimand)
    cols = studentized_columns(y, lay) if name == "studentized" else y[:, None]
    stat = Statistic.of(name, lay, cols)
    for z in itertools.islice(_assignments(labels, t), 200):
        value = float(stat(lay.exposed_sums(cols, z)[:, :, None])[0])
        assert value == pytest.approx(_direct(y, z, labels, estimand, name), rel=1e-12,
                                      abs=1e-12)


@pytest.mark.parametrize("name", ["mean_difference", "sum"])
def test_null_moments_equal_the_enumerated_null(name):
    y, t, labels = _tiny(2)
    lay = StratumLayout.build(labels, t, "att")
    stat = Statistic.of(name, lay, y[:, None])
    null = np.array([_direct(y, z, labels, "att", name) for z in _assignments(labels, t)])
    assert null.size == 20 * 10 * 6  # C(6,3) C(5,2) C(4,2)
    mean, var = stat.null_moments(y[:, None])
    assert mean == pytest.approx(null.mean(), abs=1e-12)
    assert var == pytest.approx(null.var(), rel=1e-12)  # variance over equally likely assignments
    a, b = stat.linear_form()
    z = t
    assert np.sum(a * lay.exposed_sums(y[:, None], z)[0] + b) == pytest.approx(
        _direct(y, z, labels, "att", name), rel=1e-12, abs=1e-12)


def test_null_covariance_equals_the_enumerated_covariance_and_the_variance():
    y, t, labels = _tiny(3)
    x = np.random.default_rng(9).normal(size=y.size)
    values = np.column_stack([y, x])
    lay = StratumLayout.build(labels, t, "ate")
    stat = Statistic.of("mean_difference", lay, values)
    V = stat.null_covariance(values)
    null = np.array([[_direct(c, z, labels, "ate", "mean_difference") for c in (y, x)]
                     for z in _assignments(labels, t)])
    np.testing.assert_allclose(V, np.cov(null, rowvar=False, ddof=0), rtol=1e-10, atol=1e-14)
    # the covariance form and the closed-form variance agree to rounding (two arithmetics)
    assert V[0, 0] == pytest.approx(stat.null_moments(values)[1], rel=1e-12)


def test_studentized_has_no_linear_form_and_standard_normal_moments():
    y, t, labels = _tiny(4)
    lay = StratumLayout.build(labels, t, "ate")
    stat = Statistic.of("studentized", lay, studentized_columns(y, lay))
    assert stat.null_moments(y[:, None]) == (0.0, 1.0)
    with pytest.raises(ValueError, match="not linear"):
        stat.linear_form()


def test_tie_tolerance_is_relative_to_the_largest_finite_magnitude():
    null = np.array([1.0, -4.0, np.inf, np.nan, 2.0])
    assert tie_tolerance(3.0, null) == TIE_RTOL * 4.0
    assert tie_tolerance(-8.0, null) == TIE_RTOL * 8.0
    assert tie_tolerance(np.inf, np.array([np.inf])) == 0.0
    rows = np.array([[1.0, -5.0], [0.5, 0.25]])
    np.testing.assert_array_equal(tie_tolerance(np.array([2.0, -3.0]), rows),
                                  TIE_RTOL * np.array([[5.0], [3.0]]))
