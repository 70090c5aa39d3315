"""The cluster-level permutation test against full enumeration on a tiny design.

Reference: brute force over every within-stratum assignment of exposure to clusters (Rosenbaum
2002, Observational Studies ch. 2-3: the randomization distribution of a stratified design),
with the statistic computed from the patient rows directly: per stratum the patients' residual
sums over exposed and reference clusters divided by the expected number of patients in each
arm (K1_s mbar_s, K0_s mbar_s), combined with patient-share weights (ATE) or expected exposed
patients (ATT); or (weight "clusters") the difference of mean cluster means.
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest

from stratagap.errors import InputError
from stratagap.inference.clusters import cluster_test, cluster_values


def _design():
    # two strata of clusters; sizes differ so patient and cluster weights differ
    sizes = [2, 3, 1, 4, 2, 5, 3, 2, 1]
    stratum = [0, 0, 0, 0, 1, 1, 1, 1, 1]
    exposed = [1, 0, 1, 0, 0, 1, 0, 1, 0]
    rng = np.random.default_rng(4)
    clusters = np.repeat(np.arange(len(sizes)), sizes)
    r = rng.standard_normal(clusters.size) + np.repeat(rng.standard_normal(len(sizes)), sizes)
    t = np.repeat(exposed, sizes).astype(np.int8)
    labels = np.repeat(stratum, sizes).astype(np.int64)
    return r, t, labels, clusters, np.array(sizes), np.array(stratum), np.array(exposed)


def _direct(r, clusters, cl_exposed, sizes, stratum, estimand, weight):
    stat, weights = [], []
    for s in np.unique(stratum):
        members = np.flatnonzero(stratum == s)
        ex = [c for c in members if cl_exposed[c]]
        re = [c for c in members if not cl_exposed[c]]
        if weight == "patients":
            mbar = sizes[members].mean()
            sum_e = sum(r[clusters == c].sum() for c in ex)
            sum_r = sum(r[clusters == c].sum() for c in re)
            stat.append(sum_e / (len(ex) * mbar) - sum_r / (len(re) * mbar))
            weights.append(sizes[members].sum() if estimand == "ate" else len(ex) * mbar)
        else:
            stat.append(np.mean([r[clusters == c].mean() for c in ex])
                        - np.mean([r[clusters == c].mean() for c in re]))
            weights.append(len(members) if estimand == "ate" else len(ex))
    w = np.array(weights) / np.sum(weights)
    return float(np.dot(w, stat))


@pytest.mark.parametrize("estimand", ["ate", "att"])
@pytest.mark.parametrize("weight", ["patients", "clusters"])
def test_exact_cluster_test_equals_enumeration(estimand, weight):
    r, t, labels, clusters, sizes, stratum, exposed = _design()
    res, cv = cluster_test(r, t, labels, clusters, estimand=estimand, weight=weight,
                           engine="exact")
    observed = _direct(r, clusters, exposed, sizes, stratum, estimand, weight)
    assert res.statistic == pytest.approx(observed, rel=1e-12)
    null = []
    s0, s1 = np.flatnonzero(stratum == 0), np.flatnonzero(stratum == 1)
    for a in itertools.combinations(s0, int(exposed[s0].sum())):
        for b in itertools.combinations(s1, int(exposed[s1].sum())):
            assign = np.zeros(len(sizes), dtype=int)
            assign[list(a) + list(b)] = 1
            null.append(_direct(r, clusters, assign, sizes, stratum, estimand, weight))
    null = np.array(null)
    assert res.null_distribution.size == null.size == 6 * 10
    np.testing.assert_allclose(np.sort(res.null_distribution), np.sort(null), rtol=1e-10,
                               atol=1e-12)
    tol = 1e-9 * max(1.0, abs(observed))
    p_greater = np.mean(null >= observed - tol)
    p_less = np.mean(null <= observed + tol)
    assert res.p_greater == pytest.approx(p_greater, abs=1e-12)
    assert res.p_value == pytest.approx(min(1.0, 2 * min(p_greater, p_less)), abs=1e-12)


def test_monte_carlo_agrees_with_exact_within_its_error():
    r, t, labels, clusters, *_ = _design()
    exact, _ = cluster_test(r, t, labels, clusters, estimand="ate", engine="exact")
    mc, _ = cluster_test(r, t, labels, clusters, estimand="ate", engine="monte_carlo",
                         resamples=20000, seed=3)
    se = np.sqrt(exact.p_value * (1 - exact.p_value) / 20000)
    assert abs(mc.p_value - exact.p_value) < 4 * se + 2 / 20001


def test_exposure_varying_within_a_cluster_is_refused():
    r, t, labels, clusters, *_ = _design()
    t = t.copy()
    t[0] = 1 - t[0]
    with pytest.raises(InputError, match="constant within each cluster"):
        cluster_values(r, t, labels, clusters, estimand="ate")


def test_unknown_weight_is_refused():
    r, t, labels, clusters, *_ = _design()
    with pytest.raises(InputError, match="cluster_weight"):
        cluster_values(r, t, labels, clusters, estimand="ate", weight="beds")
