"""The shared numerics in stratagap._base: logistic fits and the column rank rules.

Independent values: statsmodels' GLM and OLS(cov_type="HC2") as reference libraries; Firth's
estimate checked by its defining property (the modified score of Heinze & Schemper 2002, eq. 2,
is zero at the solution) and its finiteness under complete separation (Firth 1993, section 3).
"""

import numpy as np
import pytest
import statsmodels.api as sm
from scipy.special import expit

from stratagap._base.linalg import (hc2_ols, ordered_independent_columns,
                                    pivoted_independent_columns)
from stratagap._base.logistic import firth, fit_ml


def _data(n=400, seed=3):
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(n, 2))
    Z = np.column_stack([np.ones(n), x])
    y = (rng.random(n) < expit(0.3 + x @ [0.8, -0.5])).astype(float)
    return Z, y


def test_fit_ml_equals_statsmodels_glm():
    Z, y = _data()
    fit = fit_ml(Z, y)
    ref = sm.GLM(y, Z, family=sm.families.Binomial()).fit()
    assert fit.problems == [] and fit.converged and not fit.failed
    np.testing.assert_allclose(fit.params, ref.params, rtol=1e-12)
    np.testing.assert_allclose(fit.bse, ref.bse, rtol=1e-12)
    np.testing.assert_allclose(fit.fitted, ref.fittedvalues, rtol=1e-12)


def test_fit_ml_reports_complete_separation():
    Z, _ = _data()
    y = (Z[:, 1] > 0).astype(float)  # the first covariate separates the outcome completely
    fit = fit_ml(Z, y)
    assert fit.failed or fit.statsmodels_warned or not fit.converged
    assert fit.problems, "separation must be reported"


def test_firth_solves_its_modified_score_and_stays_finite_under_separation():
    Z, _ = _data(n=60, seed=5)
    y = (Z[:, 1] > 0).astype(float)
    b, ok = firth(Z, y)
    assert ok and np.all(np.isfinite(b))
    p = expit(Z @ b)
    w = p * (1 - p)
    info_inv = np.linalg.inv(Z.T @ (Z * w[:, None]))
    h = w * np.einsum("ij,jk,ik->i", Z, info_inv, Z)
    score = Z.T @ (y - p + h * (0.5 - p))  # Heinze & Schemper 2002, eq. 2
    assert np.max(np.abs(score)) < 1e-6


def test_ordered_rule_keeps_the_first_of_a_dependent_set():
    Z, _ = _data(n=50)
    D = np.column_stack([Z, Z[:, 1] + 2 * Z[:, 2], Z[:, 0] * 3])
    assert ordered_independent_columns(D).tolist() == [0, 1, 2]
    # reversed order: the duplicate columns now come first and are the ones kept
    assert ordered_independent_columns(D[:, ::-1]).tolist() == [0, 1, 2]
    assert np.linalg.matrix_rank(D[:, pivoted_independent_columns(D)]) == 3
    assert pivoted_independent_columns(D).size == 3


def test_hc2_ols_equals_statsmodels():
    rng = np.random.default_rng(11)
    D = np.column_stack([np.ones(80), rng.integers(0, 2, 80), rng.normal(size=80)])
    y = D @ [1.0, 0.5, -0.2] + rng.normal(size=80) * (1 + D[:, 2] ** 2)
    beta, cov, why = hc2_ols(D, y)
    ref = sm.OLS(y, D).fit(cov_type="HC2")
    assert why is None
    np.testing.assert_allclose(beta, ref.params, rtol=1e-10)
    np.testing.assert_allclose(cov, ref.cov_params(), rtol=1e-10)


@pytest.mark.parametrize("D, reason", [
    (np.ones((3, 4)), "3 units for 4 coefficients"),
    (np.column_stack([np.ones(10), np.arange(10.0), 2 * np.arange(10.0)]), "design rank deficient"),
])
def test_hc2_ols_refuses_what_it_cannot_estimate(D, reason):
    assert hc2_ols(D, np.arange(D.shape[0], dtype=float))[2] == reason


def test_ordered_rule_does_not_depend_on_the_order_of_the_rows():
    # x0 is a combination of the constant and the exposure; x1 is not. Projecting x1 on the
    # rounding-noise direction left by x0 used to drop x1 too, for some row orders only.
    t = np.array([1.0, 1, 0, 0])
    x0 = 2 * t - 1
    x1 = np.array([0.0, 1, 1, 2])
    D = np.column_stack([np.ones(4), t, x0, x1])
    rng = np.random.default_rng(0)
    for _ in range(200):
        perm = rng.permutation(4)
        assert ordered_independent_columns(D[perm]).tolist() == [0, 1, 3]
