"""Scores of censored follow-up: checks against statsmodels and brute-force enumeration.

Sources: the exposed sum of martingale residuals of the covariates-only Cox model equals the
partial-likelihood score for exposure at 0 (Therneau & Grambsch 2000, sec. 4.6), checked
against statsmodels ``PHReg.score``; the stratified log-rank chi-square
(Klein & Moeschberger 2003, sec. 7.5) against statsmodels ``survdiff(..., strata=...)``; the
permutation distribution against full enumeration of the within-strata assignments.
"""

import itertools

import numpy as np
import pytest
from statsmodels.duration.hazard_regression import PHReg
from statsmodels.duration.survfunc import survdiff

from stratagap.inference import stratified_test
from stratagap.inference.statistic import exposed_sum_moments
from stratagap.inference.survival_scores import (breslow_cumulative_hazard, logrank_moments,
                                                 survival_scores)


def _data(n=300, seed=1, ties=False):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, 3))
    t = (rng.random(n) < 1 / (1 + np.exp(-X[:, 0]))).astype(np.int8)
    labels = np.digitize(X[:, 0], [-0.5, 0.5]).astype(np.int64)
    ev_time = rng.exponential(1 / np.exp(0.5 * X[:, 0] - 0.3 * X[:, 1] + 0.4 * t))
    cens = rng.exponential(1.5, size=n)
    time = np.minimum(ev_time, cens)
    if ties:
        time = np.ceil(time * 10) / 10  # many tied times
    event = (ev_time <= cens).astype(float)
    return time, event, t, X, labels


@pytest.mark.parametrize("ties", [False, True])
def test_martingale_exposed_sum_is_cox_score_at_zero(ties):
    time, event, t, X, labels = _data(ties=ties)
    scores = survival_scores(time, event, labels, X, kind="martingale")
    assert scores.kind == "martingale" and scores.converged
    beta = PHReg(time, X, status=event, strata=labels, ties="breslow").fit().params
    full = PHReg(time, np.column_stack([X, t]), status=event, strata=labels, ties="breslow")
    u = full.score(np.concatenate([beta, [0.0]]))  # statsmodels partial-likelihood score
    assert np.sum(scores.values * t) == pytest.approx(u[-1], abs=1e-10)
    assert np.allclose(u[:-1], 0, atol=1e-6)  # beta_hat solves the covariates' equations
    for s in np.unique(labels):  # residuals sum to zero within strata
        assert abs(scores.values[labels == s].sum()) < 1e-10


@pytest.mark.parametrize("ties", [False, True])
def test_logrank_against_survdiff(ties):
    time, event, t, X, labels = _data(ties=ties, seed=3)
    o_e, v = logrank_moments(time, event, t, labels)
    chisq, _ = survdiff(time, event, t, strata=labels)  # statsmodels stratified log-rank
    assert o_e**2 / v == pytest.approx(chisq, abs=1e-10)
    scores = survival_scores(time, event, labels, None, kind="logrank")
    assert np.sum(scores.values * t) == pytest.approx(o_e, abs=1e-10)


def test_breslow_jump_included_at_own_time():
    # one stratum, times 1, 2, 3 all events, risk 1: Lambda(1) = 1/3, Lambda(2) = 1/3 + 1/2
    lam = breslow_cumulative_hazard([1.0, 2.0, 3.0], [1, 1, 1], [1, 1, 1], np.zeros(3, int))
    assert np.allclose(lam, [1 / 3, 1 / 3 + 1 / 2, 1 / 3 + 1 / 2 + 1])  # hand-worked
    lam0 = breslow_cumulative_hazard([0.5, 2.0], [0, 1], [1, 1], np.zeros(2, int))
    assert lam0[0] == 0.0  # before the stratum's first event


def test_permutation_against_full_enumeration():
    time = np.array([2.0, 3.5, 1.0, 4.0, 5.0, 0.5, 2.5, 3.0, 6.0])
    event = np.array([1, 0, 1, 1, 0, 1, 0, 1, 1], float)
    t = np.array([1, 0, 1, 0, 0, 1, 0, 1, 0], np.int8)
    labels = np.array([0, 0, 0, 0, 0, 1, 1, 1, 1], np.int64)
    values = survival_scores(time, event, labels, None, kind="logrank").values
    observed = np.sum(values * t)
    idx = [np.flatnonzero(labels == s) for s in (0, 1)]
    k = [int(t[i].sum()) for i in idx]
    sums = [[values[i][list(c)].sum() for c in itertools.combinations(range(len(i)), kk)]
            for i, kk in zip(idx, k)]
    totals = np.array([a + b for a in sums[0] for b in sums[1]])  # every assignment
    # moments of the exposed sum: closed form against enumeration
    mean, var = 0.0, 0.0
    for i, kk in zip(idx, k):
        vs = values[i]
        m, v = exposed_sum_moments(len(i), kk, vs.sum(), np.sum((vs - vs.mean())**2))
        mean, var = mean + m, var + v
    assert totals.mean() == pytest.approx(mean, abs=1e-12)
    assert totals.var() == pytest.approx(var, abs=1e-12)
    z2 = (totals - mean) ** 2 / var
    z2_obs = (observed - mean) ** 2 / var
    p_z2 = np.mean(z2 >= z2_obs * (1 - 1e-12))
    res = stratified_test(values, t, labels, estimand="ate", statistic="sum", engine="exact")
    assert res.exact
    assert res.p_greater == pytest.approx(np.mean(totals >= observed - 1e-12), abs=1e-12)
    assert res.p_less == pytest.approx(np.mean(totals <= observed + 1e-12), abs=1e-12)
    # the permutation z^2 differs from the log-rank chi-square only through the variance
    o_e, v_hyper = logrank_moments(time, event, t, labels)
    assert observed - mean == pytest.approx(o_e, abs=1e-12)
    assert z2_obs * var / v_hyper == pytest.approx(o_e**2 / v_hyper, abs=1e-12)
    assert 0 < p_z2 <= 1 and var != pytest.approx(v_hyper, rel=1e-6)


def test_scores_ignore_exposure_and_row_order():
    time, event, t, X, labels = _data(seed=5)
    a = survival_scores(time, event, labels, X).values
    perm = np.random.default_rng(0).permutation(time.size)
    b = survival_scores(time[perm], event[perm], labels[perm], X[perm]).values
    assert np.allclose(a[perm], b, atol=1e-10)


def test_bad_input():
    with pytest.raises(Exception, match="`time` must be finite and > 0"):
        survival_scores(np.array([1.0, 0.0]), np.array([1.0, 0.0]), np.zeros(2, int))
    with pytest.raises(Exception, match="`event` must be 0"):
        survival_scores(np.array([1.0, 2.0]), np.array([2.0, 0.0]), np.zeros(2, int))


def test_higher_hazard_in_exposed_gives_positive_exposed_sum():
    # `--alternative greater` means higher risk in the exposed group: their scores are larger
    time, event, t, X, labels = _data(n=600, seed=7)  # exposure multiplies the hazard by 1.5
    for kind in ("martingale", "logrank"):
        values = survival_scores(time, event, labels, X, kind=kind).values
        res = stratified_test(values, t, labels, estimand="ate", alternative="greater",
                              resamples=999, seed=1)
        assert res.statistic > 0 and res.p_value < 0.05
