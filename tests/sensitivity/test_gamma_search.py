"""The search over cut allocations for a few large strata (issue 12, "General strata").

Independent value: brute-force enumeration. For each stratum and each cut (u = 1 on the j
largest values), the law of the exposed sum S_s is enumerated over every exposure assignment,
weighted by Gamma ** (exposed units with u = 1) (the sensitivity model, Rosenbaum 2002,
sec. 4.2-4.4); the statistic's coefficients are written out by hand (ATE weights n_s / n,
T = sum_s w_s (mean exposed - mean reference)); every combination of cuts across strata gives
a normal tail, and the largest is the worst case over cut allocations. The bound's quoted value
(the best combination its search attains) must not exceed it, and its provable end must not
fall below it, to 1e-12; where the bound reports "exact" the three agree.
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from scipy import stats

from stratagap.sensitivity import gamma_bounds, sensitivity_value

TOL = 1e-12


def _design(rng, sizes, binary):
    vals, t, lab = [], [], []
    for s, (n, n1) in enumerate(sizes):
        z = np.zeros(n, np.int8)
        z[rng.choice(n, n1, replace=False)] = 1
        v = (rng.random(n) < 0.45).astype(float) if binary else rng.normal(size=n) ** 3
        vals.append(v + (0.0 if binary else 0.7 * z))
        t.append(z)
        lab.append(np.full(n, s))
    return np.concatenate(vals), np.concatenate(t), np.concatenate(lab).astype(np.int64)


def _cut_laws(v, n1, gamma):
    """Mean and variance of S = sum over the exposed of v, for every cut j = 0..n, enumerated."""
    n = len(v)
    order = np.argsort(v, kind="stable")
    sets = [np.array(a) for a in itertools.combinations(range(n), n1)]
    sums = np.array([v[a].sum() for a in sets])
    out = []
    for j in range(n + 1):
        u = np.zeros(n)
        u[order[n - j:]] = 1.0
        w = np.array([gamma ** u[a].sum() for a in sets])
        w /= w.sum()
        m = w @ sums
        out.append((m, w @ (sums - m) ** 2))
    return out


def _worst_over_cuts(v, t, lab, gamma):
    n_tot = len(v)
    T, per = 0.0, []
    for s in np.unique(lab):
        vs, ts = v[lab == s], t[lab == s]
        n, n1 = len(vs), int(ts.sum())
        c = n / n_tot * (1.0 / n1 + 1.0 / (n - n1))   # T = sum_s c_s S_s - w_s R_s / n0_s
        T += c * (vs @ ts) - n / n_tot * vs.sum() / (n - n1)
        per.append([(c * m - n / n_tot * vs.sum() / (n - n1), c * c * var)
                    for m, var in _cut_laws(vs, n1, gamma)])
    worst = 0.0
    for combo in itertools.product(*per):
        M, V = sum(m for m, _ in combo), sum(var for _, var in combo)
        worst = max(worst, 1.0 if V <= 0 else float(stats.norm.sf((T - M) / math.sqrt(V))))
    return worst


CASES = [(seed, binary) for seed in range(12) for binary in (False, True)]


def _case(seed, binary):
    """Up to 4 strata of up to 12 units (fewer units with more strata, to keep enumeration small)."""
    rng = np.random.default_rng(700 + seed)
    k = int(rng.integers(1, 5))
    sizes = []
    for _ in range(k):
        n = int(rng.integers(4, 13 if k <= 2 else 9))
        sizes.append((n, int(rng.integers(1, n))))
    return _design(rng, sizes, binary)


@pytest.mark.parametrize("seed, binary", CASES)
def test_best_found_and_provable_end_bracket_the_enumerated_worst_case(seed, binary):
    v, t, lab = _case(seed, binary)
    gammas = [1.3, 2.0, 3.5]
    b = gamma_bounds(v, t, lab, gammas=gammas)
    assert b.method == "bracket"
    for g, found, prov, exact in zip(gammas, b.p_upper, b.p_provable, b.exact_at):
        worst = _worst_over_cuts(v, t, lab, g)
        assert found <= worst + TOL and worst <= prov + TOL, (g, found, worst, prov)
        if exact:
            assert abs(found - worst) <= TOL and abs(prov - worst) <= 10 * TOL


def test_the_search_finds_the_enumerated_worst_case_in_most_designs():
    """The hit rate recorded in docs/validation.md: share of (design, Gamma) cells in which the
    quoted value equals the enumerated worst case over cut allocations, and share in which
    the bound can also say so (its provable end agrees)."""
    hits = exact = cells = 0
    widest = 0.0
    for seed, binary in CASES:
        v, t, lab = _case(seed, binary)
        b = gamma_bounds(v, t, lab, gammas=[1.3, 2.0, 3.5])
        for g, found, prov, ok in zip(b.gammas, b.p_upper, b.p_provable, b.exact_at):
            cells += 1
            hits += abs(found - _worst_over_cuts(v, t, lab, g)) <= TOL
            exact += ok
            widest = max(widest, (prov - found) / found)
    assert cells == 72
    assert hits == cells  # measured: 72 of 72
    # the provable end meets the quoted value in about half the cells (measured 37 of 72:
    # 15 of 36 continuous, 22 of 36 binary); elsewhere it stays within 0.17 % (relative)
    assert exact >= 30 and widest <= 0.01


def test_sensitivity_values_are_ordered_and_each_reaches_alpha_on_its_own_end():
    rng = np.random.default_rng(3)
    lab = np.repeat(np.arange(3), 40).astype(np.int64)
    t = (rng.random(lab.size) < 0.5).astype(np.int8)
    v = rng.exponential(size=lab.size) + 0.6 * t
    sv = sensitivity_value(v, t, lab, direction="greater")
    # provable end <= quoted (worst found) <= separable: each a tail of a larger class or worse allocation
    assert 1.0 < sv.gamma_provable <= sv.gamma <= sv.gamma_separable
    at = gamma_bounds(v, t, lab, gammas=[sv.gamma, sv.gamma_provable])
    assert at.p_upper[0] == pytest.approx(0.05, abs=1e-8)
    assert at.p_provable[1] == pytest.approx(0.05, abs=1e-8)
