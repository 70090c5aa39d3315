"""Cluster-robust variances (CR1, CR2) and the Bell-McCaffrey degrees of freedom.

References: statsmodels ``OLS(...).fit(cov_type="cluster")`` for CR1 (its default small-sample
factor G/(G-1) (n-1)/(n-k)); a hand computation with the full n x n hat matrix and
``scipy.linalg.sqrtm`` for CR2 and its df (Bell & McCaffrey 2002, Survey Methodology
28:169-181, sec. 3; Pustejovsky & Tipton 2018, JBES 36:672-683, eq. 11; from memory); closed
forms: with one row per cluster CR2 is HC2, which for a difference of means is the Neyman
variance s1^2/n1 + s0^2/n0 (MacKinnon & White 1985; Imbens & Kolesar 2016, Review of Economics
and Statistics 98:701-712, sec. III, from memory), with the Welch-Satterthwaite df under equal
variances; with equal-size clusters nested in the groups the same formulas hold for the cluster
means.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg
import statsmodels.api as sm

from stratagap.estimation._cluster_robust import cluster_sandwich
from stratagap.estimation import clustered, effects


def _small_case(seed=3, G=7):
    rng = np.random.default_rng(seed)
    sizes = rng.integers(1, 5, size=G)
    g = np.repeat(np.arange(G), sizes)
    n = g.size
    t = (rng.random(n) < 0.5).astype(float)
    x = rng.standard_normal(n)
    D = np.column_stack([np.ones(n), t, x])
    y = 0.5 * x + rng.standard_normal(G)[g] + rng.standard_normal(n)
    return D, y, g


def test_cr1_matches_statsmodels_cluster_sandwich():
    D, y, g = _small_case(G=12)
    ref = sm.OLS(y, D).fit(cov_type="cluster", cov_kwds={"groups": g})
    ours = cluster_sandwich(D, y, g, np.eye(3), kind="CR1")
    np.testing.assert_allclose(ours.estimate, ref.params, rtol=1e-12)
    np.testing.assert_allclose(ours.cov, ref.cov_params(), rtol=1e-10, atol=1e-14)


def _hand_cr2(D, y, g, c):
    """CR2 and its df by the textbook formulas, with the full n x n matrices."""
    n = len(y)
    XtXi = np.linalg.inv(D.T @ D)
    H = D @ XtXi @ D.T
    M = np.eye(n) - H
    e = M @ y
    meat = np.zeros((D.shape[1], D.shape[1]))
    Gcols = []
    for cl in np.unique(g):
        idx = np.flatnonzero(g == cl)
        A = np.real(scipy.linalg.sqrtm(np.linalg.inv(np.eye(idx.size) - H[np.ix_(idx, idx)])))
        u = D[idx].T @ A @ e[idx]
        meat += np.outer(u, u)
        b = np.zeros(n)
        b[idx] = A @ D[idx] @ XtXi @ c
        Gcols.append(M @ b)
    V = XtXi @ meat @ XtXi
    Gm = np.column_stack(Gcols)
    lam = np.linalg.eigvalsh(Gm.T @ Gm)  # weights of the chi-square(1) terms
    return c @ V @ c, lam.sum() ** 2 / (lam ** 2).sum()


def test_cr2_and_df_match_a_hand_computation():
    D, y, g = _small_case()
    for c in (np.array([0.0, 1.0, 0.0]), np.array([1.0, 0.5, -2.0])):
        var, df = _hand_cr2(D, y, g, c)
        ours = cluster_sandwich(D, y, g, c[:, None], kind="CR2")
        assert ours.cov[0, 0] == pytest.approx(var, rel=1e-10)
        assert ours.df[0] == pytest.approx(df, rel=1e-10)


def _welch_equal_df(n1, n0):
    return (1 / n1 + 1 / n0) ** 2 / (1 / (n1 ** 2 * (n1 - 1)) + 1 / (n0 ** 2 * (n0 - 1)))


def test_singleton_clusters_give_the_neyman_variance_and_welch_df():
    rng = np.random.default_rng(1)
    t = np.r_[np.ones(7), np.zeros(11)]
    y = rng.standard_normal(t.size) + t
    D = np.column_stack([np.ones(t.size), t])
    fit = cluster_sandwich(D, y, np.arange(t.size), np.array([[0.0], [1.0]]))
    neyman = y[t == 1].var(ddof=1) / 7 + y[t == 0].var(ddof=1) / 11
    assert fit.cov[0, 0] == pytest.approx(neyman, rel=1e-12)
    assert fit.df[0] == pytest.approx(_welch_equal_df(7, 11), rel=1e-12)


def test_equal_clusters_nested_in_groups_give_the_cluster_means_variance():
    rng = np.random.default_rng(2)
    G1, G0, m = 5, 8, 4
    g = np.repeat(np.arange(G1 + G0), m)
    t = (g < G1).astype(float)
    y = rng.standard_normal(G1 + G0)[g] + rng.standard_normal(g.size)
    D = np.column_stack([np.ones(g.size), t])
    fit = cluster_sandwich(D, y, g, np.array([[0.0], [1.0]]))
    means = np.bincount(g, weights=y) / m
    expected = means[:G1].var(ddof=1) / G1 + means[G1:].var(ddof=1) / G0
    assert fit.cov[0, 0] == pytest.approx(expected, rel=1e-12)
    assert fit.df[0] == pytest.approx(_welch_equal_df(G1, G0), rel=1e-12)


def test_leverage_one_uses_the_pseudo_inverse_square_root():
    # the only exposed row is its own cluster: H_gg = 1 and its residual is 0
    t = np.r_[1.0, np.zeros(6)]
    y = np.r_[3.0, 0.1, -0.4, 0.2, 0.5, -0.3, 0.0]
    D = np.column_stack([np.ones(7), t])
    fit = cluster_sandwich(D, y, np.r_[0, 1, 1, 2, 2, 3, 3], np.array([[0.0], [1.0]]))
    assert np.isfinite(fit.cov[0, 0])


def _strata_data(seed=5, n=400):
    rng = np.random.default_rng(seed)
    x = rng.standard_normal((n, 2))
    t = (rng.random(n) < 0.4 + 0.2 * (x[:, 0] > 0)).astype(np.int8)
    labels = np.digitize(x[:, 0], [-0.8, 0.0, 0.8]).astype(np.int64)
    y = x @ np.array([1.0, -0.5]) + 0.3 * t + rng.standard_normal(n)
    return y, t, x, labels


@pytest.mark.parametrize("shared", [False, True], ids=["interactions", "partial"])
@pytest.mark.parametrize("estimand", ["ate", "att"])
def test_headline_refit_keeps_the_estimate_and_one_row_clusters_give_hc2(estimand, shared):
    y, t, X, labels = _strata_data()
    names = ["x1", "x2"]
    if shared:  # a level held by exposed units only: its slope is shared (partial interactions)
        level = ((t == 1) & (np.arange(y.size) % 3 == 0)).astype(float)
        X, names = np.column_stack([X, level]), names + ["level"]
    head = effects.stratified_regression(y, t, X, labels, estimand=estimand, names=names)
    if shared:
        assert {r["model"] for r in head.per_stratum} == {"partial interactions"}
    w = np.array([row["weight"] for row in head.per_stratum])
    out, row = clustered.clustered_estimate(head, y, t, X, labels, np.arange(y.size),
                                            weights=w, names=names, estimand=estimand,
                                            alpha=0.05)
    D, rows, _, t_cols, _ = clustered.stratum_design(y, t, X, labels, head.per_stratum, names,
                                                     estimand)
    beta = np.linalg.lstsq(D, y[rows], rcond=None)[0]
    taus = np.array([r["estimate"] for r in head.per_stratum])
    np.testing.assert_allclose(beta[t_cols], taus, rtol=1e-9, atol=1e-12)
    assert out.estimate == head.estimate
    # one row per cluster: CR2 is HC2 stratum by stratum, and the strata are independent
    assert row.se == pytest.approx(head.se, rel=1e-9)
    assert out.ci_low < head.estimate < out.ci_high


def test_clustered_headline_counts_clusters_and_gives_a_small_sample_df():
    y, t, X, labels = _strata_data(n=600)
    rng = np.random.default_rng(9)
    g = rng.integers(0, 30, size=y.size)
    y = y + 1.5 * rng.standard_normal(30)[g]
    names = ["x1", "x2"]
    head = effects.stratified_regression(y, t, X, labels, estimand="ate", names=names)
    w = np.array([row["weight"] for row in head.per_stratum])
    out, row = clustered.clustered_estimate(head, y, t, X, labels, g, weights=w, names=names,
                                            estimand="ate", alpha=0.05)
    assert row.n_clusters == 30 and 2 < row.df < 600
    assert "CR2" in out.variance_method and "CR2" in out.method


def test_ipw_cluster_row_is_the_hajek_estimate_with_the_weighted_cr1():
    rng = np.random.default_rng(11)
    g = np.repeat(np.arange(25), 6)
    x = rng.standard_normal(g.size)
    e = 1 / (1 + np.exp(-0.7 * x))
    t = (rng.random(g.size) < e).astype(float)
    y = x + rng.standard_normal(25)[g] + rng.standard_normal(g.size)
    row = clustered.ipw_cluster_sandwich(y, t, e, g, estimand="ate", alpha=0.05)
    w = t / e + (1 - t) / (1 - e)
    hajek = np.average(y[t == 1], weights=w[t == 1]) - np.average(y[t == 0], weights=w[t == 0])
    assert row.estimate == pytest.approx(hajek, rel=1e-12)  # Hernan & Robins 2020, ch. 12
    # WLS is OLS on sqrt(w)-scaled rows: our CR1 of that fit is statsmodels' cluster SE
    s = np.sqrt(w)
    D = np.column_stack([np.ones(g.size), t]) * s[:, None]
    ours = cluster_sandwich(D, y * s, g, np.array([[0.0], [1.0]]), kind="CR1")
    assert row.se == pytest.approx(np.sqrt(ours.cov[0, 0]), rel=1e-10)
    assert row.df == 24
