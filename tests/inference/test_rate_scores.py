"""Rate-test scores checked against statsmodels' Poisson GLM (a reference library)."""

import numpy as np
import pytest
import statsmodels.api as sm

from stratagap.errors import InputError
from stratagap.inference.rate_scores import rate_scores


def _data(seed=3, n=400, S=4):
    rng = np.random.default_rng(seed)
    X = np.column_stack([rng.normal(size=n), rng.binomial(1, 0.4, n)])
    labels = rng.integers(0, S, n)
    pt = rng.uniform(0.5, 5.0, n)
    rate = np.exp(-2.0 + 0.4 * X[:, 0] - 0.5 * X[:, 1] + 0.2 * labels)
    y = rng.poisson(pt * rate).astype(float)
    return y, pt, labels, X


def _glm_mu(y, pt, labels, X):
    """statsmodels GLM Poisson, offset log PT, one dummy per stratum (no intercept)."""
    D = (labels[:, None] == np.unique(labels)[None, :]).astype(float)
    Z = np.column_stack([D, X]) if X is not None else D
    fit = sm.GLM(y, Z, family=sm.families.Poisson(), offset=np.log(pt)).fit(tol=1e-14)
    return fit.fittedvalues, fit.params


def test_matches_statsmodels_glm_with_offset_and_strata():
    # reference: statsmodels GLM Poisson (McCullagh & Nelder 1989 log-linear model)
    y, pt, labels, X = _data()
    scores = rate_scores(y, pt, labels, X)
    mu_ref, params = _glm_mu(y, pt, labels, X)
    np.testing.assert_allclose(scores.expected, mu_ref, rtol=1e-8, atol=1e-10)
    np.testing.assert_allclose(scores.coefficients, params[-2:], rtol=1e-7, atol=1e-9)
    assert scores.converged


def test_residuals_sum_to_zero_within_strata():
    # closed form: the stratum effects' score equations (canonical log link)
    y, pt, labels, X = _data(seed=5)
    r = rate_scores(y, pt, labels, X).values
    np.testing.assert_allclose(np.bincount(labels, weights=r), 0.0, atol=1e-8)


def test_difference_form_is_observed_minus_stratum_rate_times_pt():
    # closed form: mu_i = PT_i E_s / PT_s (stratum effects only)
    y, pt, labels, X = _data(seed=7)
    scores = rate_scores(y, pt, labels, X, statistic="difference")
    E = np.bincount(labels, weights=y)
    P = np.bincount(labels, weights=pt)
    np.testing.assert_allclose(scores.values, y - pt * (E / P)[labels], rtol=1e-12, atol=1e-12)
    mu_ref, _ = _glm_mu(y, pt, labels, None)
    np.testing.assert_allclose(scores.expected, mu_ref, rtol=1e-8, atol=1e-10)


def test_stratum_without_events_gives_zero_residuals():
    # the stratum effect's MLE is at minus infinity: mu = 0, residual 0 (closed form);
    # the other strata agree with statsmodels fitted on them alone
    y, pt, labels, X = _data(seed=11)
    y = np.where(labels == 2, 0.0, y)
    scores = rate_scores(y, pt, labels, X)
    assert np.all(scores.values[labels == 2] == 0.0)
    keep = labels != 2
    mu_ref, _ = _glm_mu(y[keep], pt[keep], labels[keep], X[keep])
    np.testing.assert_allclose(scores.expected[keep], mu_ref, rtol=1e-8, atol=1e-10)


def test_exposed_sum_is_the_poisson_score_for_exposure_at_zero():
    # statsmodels GLM.score at (stratum effects, beta_hat, exposure coefficient 0)
    y, pt, labels, X = _data(seed=13)
    t = np.random.default_rng(1).binomial(1, 0.5, y.size).astype(float)
    scores = rate_scores(y, pt, labels, X)
    _, params = _glm_mu(y, pt, labels, X)
    D = (labels[:, None] == np.unique(labels)[None, :]).astype(float)
    model = sm.GLM(y, np.column_stack([D, X, t]), family=sm.families.Poisson(),
                   offset=np.log(pt))
    score = model.score(np.concatenate([params, [0.0]]))
    assert score[-1] == pytest.approx(float(np.sum(t * scores.values)), rel=1e-8, abs=1e-8)


def test_collinear_and_constant_columns_dropped():
    y, pt, labels, X = _data(seed=17)
    X3 = np.column_stack([X, 2 * X[:, 0], np.ones(y.size)])
    scores = rate_scores(y, pt, labels, X3)
    np.testing.assert_array_equal(scores.columns, [0, 1])
    np.testing.assert_allclose(scores.values, rate_scores(y, pt, labels, X).values, atol=1e-10)


def test_bad_input_names_the_argument():
    y, pt, labels, X = _data()
    with pytest.raises(InputError, match="person_time"):
        rate_scores(y, -pt, labels, X)
    with pytest.raises(InputError, match="event counts"):
        rate_scores(y + 0.5, pt, labels, X)
    with pytest.raises(InputError, match="statistic"):
        rate_scores(y, pt, labels, X, statistic="sum")


def test_row_order_invariance():
    y, pt, labels, X = _data(seed=19)
    perm = np.random.default_rng(0).permutation(y.size)
    a = rate_scores(y, pt, labels, X).values
    b = rate_scores(y[perm], pt[perm], labels[perm], X[perm]).values
    np.testing.assert_allclose(a[perm], b, atol=1e-10)
