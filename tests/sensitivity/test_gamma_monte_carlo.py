"""The Monte Carlo p-value at the allocation the Gamma bound selects.

Independent values: scipy.stats.nchypergeom_fisher (reference library) for the inverse CDF of
Fisher's noncentral hypergeometric law, and a brute-force enumeration of every assignment on a
tiny design, weighted by Gamma ** (number of exposed units with u = 1) within each stratum
(the sensitivity model of Rosenbaum 2002, sec. 4.2-4.4), for the p-value itself.
"""

import itertools
import math

import numpy as np
import pytest
from scipy import stats

from stratagap.sensitivity._gamma_bounds import _Bounder, gamma_bounds, sensitivity_value
from stratagap.sensitivity._gamma_monte_carlo import (monte_carlo_at_allocation, nch_inverse_cdf,
                                                      selected_cuts)


@pytest.mark.parametrize("n, K, n1, gamma", [(9, 4, 3, 2.5), (12, 1, 6, 1.7), (7, 6, 2, 4.0)])
def test_inverse_cdf_equals_scipy(n, K, n1, gamma):
    u = np.linspace(0.001, 0.999, 57)[:, None]
    ours = nch_inverse_cdf(u, n, np.array([K]), n1, gamma)[:, 0]
    ref = stats.nchypergeom_fisher.ppf(u[:, 0], n, K, n1, gamma)
    assert np.array_equal(ours, ref.astype(int))


def _tiny():
    rng = np.random.default_rng(21)
    sizes, exposed = (5, 6), (2, 3)
    labels = np.repeat(np.arange(2), sizes).astype(np.int64)
    values = np.round(rng.normal(size=labels.size), 3)
    t = np.zeros(labels.size, dtype=np.int8)
    for s, k in enumerate(exposed):
        idx = np.flatnonzero(labels == s)
        t[idx[np.argsort(-values[idx])[:k]]] = 1  # the largest values exposed: a small p
    return values, t, labels


def _enumerated_p(values, t, labels, gamma, cuts):
    """P(T >= T_obs) over all assignments, u = 1 on the K largest values of each stratum."""
    strata = []
    n = labels.size
    for s, K in enumerate(cuts):
        idx = np.flatnonzero(labels == s)
        v = values[idx]
        u = np.zeros(idx.size)
        u[np.argsort(v)[idx.size - K:]] = 1.0
        n1 = int(t[idx].sum())
        options = []
        for A in itertools.combinations(range(idx.size), n1):
            mask = np.zeros(idx.size, bool)
            mask[list(A)] = True
            diff = v[mask].mean() - v[~mask].mean()
            options.append((idx.size / n * diff, gamma ** u[mask].sum()))
        total = sum(w for _, w in options)
        strata.append([(d, w / total) for d, w in options])
        observed = None
    obs = sum(idx_size / n * (values[(labels == s) & (t == 1)].mean() - values[(labels == s) & (t == 0)].mean())
              for s, idx_size in enumerate(np.bincount(labels)))
    p = 0.0
    for combo in itertools.product(*strata):
        if sum(d for d, _ in combo) >= obs - 1e-12:
            p += math.prod(w for _, w in combo)
    return p


def test_monte_carlo_matches_weighted_enumeration_on_a_tiny_linear_form():
    values, t, labels = _tiny()
    gamma = 2.0
    b = _Bounder(values, t, labels, "ate", "mean_difference", "greater")
    cuts = selected_cuts(b.form, gamma)
    # groups of equal-size strata come sorted by (n, n1): here stratum 0 (5, 2) then 1 (6, 3)
    per_stratum = [int(cuts[0][0]), int(cuts[1][0])]
    exact = _enumerated_p(values, t, labels, gamma, per_stratum)
    B = 20000
    got = monte_carlo_at_allocation(b.form, [gamma], seed=5, resamples=B)
    se = math.sqrt(exact * (1 - exact) / B)
    assert abs(got["p"][0] - exact) < 4 * se + 1.0 / B, (got["p"][0], exact)


def test_same_uniforms_make_the_estimate_nondecreasing_in_gamma_at_a_fixed_cut():
    values, t, labels = _tiny()
    b = _Bounder(values, t, labels, "ate", "mean_difference", "greater")
    grid = [1.5, 2.0, 3.0, 5.0]
    cuts = [tuple(int(k) for c in selected_cuts(b.form, g) for k in c) for g in grid]
    got = monte_carlo_at_allocation(b.form, grid, seed=2, resamples=3000)["p"]
    for (c1, p1), (c2, p2) in zip(zip(cuts, got), zip(cuts[1:], got[1:])):
        if c1 == c2:
            assert p2 >= p1


def test_bounds_add_the_estimate_only_where_the_bracket_straddles_the_level():
    rng = np.random.default_rng(3)
    labels = np.repeat(np.arange(3), 40).astype(np.int64)
    t = (rng.random(labels.size) < 0.5).astype(np.int8)
    values = rng.exponential(size=labels.size) + 0.6 * t
    # points between the Gammas at which the provable end and the separable value reach 0.05
    # (1.88139 and 1.88143 here: the search over cut allocations nearly closes the bracket)
    sv = sensitivity_value(values, t, labels, direction="greater")
    assert sv.gamma_provable < sv.gamma_separable
    grid = [1.0, 1.2, 1.5] + [float(g) for g in np.linspace(sv.gamma_provable, sv.gamma_separable,
                                                           9)[1:-1]] + [3.0]
    plain = gamma_bounds(values, t, labels, gammas=grid)
    level = 0.05
    got = gamma_bounds(values, t, labels, gammas=grid, monte_carlo_level=level, seed=1)
    assert got.p_upper == plain.p_upper and got.p_separable == plain.p_separable
    # the trigger: the separable value and the provable end fall on either side of the level
    straddle = [g > 1 and s <= level < u for g, u, s in zip(grid, plain.p_provable, plain.p_separable)]
    assert [m is not None for m in (got.p_monte_carlo or [None] * len(grid))] == straddle
    assert any(straddle)
    assert got.monte_carlo["resamples"] == 2000 and "lower estimate" in got.monte_carlo["meaning"]
    # the estimate at one allocation cannot exceed the provable end by more than MC error
    for m, u, g in zip(got.p_monte_carlo, got.p_provable, grid):
        if m is not None:
            assert m <= u + 4 * got.monte_carlo["mc_se"][str(g)]
