"""Gamma bounds with the cluster as the unit, against enumeration on a small worked case.

Reference: the sensitivity model of Rosenbaum (2002, Observational Studies, ch. 4) applied to
clusters (Hansen, Rosenbaum & Small 2014, JASA 109:133-144, from memory): within a stratum the
chance of an exposed set A of clusters is proportional to Gamma ** sum(u_c, c in A). For every
u in {0, 1}^K of every stratum we enumerate all assignments, take the largest mean of the
stratum's term (ties: the largest variance), and form the separable normal p-value
(Gastwirth, Krieger & Rosenbaum 2000, JRSS B 62:545-555); at Gamma = 1 it is the
randomization normal p-value of the cluster-level test.
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from scipy import stats

from stratagap.inference.clusters import cluster_test
from stratagap.sensitivity._gamma_clusters import cluster_gamma_bounds


def _design():
    sizes = [3, 1, 4, 2, 2, 5, 3, 2]
    stratum = [0, 0, 0, 0, 1, 1, 1, 1]
    exposed = [1, 1, 0, 0, 1, 0, 1, 0]
    rng = np.random.default_rng(8)
    clusters = np.repeat(np.arange(len(sizes)), sizes)
    r = rng.standard_normal(clusters.size) + 0.8 * np.repeat(exposed, sizes)
    return (r, np.repeat(exposed, sizes).astype(np.int8),
            np.repeat(stratum, sizes).astype(np.int64), clusters)


def _separable_by_enumeration(cv, observed, gamma):
    mean = var = 0.0
    for s in np.unique(cv.labels):
        members = np.flatnonzero(cv.labels == s)
        K, K1 = members.size, int(cv.t[members].sum())
        w_s = K / cv.labels.size  # the engine's ATE weight over clusters (values carry the rest)
        coef = w_s * (1 / K1 + 1 / (K - K1))  # T_s = coef S_s - const
        best = (-np.inf, -np.inf)
        for u in itertools.product((0, 1), repeat=K):
            u = np.array(u)
            sets = list(itertools.combinations(range(K), K1))
            w = np.array([gamma ** u[list(a)].sum() for a in sets])
            w /= w.sum()
            S = np.array([cv.values[members][list(a)].sum() for a in sets])
            m, v = coef * (w @ S), coef ** 2 * (w @ S ** 2 - (w @ S) ** 2)
            if m > best[0] + 1e-12 or (abs(m - best[0]) <= 1e-12 and v > best[1]):
                best = (m, v)
        const = w_s * cv.values[members].sum() / (K - K1)
        mean += best[0] - const
        var += best[1]
    return float(stats.norm.sf((observed - mean) / np.sqrt(var)))


def test_cluster_gamma_bounds_match_enumeration():
    r, t, labels, clusters = _design()
    res, cv = cluster_test(r, t, labels, clusters, estimand="ate", engine="exact")
    gammas = [1.0, 1.5, 2.0, 3.0]
    bounds, threshold = cluster_gamma_bounds(cv, observed=res.statistic, estimand="ate",
                                             alternative="two-sided", alpha=0.05,
                                             gammas=gammas)
    assert bounds.observed == pytest.approx(res.statistic, rel=1e-12)
    for g, p_sep, p_up in zip(gammas, bounds.p_separable, bounds.p_upper):
        assert p_sep == pytest.approx(_separable_by_enumeration(cv, res.statistic, g), rel=1e-9)
        assert p_up >= p_sep - 1e-15
    # Gamma = 1 reproduces the cluster-level test's normal (randomization) p-value
    assert bounds.p_upper[0] == pytest.approx(res.normal_p_greater, rel=1e-9)
    assert bounds.n_strata == 2 and threshold.alpha == 0.025
