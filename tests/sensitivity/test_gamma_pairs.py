"""The exact Gamma bound for matched pairs, against brute-force enumeration over every
allocation of the hidden u and the classical sign-test form for binary outcomes."""

import itertools
import math

import numpy as np
import pytest
from scipy import optimize, stats

from stratagap.sensitivity import _gamma_pairs
from stratagap.sensitivity._gamma_bounds import gamma_bounds, sensitivity_value


def _pairs(P, rng, binary=False):
    labels = np.repeat(np.arange(P), 2)
    t = np.tile([1, 0], P).astype(np.int8)
    if binary:
        v = rng.integers(0, 2, 2 * P).astype(float)
        v[t == 1] = np.maximum(v[t == 1], rng.integers(0, 2, P))  # lean towards the exposed
    else:
        v = np.round(rng.normal(size=2 * P) + 0.8 * t, 1)   # rounding: ties within pairs too
    return v, t, labels


def _worst_by_enumeration(v, t, labels, gamma, weights):
    """max over every u in {0,1}^(2P) of P(T >= T_obs), T = sum_s c_s (exposed value of s),
    each pair exposing unit i with probability proportional to gamma ** u_i (Rosenbaum 2002,
    ch. 4); every exposure pattern enumerated."""
    P = labels.max() + 1
    vals = np.stack([v[labels == s] for s in range(P)])          # (P, 2), unit 0 exposed
    obs = float(np.sum(weights * vals[:, 0]))
    tol = 1e-13 * max(abs(obs), 1.0)
    best = 0.0
    for u in itertools.product((0, 1), repeat=2 * P):
        u = np.array(u).reshape(P, 2)
        prob1 = gamma ** u[:, 0] / (gamma ** u[:, 0] + gamma ** u[:, 1])
        total = 0.0
        for pick in itertools.product((0, 1), repeat=P):
            pick = np.array(pick)
            T = np.sum(weights * vals[np.arange(P), pick])
            if T >= obs - tol:
                total += np.prod(np.where(pick == 0, prob1, 1 - prob1))
        best = max(best, total)
    return best


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_pairs_bound_is_the_enumerated_worst_case(seed):
    rng = np.random.default_rng(seed)
    v, t, labels = _pairs(4, rng)
    gammas = [1.0, 1.5, 2.0, 4.0]
    b = gamma_bounds(v, t, labels, estimand="att", statistic="mean_difference",
                     direction="greater", gammas=gammas)
    assert b.method == "pairs_exact"
    # ATT weights of the mean difference for pairs: 1 / P on each pair's exposed value
    for g, p in zip(gammas, b.p_upper):
        assert p == pytest.approx(_worst_by_enumeration(v, t, labels, g, np.full(4, 0.25)),
                                  abs=1e-12)


def test_pairs_bound_sum_statistic_and_less_direction():
    rng = np.random.default_rng(7)
    v, t, labels = _pairs(4, rng)
    b = gamma_bounds(-v, t, labels, statistic="sum", direction="less", gammas=[2.0])
    assert b.p_upper[0] == pytest.approx(
        _worst_by_enumeration(v, t, labels, 2.0, np.ones(4)), abs=1e-12)


def test_binary_pairs_are_the_sign_test():
    # Rosenbaum 2002, ch. 4 (from memory): with D discordant pairs of which the exposed unit had
    # the event in X, the worst-case one-sided p-value is P(Binomial(D, G / (1 + G)) >= X)
    rng = np.random.default_rng(3)
    v, t, labels = _pairs(60, rng, binary=True)
    ex, ref = v[t == 1], v[t == 0]
    D, X = int(np.sum(ex != ref)), int(np.sum(ex > ref))
    gammas = [1.0, 1.25, 2.0, 3.0]
    b = gamma_bounds(v, t, labels, estimand="att", statistic="mean_difference", gammas=gammas)
    assert b.method == "pairs_exact"
    for g, p in zip(gammas, b.p_upper):
        assert p == pytest.approx(stats.binom.sf(X - 1, D, g / (1 + g)), rel=1e-10)
    sv = sensitivity_value(v, t, labels, estimand="att", statistic="mean_difference",
                           direction="greater", alpha=0.05)
    root = optimize.brentq(lambda lg: stats.binom.sf(X - 1, D, math.exp(lg) / (1 + math.exp(lg)))
                           - 0.05, 0.0, math.log(1e3))
    assert sv.gamma == pytest.approx(math.exp(root), rel=1e-8)


def test_monte_carlo_estimate_agrees_with_the_exact_tail(monkeypatch):
    rng = np.random.default_rng(5)
    v, t, labels = _pairs(12, rng)
    exact = gamma_bounds(v, t, labels, estimand="att", gammas=[1.5, 2.0])
    monkeypatch.setattr(_gamma_pairs, "EXACT_SUPPORT", 1)
    mc = gamma_bounds(v, t, labels, estimand="att", gammas=[1.5, 2.0], seed=11)
    assert mc.method == "pairs_monte_carlo"
    for g, p_ex, p_mc in zip([1.5, 2.0], exact.p_upper, mc.p_upper):
        se = math.sqrt(p_ex * (1 - p_ex) / _gamma_pairs.RESAMPLES)
        assert abs(p_mc - p_ex) < 4 * se + 1 / _gamma_pairs.RESAMPLES   # 4 Monte Carlo SEs
        assert mc.monte_carlo["mc_se"][str(g)] == pytest.approx(se, rel=0.2)
    assert mc.p_upper[0] <= mc.p_upper[1]          # same draws: nondecreasing in Gamma


def test_normal_beside_uses_the_exact_moments():
    rng = np.random.default_rng(9)
    v, t, labels = _pairs(10, rng)
    g = 2.0
    b = gamma_bounds(v, t, labels, estimand="att", gammas=[g])
    ex, ref = v[t == 1], v[t == 0]
    a = np.abs(ex - ref) / 10
    p = g / (1 + g)
    obs = ex.mean() - np.minimum(ex, ref).mean()
    z = (obs - p * a.sum()) / math.sqrt(p * (1 - p) * np.sum(a * a))
    assert b.p_separable[0] == pytest.approx(stats.norm.sf(z), rel=1e-10)


def test_very_many_pairs_quote_the_normal_value(monkeypatch):
    rng = np.random.default_rng(6)
    v, t, labels = _pairs(30, rng)
    monkeypatch.setattr(_gamma_pairs, "EXACT_SUPPORT", 1)
    monkeypatch.setattr(_gamma_pairs, "MONTE_CARLO_BUDGET", 10)
    b = gamma_bounds(v, t, labels, estimand="att", gammas=[1.5])
    assert b.method == "pairs_normal" and b.p_upper == b.p_separable


def test_observed_at_the_bottom_gives_one(monkeypatch):
    # every exposed unit has its pair's smaller value: every allocation reaches T_obs
    v = np.array([0.0, 1.0, 0.5, 2.0, -1.0, 0.3])
    t = np.array([1, 0, 1, 0, 1, 0], dtype=np.int8)
    labels = np.repeat(np.arange(3), 2)
    for support in (_gamma_pairs.EXACT_SUPPORT, 1):
        monkeypatch.setattr(_gamma_pairs, "EXACT_SUPPORT", support)
        b = gamma_bounds(v, t, labels, estimand="att", gammas=[2.0])
        assert b.p_upper == [1.0]
