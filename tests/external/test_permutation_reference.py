"""The permutation engine against reference libraries (scipy, statsmodels).

* One stratum, Monte Carlo: ``scipy.stats.permutation_test`` (permutation_type='independent',
  vectorized difference of means) gives the same p-value within Monte Carlo error.
* Binary outcome, sum of exposed events: the two-sided normal p-value is the
  Cochran--Mantel--Haenszel test of ``statsmodels.stats.contingency_tables.StratifiedTable
  .test_null_odds(correction=False)`` (chi^2 = z^2; Mantel & Haenszel 1959, JNCI 22:719).
* ``residualize`` equals the residuals of statsmodels OLS with one dummy per stratum
  (Rosenbaum 2002, Statistical Science 17:286, covariance adjustment).
"""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from scipy import stats
from statsmodels.stats.contingency_tables import StratifiedTable

from stratagap.inference import permutation as P


@pytest.mark.parametrize("alternative", ["two-sided", "greater", "less"])
def test_one_stratum_matches_scipy_permutation_test(alternative):
    rng = np.random.default_rng(20)
    n1, n0 = 40, 60
    a = rng.normal(0.35, 1.0, n1)
    b = rng.normal(0.0, 1.5, n0)
    y = np.concatenate([a, b])
    t = np.r_[np.ones(n1), np.zeros(n0)].astype(np.int8)
    labels = np.zeros(y.size, dtype=np.int64)
    B = 20000

    def diff(x, z, axis):
        return np.mean(x, axis=axis) - np.mean(z, axis=axis)

    ref = stats.permutation_test((a, b), diff, permutation_type="independent",
                                 vectorized=True, n_resamples=B, alternative=alternative,
                                 random_state=np.random.default_rng(1))
    ours = P.stratified_test(y, t, labels, estimand="ate", alternative=alternative,
                             engine="monte_carlo", resamples=B, seed=1)
    assert ours.statistic == pytest.approx(ref.statistic, abs=1e-12)
    # Two independent MC estimates of the same p: each has SE sqrt(p(1-p)/B) (binomial; for
    # two-sided, scipy and we both double a one-sided tail, so the SE doubles: 2 sqrt(...)).
    # Combined SE = sqrt(2) * that; 4 combined SEs, plus 2/B for the (b+1)/(B+1) convention.
    p = ref.pvalue
    k = 2.0 if alternative == "two-sided" else 1.0
    se = k * np.sqrt(max(p * (1 - p), 1 / B) / B) * np.sqrt(2)
    assert abs(ours.p_value - p) < 4 * se + 2 / B


def _binary_strata(seed):
    rng = np.random.default_rng(seed)
    sizes = [80, 120, 60, 150]
    labels = np.repeat(np.arange(4), sizes)
    x = labels / 3.0
    t = (rng.random(labels.size) < 0.25 + 0.15 * x).astype(np.int8)
    y = (rng.random(labels.size) < 0.15 + 0.1 * x + 0.12 * t).astype(float)
    return y, t, labels


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_sum_statistic_normal_p_is_the_cmh_test(seed):
    y, t, labels = _binary_strata(seed)
    tables = []
    for s in range(4):
        m = labels == s
        tables.append([[np.sum((t == 1) & (y == 1) & m), np.sum((t == 1) & (y == 0) & m)],
                       [np.sum((t == 0) & (y == 1) & m), np.sum((t == 0) & (y == 0) & m)]])
    ref = StratifiedTable(np.array(tables, dtype=float).transpose(1, 2, 0))
    cmh = ref.test_null_odds(correction=False)
    r = P.stratified_test(y, t, labels, estimand="ate", statistic="sum")
    z2 = (r.statistic - r.normal_mean) ** 2 / r.normal_variance
    assert z2 == pytest.approx(cmh.statistic, rel=1e-10)  # chi^2 = z^2
    assert r.normal_p_value == pytest.approx(cmh.pvalue, rel=1e-10, abs=1e-14)
    # the exact convolution is the conditional null of the same statistic: close to normal here
    assert r.engine == "exact" and abs(r.p_value - cmh.pvalue) < 0.05


@pytest.mark.parametrize("p", [0, 1, 3])
def test_residualize_equals_ols_with_stratum_dummies(p):
    rng = np.random.default_rng(30 + p)
    n = 300
    labels = rng.integers(0, 5, n)
    labels[:7] = -1  # set aside: ignored, NaN residual
    X = rng.normal(size=(n, p))
    y = X @ rng.normal(size=p) + labels + rng.normal(size=n)
    r = P.residualize(y, X, labels)
    keep = labels >= 0
    dummies = (labels[keep][:, None] == np.arange(5)[None, :]).astype(float)
    fit = sm.OLS(y[keep], np.column_stack([dummies, X[keep]])).fit()
    assert np.allclose(r[keep], fit.resid, atol=1e-10)
    assert np.all(np.isnan(r[~keep]))


def test_residualize_rank_deficient_design():
    rng = np.random.default_rng(5)
    n = 200
    labels = rng.integers(0, 3, n)
    x = rng.normal(size=n)
    X = np.column_stack([x, 2 * x, labels.astype(float)])  # collinear, and constant in strata
    y = x + rng.normal(size=n)
    r = P.residualize(y, X, labels)
    dummies = (labels[:, None] == np.arange(3)[None, :]).astype(float)
    fit = sm.OLS(y, np.column_stack([dummies, x])).fit()
    assert np.allclose(r, fit.resid, atol=1e-10)
