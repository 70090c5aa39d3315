"""Unit tests of stratagap.sensitivity: E-values, Rosenbaum-type bounds, tipping point.

Independent values come from closed forms and from brute-force enumeration of the sensitivity
model on tiny strata (every vertex u in {0,1}^N and every exposure assignment).
"""

import itertools
import json
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from stratagap.errors import InputError
from stratagap.sensitivity import _nchyper, _gamma_bounds as _rosenbaum
from stratagap.sensitivity import (
    covariate_benchmarks,
    e_value,
    gamma_bounds,
    sensitivity_value,
    tipping_grid,
)

# ----------------------------------------------------------------------------- E-value


def _bias_factor(e):
    """Ding & VanderWeele 2016 bounding factor B = RR_UD RR_EU / (RR_UD + RR_EU - 1) at RR_UD = RR_EU = e."""
    return e * e / (2 * e - 1)


@pytest.mark.parametrize("rr", [1.01, 1.5, 3.9, 12.0])
def test_e_value_solves_the_bounding_factor(rr):
    # closed form: the E-value is the common strength e whose bounding factor equals RR
    ev = e_value(rr, rr * 0.9, rr * 1.1, measure="rr")
    assert _bias_factor(ev.point) == pytest.approx(rr, rel=1e-12)


def test_e_value_protective_is_inverted():
    a = e_value(0.5, 0.3, 0.8, measure="rr")
    b = e_value(2.0, 1.25, 1 / 0.3, measure="rr")
    assert a.point == pytest.approx(b.point, rel=1e-12)
    assert a.limit == "upper" and a.ci_limit == pytest.approx(b.ci_limit, rel=1e-12)


def test_e_value_ci_including_null_is_one():
    ev = e_value(1.3, 0.9, 1.8, measure="rr")
    assert ev.ci_limit == 1.0 and ev.rr_limit_used is None
    assert e_value(1.0, 0.8, 1.2, measure="rr").point == 1.0


def test_e_value_odds_ratio_rare_and_common():
    rare = e_value(2.5, 1.5, 4.0, measure="or", baseline_risk=0.05)
    assert rare.point == pytest.approx(e_value(2.5, 1.5, 4.0, measure="rr").point, rel=1e-12)
    common = e_value(2.5, 1.5, 4.0, measure="or", baseline_risk=0.3)
    r = math.sqrt(2.5)  # VanderWeele & Ding 2017: common outcome, RR ~ sqrt(OR)
    assert common.point == pytest.approx(r + math.sqrt(r * (r - 1)), rel=1e-12)
    assert "common" in common.conversion and "sqrt" in common.computed_from


def test_e_value_mean_difference_uses_alpha_z():
    # d = 0.4, SE_d = 0.1; limit exp(0.91 (d - z SE_d)) with z for alpha = 0.1 (1.6449), not 1.96
    ev = e_value(2.0, 1.0, 3.0, measure="difference", outcome_sd=5.0, se=0.5, alpha=0.10)
    z = stats.norm.isf(0.05)
    rr_lim = math.exp(0.91 * 0.4 - 0.91 * z * 0.1)
    assert ev.rr_limit_used == pytest.approx(rr_lim, rel=1e-12)
    assert ev.ci_limit == pytest.approx(rr_lim + math.sqrt(rr_lim * (rr_lim - 1)), rel=1e-12)
    assert ev.rr_used == pytest.approx(math.exp(0.91 * 0.4), rel=1e-12)
    assert "pooled within-group SD" in ev.computed_from


def test_e_value_errors():
    with pytest.raises(InputError, match="baseline_risk"):
        e_value(2.0, 1.5, 3.0, measure="or")
    with pytest.raises(InputError, match="outcome_sd"):
        e_value(2.0, 1.5, 3.0, measure="difference")
    with pytest.raises(InputError, match="ci_low"):
        e_value(2.0, 2.5, 3.0, measure="rr")
    with pytest.raises(InputError, match="measure"):
        e_value(2.0, 1.5, 3.0, measure="hazard")


def test_e_value_to_dict_round_trip():
    d = e_value(3.9, 1.8, 8.7, measure="rr").to_dict()
    assert json.loads(json.dumps(d)) == d
    assert set(d) >= {"point", "ci_limit", "computed_from", "rr_used"}


# ----------------------------------------------------------------------------- brute force helpers


def _assignments(n, n1):
    return [np.isin(np.arange(n), c).astype(float) for c in itertools.combinations(range(n), n1)]


def _stratum_law(v, n1, u, gamma):
    """Distribution of S_s = sum Z_i v_i under P(Z) proportional to Gamma^(u . Z), by enumeration."""
    zs = _assignments(len(v), n1)
    w = np.array([gamma ** (z @ u) for z in zs])
    return np.array([z @ v for z in zs]), w / w.sum()


def _tiny_strata(rng, sizes, binary):
    vals, t, lab = [], [], []
    for s, (n, n1) in enumerate(sizes):
        v = (rng.random(n) < 0.5).astype(float) if binary else rng.normal(size=n)
        z = np.zeros(n, np.int8)
        z[rng.choice(n, n1, replace=False)] = 1
        vals.append(v + (0 if binary else 0.8 * z))
        t.append(z)
        lab.append(np.full(n, s))
    return np.concatenate(vals), np.concatenate(t), np.concatenate(lab).astype(np.int64)


# ----------------------------------------------------------------------------- binary exact bound


def _vertex_laws(v, n1, gamma):
    """For every vertex u of one stratum, the enumerated law of S_s (values, probabilities)."""
    return [_stratum_law(v, n1, np.array(u), gamma) for u in itertools.product((0.0, 1.0), repeat=len(v))]


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_binary_exact_bound_equals_max_over_all_vertices(seed):
    rng = np.random.default_rng(seed)
    sizes = [(4, 2), (3, 1), (4, 1)]
    y, t, lab = _tiny_strata(rng, sizes, binary=True)
    count = int(round(y @ t))
    gammas = [1.0, 1.7, 3.0]
    got = gamma_bounds(y, t, lab, statistic="sum", gammas=gammas)
    assert got.method == "exact"
    for g, p in zip(gammas, got.p_upper):
        # per stratum and per vertex: pmf of the exposed-event count by enumerating assignments
        pmfs = []
        for s, (n, n1) in enumerate(sizes):
            rows = []
            for vals, prob in _vertex_laws(y[lab == s], n1, g):
                rows.append(np.bincount(np.rint(vals).astype(int), weights=prob, minlength=n1 + 1))
            pmfs.append(rows)
        worst = 0.0
        for combo in itertools.product(*pmfs):  # every vertex u in {0,1}^N
            law = combo[0]
            for part in combo[1:]:
                law = np.convolve(law, part)
            worst = max(worst, law[count:].sum())
        assert p == pytest.approx(worst, rel=1e-10, abs=1e-14)


def test_binary_less_direction_is_lower_tail():
    rng = np.random.default_rng(5)
    y, t, lab = _tiny_strata(rng, [(5, 2), (4, 2)], binary=True)
    count = y @ t
    got = gamma_bounds(y, t, lab, statistic="sum", direction="less", gammas=[1.0]).p_upper[0]
    # Gamma = 1: exact permutation lower tail by enumeration
    laws = [_stratum_law(y[lab == s], int(t[lab == s].sum()), np.zeros((lab == s).sum()), 1.0) for s in (0, 1)]
    tail = sum(laws[0][1][i] * laws[1][1][j] for i in range(len(laws[0][0])) for j in range(len(laws[1][0]))
               if laws[0][0][i] + laws[1][0][j] <= count + 1e-9)
    assert got == pytest.approx(tail, rel=1e-12)


def test_binary_large_falls_back_to_normal(monkeypatch):
    monkeypatch.setattr(_rosenbaum, "EXACT_CONVOLUTION_BUDGET", 1.0)
    rng = np.random.default_rng(3)
    n = 400
    lab = rng.integers(0, 4, n)
    t = (rng.random(n) < 0.4).astype(np.int8)
    y = (rng.random(n) < 0.3 + 0.2 * t).astype(float)
    b = gamma_bounds(y, t, lab, statistic="sum", gammas=[1.0, 2.0])
    assert b.method == "normal_binary"
    # Gamma = 1: Mantel-Haenszel moments of the exposed-events count (hypergeometric per stratum)
    mu = var = 0.0
    for s in range(4):
        m_s, n_s, n1_s = y[lab == s].sum(), (lab == s).sum(), t[lab == s].sum()
        mu += stats.hypergeom.mean(n_s, m_s, n1_s)
        var += stats.hypergeom.var(n_s, m_s, n1_s)
    assert b.p_upper[0] == pytest.approx(stats.norm.sf((y @ t - mu) / math.sqrt(var)), rel=1e-10)


# ----------------------------------------------------------------------------- normal bracket


def _closed_form_gamma1(v, t, lab, estimand, statistic):
    """Randomization normal p-value: E S_s = n1 R/n, Var S_s = n1 n0 / (n (n-1)) SS (closed form)."""
    T = mu = var = 0.0
    S_all = np.unique(lab)
    n_tot, n1_tot = len(v), t.sum()
    for s in S_all:
        vs, ts = v[lab == s], t[lab == s]
        n, n1 = len(vs), ts.sum()
        n0 = n - n1
        w = n / n_tot if estimand == "ate" else n1 / n1_tot
        c, b = (w * (1 / n1 + 1 / n0), -w * vs.sum() / n0) if statistic == "mean_difference" else (1.0, 0.0)
        T += c * (vs @ ts) + b
        mu += c * n1 * vs.sum() / n + b
        var += c * c * n1 * n0 / (n * (n - 1)) * ((vs - vs.mean()) ** 2).sum()
    return stats.norm.sf((T - mu) / math.sqrt(var))


@pytest.mark.parametrize("estimand", ["ate", "att"])
@pytest.mark.parametrize("statistic", ["mean_difference", "sum"])
def test_gamma_one_equals_closed_form(estimand, statistic):
    rng = np.random.default_rng(11)
    n = 500
    lab = rng.integers(0, 5, n)
    t = (rng.random(n) < 0.35).astype(np.int8)
    v = rng.normal(size=n) + 0.2 * t
    b = gamma_bounds(v, t, lab, estimand=estimand, statistic=statistic, gammas=[1.0, 1.5])
    ref = _closed_form_gamma1(v, t, lab, estimand, statistic)
    assert b.p_upper[0] == pytest.approx(ref, rel=1e-10)
    assert b.p_separable[0] == pytest.approx(ref, rel=1e-10)
    less = gamma_bounds(v, t, lab, estimand=estimand, statistic=statistic, direction="less", gammas=[1.0])
    assert less.p_upper[0] == pytest.approx(1 - ref, rel=1e-10)


def _stratum_coefs(v, t, lab, estimand):
    n_tot, n1_tot = len(v), t.sum()
    out = []
    for s in np.unique(lab):
        m = lab == s
        vs, ts = v[m], t[m]
        n, n1 = len(vs), int(ts.sum())
        w = n / n_tot if estimand == "ate" else n1 / n1_tot
        out.append((vs, ts, n1, w * (1 / n1 + 1 / (n - n1)), -w * vs.sum() / (n - n1)))
    return out


def _worst_normal_p(v, t, lab, gamma, estimand="ate", cuts_only=False):
    """Max over vertices of the normal-approximation p-value, moments of S_s by enumeration."""
    T, mus, vars_ = 0.0, [], []
    for vs, ts, n1, c, b in _stratum_coefs(v, t, lab, estimand):
        T += c * (vs @ ts) + b
        if cuts_only:
            order = np.argsort(vs)
            us = []
            for k in range(len(vs) + 1):
                u = np.zeros(len(vs))
                u[order[len(vs) - k:]] = 1.0
                us.append(u)
        else:
            us = [np.array(u) for u in itertools.product((0.0, 1.0), repeat=len(vs))]
        laws = [_stratum_law(vs, n1, u, gamma) for u in us]
        e = np.array([p @ x for x, p in laws])
        mus.append(c * e + b)
        vars_.append(c * c * np.array([p @ (x - p @ x) ** 2 for x, p in laws]))
    mu = sum(np.ix_(*mus)[i] for i in range(len(mus)))  # every combination of per-stratum vertices
    var = sum(np.ix_(*vars_)[i] for i in range(len(vars_)))
    return float(stats.norm.sf((T - mu) / np.sqrt(var)).max())


@pytest.mark.parametrize("seed,gamma,shift", [(0, 1.5, 0.8), (1, 2.5, 0.8), (2, 4.0, 0.0), (3, 1.2, 1.5)])
def test_bracket_contains_vertex_worst_case(seed, gamma, shift):
    rng = np.random.default_rng(seed)
    v, t, lab = _tiny_strata(rng, [(5, 2), (6, 3)], binary=False)
    v = v - (0.8 - shift) * t
    b = gamma_bounds(v, t, lab, gammas=[gamma])
    worst = _worst_normal_p(v, t, lab, gamma)
    assert b.p_separable[0] <= worst * (1 + 1e-10)
    assert worst <= b.p_upper[0] * (1 + 1e-10)
    # the separable end is never above the best cut vertex
    assert b.p_separable[0] <= _worst_normal_p(v, t, lab, gamma, cuts_only=True) * (1 + 1e-10)


@pytest.mark.parametrize("seed,gamma", [(8, 2.0), (14, 5.0), (33, 5.0), (57, 2.0)])
def test_bracket_upper_end_needed_for_skewed_values(seed, gamma):
    # skewed values (cubes): here the worst vertex is NOT the separable one, so the conservative
    # end is what keeps the bracket valid
    rng = np.random.default_rng(seed)
    v, t, lab = _tiny_strata(rng, [(4, 2), (5, 2)], binary=False)
    v = v**3
    b = gamma_bounds(v, t, lab, gammas=[gamma])
    worst = _worst_normal_p(v, t, lab, gamma)
    assert b.p_separable[0] < worst <= b.p_upper[0] * (1 + 1e-10)


def test_cut_moments_match_enumeration():
    rng = np.random.default_rng(4)
    v = np.sort(rng.normal(size=7))
    for n1 in (1, 3, 5):
        mu, var, var_hi, var_lo, exact = _nchyper._cut_moments(7, n1, v[None, :], 2.3)
        assert exact
        for k in range(8):
            u = np.r_[np.zeros(7 - k), np.ones(k)]
            vals, p = _stratum_law(v, n1, u, 2.3)
            e = p @ vals
            assert mu[0, k] == pytest.approx(e, rel=1e-12, abs=1e-12)
            assert var[0, k] == pytest.approx(p @ (vals - e) ** 2, rel=1e-10, abs=1e-12)
        # variance bounds hold for every vertex (not only cuts) with the same number of ones
        for u in itertools.product((0.0, 1.0), repeat=7):
            u = np.array(u)
            vals, p = _stratum_law(v, n1, u, 2.3)
            k = int(u.sum())
            vv = p @ (vals - p @ vals) ** 2
            assert var_lo[0, k] * (1 - 1e-10) - 1e-12 <= vv <= var_hi[0, k] * (1 + 1e-10) + 1e-12
            assert p @ vals <= mu[0].max() + 1e-12


def test_nch_moments_against_scipy_and_large_stratum():
    K = np.arange(0, 61, 7)
    mean, var, exact = _nchyper._nch_moments(60, K, 25, 1.8)
    ref_m, ref_v = stats.nchypergeom_fisher.stats(60, K, 25, 1.8, moments="mv")
    assert exact
    np.testing.assert_allclose(mean, ref_m, rtol=1e-9, atol=1e-9)
    np.testing.assert_allclose(var, ref_v, rtol=1e-8, atol=1e-9)
    # large-stratum approximation: exact at Gamma = 1 (hypergeometric), O(1/n) error otherwise
    m1, v1 = _nchyper._nch_moments_large(60.0, K.astype(float), 25.0, 1.0)
    with np.errstate(divide="ignore", invalid="ignore"):  # scipy's kurtosis term at K = 0
        h_mean, h_var = stats.hypergeom.stats(60, K, 25, moments="mv")
    np.testing.assert_allclose(m1, h_mean, rtol=1e-12)
    np.testing.assert_allclose(v1, h_var, rtol=1e-12, atol=1e-12)
    K = np.arange(200, 1801, 400).astype(float)
    ma, va = _nchyper._nch_moments_large(2000.0, K, 600.0, 2.0)
    me, ve, _ = _nchyper._nch_moments(2000, K, 600, 2.0)
    np.testing.assert_allclose(ma, me, rtol=1e-3)
    np.testing.assert_allclose(va, ve, rtol=2e-2)


def test_bounds_monotone_in_gamma_and_brackets_ordered():
    rng = np.random.default_rng(8)
    n = 600
    lab = rng.integers(0, 5, n)
    t = (rng.random(n) < 0.3).astype(np.int8)
    v = rng.normal(size=n) + 0.3 * t
    gammas = np.linspace(1, 4, 25)
    b = gamma_bounds(v, t, lab, gammas=gammas)
    assert np.all(np.diff(b.p_upper) >= -1e-12) and np.all(np.diff(b.p_separable) >= -1e-12)
    assert np.all(np.array(b.p_upper) >= np.array(b.p_separable) - 1e-15)
    y = (rng.random(n) < 0.3 + 0.2 * t).astype(float)
    e = gamma_bounds(y, t, lab, statistic="sum", gammas=gammas)
    assert e.method == "exact" and np.all(np.diff(e.p_upper) >= -1e-12)


def test_matched_pairs_many_small_strata_same_code():
    rng = np.random.default_rng(9)
    P = 300
    lab = np.repeat(np.arange(P), 2)
    t = np.tile([1, 0], P).astype(np.int8)
    v = rng.normal(size=2 * P) + 0.25 * t
    b = gamma_bounds(v, t, lab, gammas=[1.0, 1.3, 2.0])
    # pairs: the worst case is known (Rosenbaum 2002, ch. 4); 300 pairs of distinct differences
    # are too many to convolve, so p_upper is drawn from it and p_separable is its normal value
    assert b.method == "pairs_monte_carlo"
    for g, p_mc, p_norm in zip(b.gammas, b.p_upper, b.p_separable):
        se = math.sqrt(p_norm * (1 - p_norm) / b.monte_carlo["resamples"])
        assert abs(p_mc - p_norm) < 4 * se + 0.005  # 4 MC SEs plus the normal error at 300 pairs
    # Gamma = 1, pairs: E S_p = (a + b)/2, Var S_p = (a - b)^2 / 4 (closed form)
    d = v[0::2] - v[1::2]
    T = d.mean()
    z = T / math.sqrt((d * d).sum() / P**2)
    assert b.p_separable[0] == pytest.approx(stats.norm.sf(z), rel=1e-10)


def test_sensitivity_value_root_and_flags():
    rng = np.random.default_rng(10)
    n = 800
    lab = rng.integers(0, 5, n)
    t = (rng.random(n) < 0.4).astype(np.int8)
    v = rng.normal(size=n) + 0.35 * t
    sv = sensitivity_value(v, t, lab, alpha=0.05)
    assert sv.flag == "ok" and sv.direction == "greater"
    assert gamma_bounds(v, t, lab, gammas=[sv.gamma]).p_upper[0] == pytest.approx(0.05, abs=1e-8)
    assert gamma_bounds(v, t, lab, gammas=[sv.gamma_separable]).p_separable[0] == pytest.approx(0.05, abs=1e-8)
    assert 1.0 < sv.gamma <= sv.gamma_separable
    two = sensitivity_value(v, t, lab, alpha=0.05, two_sided=True)
    assert two.alpha == 0.025 and "alpha/2" in two.alpha_note and two.gamma < sv.gamma
    # no effect: not significant at Gamma = 1
    flat = sensitivity_value(rng.normal(size=n), t, lab, direction="greater", alpha=0.001)
    assert flat.flag == "not significant at Gamma=1" and flat.gamma == 1.0
    # a huge effect beyond a small cap
    big = sensitivity_value(v + 5 * t, t, lab, cap=3.0)
    assert big.flag == "> cap" and big.gamma == 3.0
    # direction "auto" follows the observed effect
    neg = sensitivity_value(-v, t, lab)
    assert neg.direction == "less" and neg.gamma == pytest.approx(sv.gamma, rel=1e-9)


def test_user_strata_set_aside_and_errors():
    rng = np.random.default_rng(12)
    n = 60
    lab = rng.integers(0, 3, n)
    t = (rng.random(n) < 0.5).astype(np.int8)
    v = rng.normal(size=n)
    lab2 = lab.copy()
    lab2[:5] = -1
    a = gamma_bounds(v, t, lab2, gammas=[1.5])
    keep = lab2 >= 0
    b = gamma_bounds(v[keep], t[keep], lab2[keep], gammas=[1.5])
    assert a.p_upper == b.p_upper
    with pytest.raises(InputError, match="gammas"):
        gamma_bounds(v, t, lab, gammas=[0.5, 2])
    with pytest.raises(InputError, match="statistic"):
        gamma_bounds(v, t, lab, statistic="studentized")
    with pytest.raises(InputError, match="stratum"):
        gamma_bounds(v, t, np.where(t == 1, 0, 1), gammas=[1.5])
    with pytest.raises(InputError, match="alpha"):
        sensitivity_value(v, t, lab, alpha=1.5)


@settings(max_examples=25, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), binary=st.booleans(), gamma=st.floats(1.0, 6.0))
def test_row_order_invariance(seed, binary, gamma):
    rng = np.random.default_rng(seed)
    n = 40
    lab = rng.integers(0, 3, n)
    t = np.zeros(n, np.int8)
    for s in range(3):  # at least one unit of each group per stratum
        idx = np.flatnonzero(lab == s)
        if idx.size < 2:
            lab[:2] = s
            idx = np.flatnonzero(lab == s)
        t[rng.choice(idx, max(1, idx.size // 2), replace=False)] = 1
    if len(np.unique(lab)) < 3 or any(t[lab == s].min() == t[lab == s].max() for s in np.unique(lab)):
        return
    v = (rng.random(n) < 0.4).astype(float) if binary else rng.normal(size=n)
    stat = "sum" if binary else "mean_difference"
    perm = rng.permutation(n)
    a = gamma_bounds(v, t, lab, statistic=stat, gammas=[gamma])
    b = gamma_bounds(v[perm], t[perm], lab[perm], statistic=stat, gammas=[gamma])
    assert a.p_upper[0] == pytest.approx(b.p_upper[0], rel=1e-9, abs=1e-15)
    assert a.p_separable[0] == pytest.approx(b.p_separable[0], rel=1e-9, abs=1e-15)


def test_bounds_to_dict_round_trip():
    rng = np.random.default_rng(13)
    lab = rng.integers(0, 3, 90)
    t = (rng.random(90) < 0.5).astype(np.int8)
    v = rng.normal(size=90)
    d = gamma_bounds(v, t, lab).to_dict()
    assert json.loads(json.dumps(d)) == d and {"gamma", "p_upper"} <= set(d["curve"][0])
    s = sensitivity_value(v, t, lab).to_dict()
    assert json.loads(json.dumps(s)) == s and "gamma" in s


# ----------------------------------------------------------------------------- tipping point


def test_tipping_null_effect_returns_input():
    g = tipping_grid(2.0, 0.5, 3.5, measure="difference", outcome_effect_grid=[0.0, 1.0],
                     prevalence_gap_grid=[0.1, 0.3])
    for gap, eff, e, lo, hi in zip(g.prevalence_gap, g.outcome_shift, g.corrected_estimate,
                                   g.corrected_ci_low, g.corrected_ci_high):
        if eff == 0.0:
            assert (e, lo, hi) == (2.0, 0.5, 3.5)
        else:
            assert e == pytest.approx(2.0 - eff * gap, rel=1e-14)
    r = tipping_grid(1.8, 1.2, 2.7, measure="rr", outcome_effect_grid=[1.0, 3.0], reference_prevalence=0.1)
    ones = [i for i, eff in enumerate(r.outcome_shift) if eff == 1.0]
    assert all(r.corrected_estimate[i] == 1.8 and r.corrected_ci_low[i] == 1.2 and r.corrected_ci_high[i] == 2.7
               for i in ones)


def test_tipping_curve_reaches_null():
    g = tipping_grid(2.0, 0.5, 3.5, measure="difference")
    for point in g.tipping_curve:
        gap, eff = point["prevalence_gap"], point["outcome_shift"]
        assert 0.5 - eff * gap == pytest.approx(0.0, abs=1e-12)
    r = tipping_grid(1.8, 1.2, 2.7, measure="rr", reference_prevalence=0.2)
    for point in r.tipping_curve:
        gap, eff = point["prevalence_gap"], point["outcome_shift"]
        if eff is None:
            continue
        p1, p0 = 0.2 + gap, 0.2
        assert 1.2 / ((1 + (eff - 1) * p1) / (1 + (eff - 1) * p0)) == pytest.approx(1.0, rel=1e-12)
    p = tipping_grid(0.6, 0.4, 0.9, measure="rr")
    for point in p.tipping_curve:
        if point["outcome_shift"] is not None:
            assert 0.9 / (1 + (point["outcome_shift"] - 1) * point["prevalence_gap"]) == pytest.approx(1.0)
    assert tipping_grid(1.0, -0.2, 2.0, measure="difference").tipping_curve[0]["outcome_shift"] == 0.0


def test_tipping_grid_shape_and_dict():
    g = tipping_grid(-1.0, -1.6, -0.4, measure="difference", benchmarks={"smoker": (0.2, -1.5)})
    n = len(g.prevalence_gap)
    assert n == len(g.outcome_shift) == len(g.corrected_estimate) == len(g.corrected_ci_low) == 81
    assert all(e <= 0 for e in g.outcome_shift)  # default effects point the way of the estimate
    assert g.benchmarks[0]["corrected_estimate"] == pytest.approx(-1.0 + 1.5 * 0.2)
    d = g.to_dict()
    assert json.loads(json.dumps(d)) == d and "Cinelli" in d["caveat"]
    with pytest.raises(InputError, match="measure"):
        tipping_grid(1.0, 0.5, 1.5, measure="or")


class _Term:
    def __init__(self, name, kind, column):
        self.name, self.kind, self.column = name, kind, column


def test_covariate_benchmarks_against_ols():
    rng = np.random.default_rng(14)
    n = 2000
    b = (rng.random(n) < 0.4).astype(float)
    c = rng.normal(size=n)
    t = (rng.random(n) < 0.3 + 0.3 * b).astype(np.int8)
    y = 1.0 + 2.0 * b + 0.5 * c + 1.0 * t + rng.normal(size=n)
    X = np.column_stack([b, c])
    out = covariate_benchmarks([_Term("b", "binary", 0), _Term("c", "continuous", 1), _Term("ref", "binary", None)],
                               X, y, t)
    assert set(out) == {"b", "c (above median)"}
    gap, eff = out["b"]
    assert gap == pytest.approx(b[t == 1].mean() - b[t == 0].mean(), rel=1e-12)
    ref = t == 0
    A = np.column_stack([np.ones(ref.sum()), X[ref]])
    assert eff == pytest.approx(np.linalg.lstsq(A, y[ref], rcond=None)[0][1], rel=1e-10)
    hi = (c > np.median(c)).astype(float)
    gap_c, eff_c = out["c (above median)"]
    assert gap_c == pytest.approx(hi[t == 1].mean() - hi[ref].mean(), rel=1e-12)
    A = np.column_stack([np.ones(ref.sum()), b[ref], hi[ref]])
    assert eff_c == pytest.approx(np.linalg.lstsq(A, y[ref], rcond=None)[0][2], rel=1e-10)
    assert list(covariate_benchmarks([_Term("b", "binary", 0), _Term("c", "continuous", 1)], X, y, t, top=1)) == ["b"]
