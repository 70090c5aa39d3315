"""Sensitivity analysis against published values and reference libraries (scipy, the core engine).

Sources beside each check. "From memory" marks values recalled rather than re-read.
"""

import math

import numpy as np
import pytest
from scipy import stats

from stratagap.sensitivity import e_value, gamma_bounds, sensitivity_value, tipping_grid


# ----------------------------------------------------------------------------- E-value
def test_e_value_published_worked_example():
    # VanderWeele & Ding 2017, Ann Intern Med 167:268, worked example (from memory):
    # RR = 3.9 gives an E-value of 7.26; its lower confidence limit 1.8 gives 3.0.
    ev = e_value(3.9, 1.8, 8.7, measure="rr")
    assert round(ev.point, 2) == 7.26
    assert ev.ci_limit == pytest.approx(3.0, abs=1e-12)  # 1.8 + sqrt(1.8 x 0.8) = 3 exactly
    assert ev.limit == "lower"


def test_e_value_standardized_difference_default_level():
    # VanderWeele & Ding 2017: for a standardized difference d, RR ~ exp(0.91 d) and the limit
    # exp(0.91 d - 1.78 SE_d) at the 95 % level (1.78 = 0.91 x 1.96, from memory).
    d, se_d = 0.5, 0.1
    ev = e_value(d, d - 0.196, d + 0.196, measure="difference", outcome_sd=1.0, se=se_d)
    # 1.78 is 0.91 x 1.96 rounded to 2 decimals: the log limit may differ by up to 0.005 x SE_d = 5e-4
    assert ev.rr_limit_used == pytest.approx(math.exp(0.91 * d - 1.78 * se_d), rel=5.1e-4)


# ----------------------------------------------------------------------------- matched pairs, binary
def _pairs(rng, P, p1, p0):
    labels = np.repeat(np.arange(P), 2).astype(np.int64)
    t = np.tile([1, 0], P).astype(np.int8)
    y = (rng.random(2 * P) < np.where(t == 1, p1, p0)).astype(float)
    return y, t, labels


def test_matched_pairs_binomial_over_discordant_pairs():
    # Rosenbaum 2002, sec. 4.3: for binary matched pairs the bound is Binomial(D, Gamma/(1+Gamma))
    # over the D discordant pairs; reference: scipy.stats.binom.
    rng = np.random.default_rng(20)
    y, t, labels = _pairs(rng, 150, 0.55, 0.35)
    pairs = y.reshape(-1, 2)
    disc = pairs[:, 0] != pairs[:, 1]
    D, a = int(disc.sum()), int((pairs[disc, 0] == 1).sum())  # a: discordant pairs with the exposed event
    gammas = [1.0, 1.25, 1.5, 2.0, 3.0]
    b = gamma_bounds(y, t, labels, statistic="sum", gammas=gammas)
    ref = [stats.binom.sf(a - 1, D, g / (1 + g)) for g in gammas]
    np.testing.assert_allclose(b.p_upper, ref, rtol=1e-10)
    # Gamma = 1: the ordinary permutation p-value (exact sign test on discordant pairs)
    assert b.p_upper[0] == pytest.approx(stats.binomtest(a, D, 0.5, alternative="greater").pvalue, rel=1e-10)
    sv = sensitivity_value(y, t, labels, statistic="sum", direction="greater", alpha=0.05)
    assert stats.binom.sf(a - 1, D, sv.gamma / (1 + sv.gamma)) == pytest.approx(0.05, abs=1e-8)


def test_matched_pairs_gamma_one_equals_core_engine():
    # the core test's exact engine (stratagap.inference.permutation, exact convolution for the binary sum)
    from stratagap.inference import permutation
    rng = np.random.default_rng(21)
    y, t, labels = _pairs(rng, 80, 0.6, 0.4)
    res = permutation.stratified_test(y, t, labels, estimand="ate", statistic="sum",
                                      alternative="greater", engine="exact")
    b = gamma_bounds(y, t, labels, statistic="sum", gammas=[1.0])
    assert b.p_upper[0] == pytest.approx(res.p_greater, rel=1e-10)


# ----------------------------------------------------------------------------- one 2x2 table
@pytest.mark.parametrize("table", [((7, 3), (3, 9)), ((12, 8), (5, 15)), ((2, 18), (9, 11))])
def test_single_two_by_two(table):
    (a, b), (c, d) = table  # rows exposed/reference, columns event/no event
    y = np.r_[np.ones(a), np.zeros(b), np.ones(c), np.zeros(d)]
    t = np.r_[np.ones(a + b), np.zeros(c + d)].astype(np.int8)
    labels = np.zeros(y.size, np.int64)
    M, n_ev, N = y.size, a + c, a + b
    gammas = [1.0, 1.5, 2.0, 4.0]
    # Rosenbaum 2002, sec. 4.4: one stratum, u = outcome: Fisher's noncentral hypergeometric, odds Gamma
    g = gamma_bounds(y, t, labels, statistic="sum", direction="greater", gammas=gammas)
    ref = [stats.nchypergeom_fisher.sf(a - 1, M, n_ev, N, gam) for gam in gammas]
    np.testing.assert_allclose(g.p_upper, ref, rtol=1e-8)
    # the other side: exposed non-events are the count that grows
    l = gamma_bounds(y, t, labels, statistic="sum", direction="less", gammas=gammas)
    ref_l = [stats.nchypergeom_fisher.sf(b - 1, M, b + d, N, gam) for gam in gammas]
    np.testing.assert_allclose(l.p_upper, ref_l, rtol=1e-8)
    # Gamma = 1: Fisher's exact test, one-sided only (its two-sided rule differs from ours)
    assert g.p_upper[0] == pytest.approx(stats.fisher_exact([[a, b], [c, d]], alternative="greater").pvalue,
                                         rel=1e-10)
    assert l.p_upper[0] == pytest.approx(stats.fisher_exact([[a, b], [c, d]], alternative="less").pvalue,
                                         rel=1e-10)


def test_several_strata_convolution_against_scipy_pmfs():
    # independent reference: per-stratum scipy.stats.nchypergeom_fisher pmfs convolved with numpy
    rng = np.random.default_rng(22)
    sizes = [(30, 12), (45, 20), (25, 6), (60, 30)]
    ys, ts, ls = [], [], []
    for s, (n, n1) in enumerate(sizes):
        t = np.r_[np.ones(n1), np.zeros(n - n1)].astype(np.int8)
        ys.append((rng.random(n) < np.where(t == 1, 0.5, 0.3)).astype(float))
        ts.append(t)
        ls.append(np.full(n, s))
    y, t, labels = np.concatenate(ys), np.concatenate(ts), np.concatenate(ls).astype(np.int64)
    count = int(y @ t)
    for gam in (1.0, 1.6, 2.5):
        law = np.ones(1)
        for s, (n, n1) in enumerate(sizes):
            m = int(y[labels == s].sum())
            law = np.convolve(law, stats.nchypergeom_fisher.pmf(np.arange(n1 + 1), n, m, n1, gam))
        ref = law[count:].sum()
        got = gamma_bounds(y, t, labels, statistic="sum", gammas=[gam]).p_upper[0]
        assert got == pytest.approx(ref, rel=1e-7)


# ----------------------------------------------------------------------------- the core test at Gamma = 1
def _quintile_data(seed, effect, n=1500):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, 3))
    score = 1 / (1 + np.exp(-(X @ [0.8, -0.5, 0.3])))
    t = (rng.random(n) < score).astype(np.int8)
    labels = np.searchsorted(np.quantile(score, [0.2, 0.4, 0.6, 0.8]), score).astype(np.int64)
    y = X @ [1.0, 0.5, -0.7] + effect * t + rng.normal(size=n)
    return y, X, t, labels


@pytest.mark.parametrize("estimand", ["ate", "att"])
def test_gamma_one_equals_core_normal_engine(estimand):
    from stratagap.inference import permutation
    y, X, t, labels = _quintile_data(23, 0.15)
    r = permutation.residualize(y, X, labels)
    res = permutation.stratified_test(r, t, labels, estimand=estimand, alternative="greater", engine="normal")
    b = gamma_bounds(r, t, labels, estimand=estimand, gammas=[1.0, 1.3])
    assert b.observed == pytest.approx(res.statistic, rel=1e-10)
    assert b.p_upper[0] == pytest.approx(res.normal_p_greater, rel=1e-10)
    assert b.p_separable[0] == pytest.approx(res.normal_p_greater, rel=1e-10)
    assert b.p_upper[1] > b.p_upper[0]


def test_gamma_one_agrees_with_core_monte_carlo():
    # Tolerance: 4 Monte Carlo SEs, sqrt(p (1 - p) / B), plus the normal approximation's own
    # error, O(1/n_min) for symmetric residuals (Edgeworth: the O(1/sqrt(n)) term is
    # proportional to the skewness, ~0 for normal errors), taken as 1/n_min with n_min the
    # smallest group in a stratum.
    from stratagap.inference import permutation
    y, X, t, labels = _quintile_data(24, 0.10)
    r = permutation.residualize(y, X, labels)
    B = 4000
    mc = permutation.stratified_test(r, t, labels, estimand="ate", alternative="greater",
                                     engine="monte_carlo", resamples=B, seed=7)
    bound = gamma_bounds(r, t, labels, gammas=[1.0]).p_upper[0]
    n_min = min(min((t[labels == s] == 1).sum(), (t[labels == s] == 0).sum()) for s in range(5))
    p = mc.p_greater
    assert abs(p - bound) <= 4 * math.sqrt(p * (1 - p) / B) + 1.0 / n_min


# ----------------------------------------------------------------------------- tipping point
def test_tipping_point_lin_psaty_kronmal_closed_form():
    # Lin, Psaty & Kronmal 1998, Biometrics 54:948: ratio-scale bias (1 + (G-1) p1)/(1 + (G-1) p0).
    # Hand computation: RR 2.0, U with G = 3, p1 = 0.5, p0 = 0.1: bias 2.0/1.2, corrected 1.2.
    g = tipping_grid(2.0, 1.5, 2.6, measure="rr", prevalence_gap_grid=[0.4], outcome_effect_grid=[3.0],
                     reference_prevalence=0.1)
    assert g.corrected_estimate[0] == pytest.approx(1.2, rel=1e-12)
    assert g.corrected_ci_low[0] == pytest.approx(1.5 * 1.2 / 2.0, rel=1e-12)
