"""The natural cubic spline basis, its knot rule, and how the data stage uses them (issue 11)."""

import warnings

import numpy as np
import pandas as pd
import pytest
from scipy.interpolate import CubicSpline

from stratagap.data import prepare
from stratagap.data._splines import (FEW_DISTINCT, FIVE_KNOTS_FROM, KNOT_QUANTILES, SMALL_SAMPLE,
                                     choose_knots, nonlinear_columns)
from stratagap.errors import DataWarning, InputError


def _span_residual(A, B):
    """Largest relative residual of B's columns projected on span(A)."""
    coef, *_ = np.linalg.lstsq(A, B, rcond=None)
    return float(np.max(np.abs(B - A @ coef)) / np.max(np.abs(B)))


def test_basis_by_hand_at_chosen_points():
    # Harrell 2015, eq. 2.25, evaluated by hand for knots (0, 1, 2, 4):
    # N_1(3) = [27 - 1 * (4 - 0)/(4 - 2) + 0] / 16 = 25/16; N_2(3) = [8 - 1 * (4 - 1)/2] / 16 = 6.5/16
    N = nonlinear_columns(np.array([-1.0, 0.5, 3.0]), [0.0, 1.0, 2.0, 4.0])
    np.testing.assert_allclose(N[2], [25 / 16, 6.5 / 16], rtol=1e-14)
    np.testing.assert_allclose(N[1], [0.125 / 16, 0.0], atol=1e-15)
    np.testing.assert_allclose(N[0], [0.0, 0.0], atol=0)


def test_natural_interpolating_spline_lies_in_the_span():
    # A natural cubic interpolant through the knots (scipy, bc_type="natural") is a natural
    # cubic spline with those knots, so 1, x and the N_j must represent it exactly.
    rng = np.random.default_rng(3)
    knots = np.array([-1.6, -0.6, 0.0, 0.6, 1.6])
    f = CubicSpline(knots, rng.normal(size=knots.size), bc_type="natural", extrapolate=True)
    x = np.linspace(-4, 4, 801)
    # scipy extrapolates with the end cubics; a natural spline is linear outside: compare inside
    inside = (x >= knots[0]) & (x <= knots[-1])
    A = np.column_stack([np.ones(x.size), x, nonlinear_columns(x, knots)])
    assert _span_residual(A[inside], f(x[inside])[:, None]) < 1e-10


def test_linear_beyond_the_outer_knots_and_smooth_at_the_knots():
    knots = [-1.0, 0.0, 0.5, 2.0]
    x = np.linspace(-5, 7, 2401)
    N = nonlinear_columns(x, knots)
    d2 = np.diff(N, 2, axis=0)
    outside = (x[1:-1] < knots[0] - 1e-9) | (x[1:-1] > knots[-1] + 1e-9)
    assert np.max(np.abs(d2[outside])) < 1e-12  # second difference 0: linear
    step = x[1] - x[0]
    assert np.max(np.abs(d2)) / step ** 2 < 10  # bounded second derivative: no kinks


def test_same_space_as_formulaic_centred_cubic_regression_spline():
    import formulaic  # a core dependency: a missing one must fail, not skip
    rng = np.random.default_rng(7)
    x = rng.normal(size=500)
    knots, _ = choose_knots(x)
    mm = formulaic.model_matrix(
        f"cr(x, knots={list(knots[1:-1])}, lower_bound={knots[0]}, upper_bound={knots[-1]}, "
        "constraints='center') - 1", pd.DataFrame({"x": x}))
    ours = np.column_stack([np.ones(x.size), x, nonlinear_columns(x, knots)])
    theirs = np.column_stack([np.ones(x.size), mm.to_numpy()])
    assert ours.shape == theirs.shape == (500, len(knots))
    assert _span_residual(theirs, ours) < 1e-10
    assert _span_residual(ours, theirs) < 1e-10


def test_knot_rule():
    rng = np.random.default_rng(1)
    x = rng.normal(size=5000)
    for n, k in ((99, 3), (SMALL_SAMPLE, 4), (FIVE_KNOTS_FROM - 1, 4), (FIVE_KNOTS_FROM, 5)):
        knots, note = choose_knots(x[:n])
        assert len(knots) == k and note is None
        np.testing.assert_allclose(knots, np.quantile(x[:n], KNOT_QUANTILES[k]))
    few = rng.integers(0, FEW_DISTINCT - 1, 5000).astype(float)
    assert len(choose_knots(few)[0]) == 3


def test_heaped_values_drop_duplicate_knots_then_go_linear():
    heaped = np.r_[np.zeros(500), np.linspace(1, 5, 600)]  # the .05 and .275 quantiles are 0
    knots, note = choose_knots(heaped)
    assert len(knots) == 4 and note == "5 knots asked, 4 distinct (heaped values)"
    flat = np.r_[np.zeros(950), np.arange(1.0, 51.0)]
    knots, note = choose_knots(flat)
    assert knots == () and "linear term" in note


def _table(n=400, seed=2):
    rng = np.random.default_rng(seed)
    age = rng.normal(45, 10, n)
    return pd.DataFrame({"t": rng.integers(0, 2, n), "y": rng.normal(size=n), "age": age,
                         "visits": np.r_[np.zeros(n - 10), np.arange(1.0, 11.0)],
                         "smoker": rng.integers(0, 2, n), "site": rng.choice(list("abc"), n)})


def test_prepare_puts_spline_columns_after_the_linear_design():
    df = _table()
    with pytest.warns(DataWarning, match="covariate 'visits'.*linear term"):
        p = prepare(df, exposure="t", outcome="y", covariates=["age", "visits", "smoker", "site"])
    lin = prepare(df, exposure="t", outcome="y", covariates=["age", "visits", "smoker", "site"],
                  terms="linear")
    assert p.n_linear == lin.X.shape[1] == 5
    np.testing.assert_array_equal(p.X[:, :p.n_linear], lin.X)
    assert p.design_names[5:] == ["age: spline 1", "age: spline 2"]
    assert [f.label for f in p.forms] == ["spline(age, 4 knots)", "linear(visits)"]
    assert [f.label for f in lin.forms] == ["linear(age)", "linear(visits)"]
    knots = np.quantile(df["age"], KNOT_QUANTILES[4])  # on the analysed rows (no missing here)
    np.testing.assert_allclose(p.forms[0].knots, knots)
    np.testing.assert_allclose(p.X[:, 5:], nonlinear_columns(df["age"].to_numpy()[p.row_ids], knots))
    assert [tm.name for tm in p.terms] == [tm.name for tm in lin.terms]  # one balance row each


def test_formula_overrides_terms_and_bad_terms_value():
    df = _table()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        p = prepare(df, exposure="t", outcome="y", covariates=None, formula="age + smoker")
    assert p.design_names == ["age", "smoker"] and p.forms == ()
    with pytest.raises(InputError, match="`terms` must be 'spline' or 'linear'"):
        prepare(df, exposure="t", outcome="y", covariates=["age"], terms="cubic")


def test_a_covariate_that_separates_the_groups_is_refused_by_name():
    # a penalized spline score can overlap slightly where the covariates do not: refused first
    df = _table()
    df["t"] = (df["age"] > df["age"].median()).astype(int)
    with pytest.raises(InputError, match="column 'age' separates the groups completely.*no overlap"):
        prepare(df, exposure="t", outcome="y", covariates=["age", "smoker"])
