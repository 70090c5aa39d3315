"""Unit tests of stratagap.estimation.effects: crude, the stratified regression headline, the plain
stratified difference, Mantel-Haenszel and the constant-effect inversion.

Independent values: closed forms computed here with numpy/pandas, scipy's Welch interval,
separate per-group regressions (Lin 2013's imputation form of the interacted estimator), the
paired-difference SE, and brute-force enumeration of assignments on tiny strata.
"""

import itertools
import json
import math
import warnings

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from stratagap.estimation import effects
from stratagap.errors import InputError, ModelWarning


def _confounded(n=2000, seed=1, binary=False, hetero=True):
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(n, 3))
    ps = 1 / (1 + np.exp(-0.8 * x[:, 0]))
    t = (rng.random(n) < ps).astype(np.int8)
    effect = 1 + (0.5 * x[:, 0] if hetero else 0)
    y = x[:, 0] + 0.5 * x[:, 1] + t * effect + rng.normal(size=n)
    if binary:
        y = (y > 0.5).astype(float)
    labels = np.searchsorted(np.quantile(ps, [0.2, 0.4, 0.6, 0.8]), ps).astype(np.int64)
    return y, t, x, labels


# --------------------------------------------------------------------------- crude
def test_crude_continuous_matches_scipy_welch():
    y, t, _, _ = _confounded()
    est = effects.crude(y, t, "continuous", alpha=0.1)
    ref = stats.ttest_ind(y[t == 1], y[t == 0], equal_var=False)  # Welch 1947 via scipy
    ci = ref.confidence_interval(confidence_level=0.9)
    assert est.estimate == pytest.approx(y[t == 1].mean() - y[t == 0].mean(), rel=1e-12)
    assert est.se == pytest.approx(est.estimate / ref.statistic, rel=1e-10)
    assert (est.ci_low, est.ci_high) == pytest.approx((ci.low, ci.high), rel=1e-10)
    assert "before trimming" in est.population and est.measure == "mean difference"


def test_crude_binary_wald():
    y, t, _, _ = _confounded(binary=True)
    est = effects.crude(y, t, "binary")
    p1, p0, n1, n0 = y[t == 1].mean(), y[t == 0].mean(), (t == 1).sum(), (t == 0).sum()
    se = math.sqrt(p1 * (1 - p1) / n1 + p0 * (1 - p0) / n0)  # Wald, closed form
    assert est.measure == "risk difference"
    assert est.se == pytest.approx(se, rel=1e-12)
    assert est.ci_high - est.estimate == pytest.approx(1.959963984540054 * se, rel=1e-9)


# --------------------------------------------------------------------------- headline
def _imputation_estimate(y, t, X, estimand):
    """Lin (2013) interacted OLS = separate group regressions averaged over the target units."""
    D = np.column_stack([np.ones(len(y)), X])
    b1 = np.linalg.lstsq(D[t == 1], y[t == 1], rcond=None)[0]
    b0 = np.linalg.lstsq(D[t == 0], y[t == 0], rcond=None)[0]
    target = D if estimand == "ate" else D[t == 1]
    return float(np.mean(target @ b1 - target @ b0))


@pytest.mark.parametrize("estimand", ["ate", "att"])
def test_stratum_effect_is_lin_imputation_estimate(estimand):
    y, t, x, labels = _confounded()
    res = effects.stratified_regression(y, t, x, labels, estimand=estimand)
    for row in res.per_stratum:
        m = labels == row["stratum"]
        assert row["model"] == "interactions"
        assert row["estimate"] == pytest.approx(_imputation_estimate(y[m], t[m], x[m], estimand),
                                                abs=1e-10)
    n1 = np.bincount(labels, weights=t)
    n = np.bincount(labels)
    w = n / n.sum() if estimand == "ate" else n1 / n1.sum()
    tau = np.array([r["estimate"] for r in res.per_stratum])
    se = np.array([r["se"] for r in res.per_stratum])
    assert res.estimate == pytest.approx(np.sum(w * tau), abs=1e-12)
    assert res.se == pytest.approx(math.sqrt(np.sum(w ** 2 * se ** 2)), rel=1e-12)
    assert [r["weight"] for r in res.per_stratum] == pytest.approx(w.tolist())


def test_hc2_matches_closed_form_for_difference_of_means():
    # With no covariates the model is [1, t]; its HC2 variance is s1^2/n1 + s0^2/n0 (Imbens &
    # Rubin 2015, ch. 7), and the headline equals the plain stratified difference.
    y, t, _, labels = _confounded()
    res = effects.stratified_regression(y, t, np.empty((len(y), 0)), labels, estimand="ate")
    plain = effects.plain_stratified_difference(y, t, labels, estimand="ate")
    df = pd.DataFrame({"y": y, "t": t, "s": labels})
    g = df.groupby(["s", "t"]).y.agg(["mean", "var", "count"]).unstack("t")
    v = g["var"][1] / g["count"][1] + g["var"][0] / g["count"][0]
    w = (g["count"][0] + g["count"][1]) / len(y)
    assert plain.estimate == pytest.approx(float((w * (g["mean"][1] - g["mean"][0])).sum()), 1e-12)
    assert plain.se == pytest.approx(float(np.sqrt((w ** 2 * v).sum())), rel=1e-12)
    assert res.estimate == pytest.approx(plain.estimate, abs=1e-12)
    assert res.se == pytest.approx(plain.se, rel=1e-10)


def test_coverage_heterogeneous_effect():
    # Superpopulation ATE = 1 (effect 1 + 0.5 x0, E x0 = 0), outcome linear in x: no residual
    # bias. 250 datasets: MC SE of a 95 % coverage = sqrt(.95 .05 / 250) = 0.0138; accept +-3 SE.
    hits = {"ate": 0, "att": 0}
    reps = 250
    for seed in range(reps):
        y, t, x, labels = _confounded(n=800, seed=100 + seed)
        for est in ("ate", "att"):
            r = effects.stratified_regression(y, t, x, labels, estimand=est)
            # ATT truth: 1 + 0.5 E[x0 | t=1]; E[x0 | t=1] estimated by a large draw below
            truth = 1.0 if est == "ate" else _ATT_TRUTH
            hits[est] += r.ci_low <= truth <= r.ci_high
    for est in hits:
        assert abs(hits[est] / reps - 0.95) <= 3 * math.sqrt(0.95 * 0.05 / reps)


def _att_truth():
    """1 + 0.5 E[x0 | t=1] with x0 ~ N(0,1), P(t=1|x0) = expit(0.8 x0): numerical integration."""
    from scipy import integrate

    def p(x):
        return stats.norm.pdf(x) / (1 + math.exp(-0.8 * x))

    num = integrate.quad(lambda x: x * p(x), -12, 12)[0]
    return 1 + 0.5 * num / integrate.quad(p, -12, 12)[0]


_ATT_TRUTH = _att_truth()


def test_fallbacks_are_recorded_and_warned():
    rng = np.random.default_rng(5)
    n = 60
    x = rng.normal(size=(n, 3))
    x[:, 2] = 7.0  # constant: dropped
    t = np.zeros(n, dtype=np.int8)
    t[:4] = 1  # stratum 0: 2 covariate columns kept, needs 2 + 2 = 4 per group: interactions
    labels = np.zeros(n, dtype=np.int64)
    labels[30:] = 1
    t[30:33] = 1  # stratum 1: 3 exposed < 4 -> main effects
    y = x[:, 0] + t + rng.normal(size=n)
    with pytest.warns(ModelWarning, match="simplified"):
        res = effects.stratified_regression(y, t, x, labels, estimand="ate",
                                            names=["a", "b", "c"])
    s0, s1 = res.per_stratum
    assert s0["model"] == "interactions" and "constant within the stratum: c" in s0["reason"]
    assert s1["model"] == "main effects" and "interactions need >= 4" in s1["reason"]
    assert any("stratum 1: main effects" in c for c in res.choices)
    # main-effects tau_s equals OLS on [1, t, x] (centring does not move it)
    m = labels == 1
    D = np.column_stack([np.ones(m.sum()), t[m], x[m][:, :2]])
    assert s1["estimate"] == pytest.approx(np.linalg.lstsq(D, y[m], rcond=None)[0][1], abs=1e-10)


def test_single_exposed_unit_falls_back_to_pooled_difference():
    rng = np.random.default_rng(6)
    y = rng.normal(size=12)
    x = rng.normal(size=(12, 1))
    t = np.array([1] + [0] * 5 + [1, 1, 1, 0, 0, 0], dtype=np.int8)
    labels = np.array([0] * 6 + [1] * 6)
    with pytest.warns(ModelWarning):
        res = effects.stratified_regression(y, t, x, labels, estimand="ate")
    row = res.per_stratum[0]
    assert row["model"] == "difference of means" and "leverage" in row["reason"]
    y0 = y[1:6]
    pooled = np.sum((y0 - y0.mean()) ** 2) / (6 - 2)  # pooled within-stratum variance
    assert row["estimate"] == pytest.approx(y[0] - y0.mean(), abs=1e-12)
    assert row["se"] == pytest.approx(math.sqrt(pooled * (1 + 1 / 5)), rel=1e-12)


def test_collinear_and_singleton_columns():
    y, t, x, labels = _confounded(n=800, seed=8)
    dup = np.column_stack([x, x[:, 0] + 2 * x[:, 1]])  # exact linear combination
    a = effects.stratified_regression(y, t, x, labels, estimand="ate")
    b = effects.stratified_regression(y, t, dup, labels, estimand="ate")
    assert b.estimate == pytest.approx(a.estimate, abs=1e-9)
    assert b.se == pytest.approx(a.se, rel=1e-8)
    assert "linear combination" in b.per_stratum[0]["reason"]
    assert any("stratum 0: interactions (linear combination" in c for c in b.choices)
    odd = np.column_stack([x, np.zeros(len(y))])
    odd[np.flatnonzero(labels == 2)[0], 3] = 1.0  # one unit differs: leverage 1 if kept
    c = effects.stratified_regression(y, t, odd, labels, estimand="ate")
    assert "except for one unit" in c.per_stratum[2]["reason"]
    assert c.per_stratum[2]["model"] == "interactions"
    assert c.estimate == pytest.approx(a.estimate, abs=1e-9)


@pytest.mark.parametrize("estimand", ["ate", "att"])
def test_dummy_absent_from_one_group_enters_as_a_main_effect(estimand):
    # A level present among the exposed only (an extreme stratum): its interaction is not
    # estimable (the interacted design would be rank deficient); a level held by one reference
    # unit would give that unit leverage 1. Both slopes are shared and the other columns keep
    # their interactions. Reference: statsmodels OLS with HC2 on that design.
    import statsmodels.api as sm

    rng = np.random.default_rng(21)
    n = 300
    t = (rng.random(n) < 0.5).astype(np.int8)
    x = rng.normal(size=n)
    d = np.where(t == 1, (rng.random(n) < 0.2).astype(float), 0.0)  # level absent if t = 0
    # level e: one reference unit holds it (interacted, that unit would get leverage 1)
    e = np.where(t == 1, (rng.random(n) < 0.2).astype(float), 0.0)
    e[np.flatnonzero(t == 0)[0]] = 1.0
    y = x + 2.0 * d - e + t * (1.0 + 0.5 * x) + rng.normal(size=n)
    # x listed last: had the levels been interacted anyway, every prefix of the interacted
    # columns would hold level e and fail, and x would lose its interaction too
    X = np.column_stack([d, e, x])
    res = effects.stratified_regression(y, t, X, np.zeros(n, np.int64), estimand=estimand,
                                        names=["level d", "level e", "x"])
    row = res.per_stratum[0]
    assert row["model"] == "partial interactions" and row["interacted"] == ["x"]
    assert "main effect only (slope shared by the groups): level d, level e" in row["reason"]
    centre = X.mean(axis=0) if estimand == "ate" else X[t == 1].mean(axis=0)
    Xc = X - centre
    D = np.column_stack([np.ones(n), t, Xc, t * Xc[:, 2]])
    fit = sm.OLS(y, D).fit(cov_type="HC2")
    assert row["estimate"] == pytest.approx(fit.params[1], abs=1e-10)
    assert row["se"] == pytest.approx(fit.bse[1], rel=1e-9)
    assert not any("simplified" in c for c in res.choices)


def test_interactions_that_extrapolate_give_way_to_main_effects():
    # The reference group covers a narrow range of x, the exposed a wide one: the reference
    # group's own slope extrapolated to the exposed (ATT) has a design variance far above that
    # of main effects, so main effects are used and the ratio recorded. The ratio is computed
    # here from (D'D)^-1 with numpy.
    rng = np.random.default_rng(22)
    n1, n0 = 200, 30
    x = np.concatenate([rng.normal(0, 2, n1), rng.uniform(-0.1, 0.1, n0)])
    t = np.r_[np.ones(n1), np.zeros(n0)].astype(np.int8)
    y = x + t + rng.normal(size=n1 + n0)
    with pytest.warns(ModelWarning, match="simplified"):
        res = effects.stratified_regression(y, t, x[:, None], np.zeros(n1 + n0, np.int64),
                                            estimand="att", names=["x"])
    row = res.per_stratum[0]
    xc = x - x[t == 1].mean()
    D = np.column_stack([np.ones(n1 + n0), t, xc, t * xc])
    ratio = np.linalg.inv(D.T @ D)[1, 1] / np.linalg.inv(D[:, :3].T @ D[:, :3])[1, 1]
    assert ratio > 4
    assert row["model"] == "main effects" and f"{ratio:.3g} times" in row["reason"]
    # the same design with a reference group as wide as the exposed keeps the interactions
    x2 = np.concatenate([x[:n1], rng.normal(0, 2, n0)])
    wide = effects.stratified_regression(y, t, x2[:, None], np.zeros(n1 + n0, np.int64),
                                         estimand="att", names=["x"])
    assert wide.per_stratum[0]["model"] == "interactions"


def test_interactions_give_way_column_by_column_from_the_last_covariate():
    # x is as wide in both groups; z is wide among the exposed and narrow among the 40
    # reference units, so interacting z extrapolates (design variance ratio > 4) while
    # interacting x alone does not. The ladder keeps x's interaction and shares z's slope
    # ("partial interactions"), rather than giving up every interaction. Reference: statsmodels
    # OLS with HC2 on [1, t, xc, zc, t*xc], centred at the exposed means (ATT).
    import statsmodels.api as sm

    rng = np.random.default_rng(23)
    n1, n0 = 200, 40
    n = n1 + n0
    x = rng.normal(0, 1, n)
    z = np.concatenate([rng.normal(0.5, 2, n1), rng.uniform(-0.1, 0.1, n0)])
    t = np.r_[np.ones(n1), np.zeros(n0)].astype(np.int8)
    y = x + 0.5 * z + t * (1 + 0.5 * x) + rng.normal(size=n)
    xc, zc = x - x[t == 1].mean(), z - z[t == 1].mean()
    full = np.column_stack([np.ones(n), t, xc, zc, t * xc, t * zc])
    main = full[:, :4]
    prefix = full[:, :5]

    def ratio(D):
        return np.linalg.inv(D.T @ D)[1, 1] / np.linalg.inv(main.T @ main)[1, 1]

    assert ratio(full) > 4 >= ratio(prefix)  # the data do what the comment says
    res = effects.stratified_regression(y, t, np.column_stack([x, z]), np.zeros(n, np.int64),
                                        estimand="att", names=["x", "z"])
    row = res.per_stratum[0]
    assert row["model"] == "partial interactions"
    assert "interactions of z and later columns given up" in row["reason"]
    assert f"{ratio(full):.3g} times" in row["reason"]
    ref = sm.OLS(y, prefix).fit(cov_type="HC2")
    assert res.estimate == pytest.approx(ref.params[1], rel=1e-10)
    assert res.se == pytest.approx(ref.bse[1], rel=1e-8)
    # with z listed first, its interaction is the first to try and the last to give up: no
    # prefix passes, so main effects are used and the analysis says it was simplified
    with pytest.warns(ModelWarning, match="simplified"):
        swapped = effects.stratified_regression(y, t, np.column_stack([z, x]),
                                                np.zeros(n, np.int64), estimand="att",
                                                names=["z", "x"])
    assert swapped.per_stratum[0]["model"] == "main effects"


def _exact_inverse_tt(D):
    """[(D'D)^-1]_tt (column 1) in exact rational arithmetic: Gauss-Jordan on Fractions."""
    from fractions import Fraction

    F = [[Fraction(float(v)) for v in row] for row in D]
    k = len(F[0])
    A = [[sum(r[i] * r[j] for r in F) for j in range(k)] + [Fraction(int(i == j)) for j in range(k)]
         for i in range(k)]
    for c in range(k):
        piv = next(r for r in range(c, k) if A[r][c] != 0)
        A[c], A[piv] = A[piv], A[c]
        A[c] = [v / A[c][c] for v in A[c]]
        for r in range(k):
            if r != c and A[r][c] != 0:
                A[r] = [a - A[r][c] * b for a, b in zip(A[r], A[c])]
    return float(A[1][k + 1])


def test_design_variance_is_exact_on_a_nearly_collinear_design():
    # Two columns nearly equal on the reference units, apart on the exposed (a spline column
    # almost linear on an extreme stratum's reference units), centred at the exposed means:
    # the reference fit must extrapolate along the near-degenerate direction, so the effect's
    # design variance is huge. The explicit inverse of D'D is unreliable there (once negative,
    # which passed the extrapolation rule); the value must equal exact rational arithmetic.
    from stratagap.estimation._within_strata import (EXTRAPOLATION_RATIO, GRAM_CONDITION,
                                                     _design_variances)

    rng = np.random.default_rng(31)
    n1, n0 = 150, 60
    t = np.r_[np.ones(n1), np.zeros(n0)]
    z1 = rng.normal(size=n1 + n0)
    z2 = np.where(t == 1, rng.normal(1.0, 1.0, n1 + n0), z1 + 1e-5 * rng.normal(size=n1 + n0))
    Z = np.column_stack([z1, z2])
    Z = Z - Z[t == 1].mean(axis=0)
    D = np.column_stack([np.ones(n1 + n0), t, Z, t[:, None] * Z])
    assert np.linalg.cond(D) > 1e5
    exact = _exact_inverse_tt(D)
    assert np.linalg.cond(D.T @ D) > GRAM_CONDITION  # the QR path
    full, shared = _design_variances(D, 4)
    assert full == pytest.approx(exact, rel=1e-7)
    assert shared == pytest.approx(_exact_inverse_tt(D[:, :4]), rel=1e-9)
    # a well-conditioned design takes the Gram path: the same exact values
    assert np.linalg.cond(D[:, :4].T @ D[:, :4]) < GRAM_CONDITION
    assert _design_variances(D[:, :4], 3) == pytest.approx(
        (_exact_inverse_tt(D[:, :4]), _exact_inverse_tt(D[:, :3])), rel=1e-9)
    assert exact / _exact_inverse_tt(D[:, :4]) > EXTRAPOLATION_RATIO  # refused, as it should be


def test_matched_pairs_use_between_pair_variance():
    rng = np.random.default_rng(9)
    S = 40
    labels = np.repeat(np.arange(S), 2)
    t = np.tile([1, 0], S).astype(np.int8)
    y = rng.normal(size=2 * S) + t * 0.7
    x = rng.normal(size=(2 * S, 2))
    res = effects.stratified_regression(y, t, x, labels, estimand="att")
    d = y[t == 1] - y[t == 0]
    ref = stats.ttest_rel(y[t == 1], y[t == 0])  # paired t: SE = sd(d)/sqrt(S)
    assert res.estimate == pytest.approx(d.mean(), abs=1e-12)
    assert res.se == pytest.approx(math.sqrt(np.sum((d - d.mean()) ** 2) / (S * (S - 1))), 1e-12)
    assert res.se == pytest.approx(d.mean() / ref.statistic, rel=1e-10)
    assert "between-set" in res.variance_method
    plain = effects.plain_stratified_difference(y, t, labels, estimand="ate")
    assert plain.se == pytest.approx(res.se, rel=1e-12)


def test_binary_ratios_delta_method():
    y, t, x, labels = _confounded(binary=True, seed=3)
    rd = effects.stratified_regression(y, t, x, labels, estimand="ate")
    rr = effects.stratified_regression(y, t, x, labels, estimand="ate", measure="rr")
    orr = effects.stratified_regression(y, t, x, labels, estimand="ate", measure="or")
    assert rd.measure == "risk difference" and rr.measure == "risk ratio"
    p1, p0 = rd.risk_exposed, rd.risk_reference
    w = np.array([r["weight"] for r in rd.per_stratum])
    a = np.array([r["reference_mean"] for r in rd.per_stratum])
    tau = np.array([r["estimate"] for r in rd.per_stratum])
    assert p1 - p0 == pytest.approx(rd.estimate, abs=1e-12)
    assert p0 == pytest.approx(np.sum(w * a), abs=1e-12) and p1 == pytest.approx(
        np.sum(w * (a + tau)), abs=1e-12)
    assert rr.estimate == pytest.approx(p1 / p0, rel=1e-12)
    assert orr.estimate == pytest.approx(p1 / (1 - p1) / (p0 / (1 - p0)), rel=1e-12)
    # log-scale CI symmetric around log estimate
    assert math.log(rr.ci_high) - math.log(rr.estimate) == pytest.approx(
        math.log(rr.estimate) - math.log(rr.ci_low), rel=1e-10)
    assert rr.scale == "log" and rr.se > 0


def test_ratio_delta_method_against_numerical_gradient():
    # Independent: finite-difference gradient of log(p1/p0) in (a_s, tau_s), with the per-stratum
    # HC2 covariances of (a_s, tau_s) from statsmodels OLS(...).fit(cov_type="HC2").
    import statsmodels.api as sm
    y, t, x, labels = _confounded(binary=True, seed=4, n=1500)
    rr = effects.stratified_regression(y, t, x, labels, estimand="att", measure="rr")
    thetas, covs, ws = [], [], []
    for row in rr.per_stratum:
        m = labels == row["stratum"]
        xc = x[m] - x[m][t[m] == 1].mean(axis=0)
        D = np.column_stack([np.ones(m.sum()), t[m], xc, t[m][:, None] * xc])
        fit = sm.OLS(y[m], D).fit(cov_type="HC2")
        thetas.append(fit.params[:2])
        covs.append(fit.cov_params()[:2, :2])
        ws.append(row["weight"])
    theta, w = np.array(thetas), np.array(ws)

    def log_rr(th):
        return math.log(np.sum(w * (th[:, 0] + th[:, 1])) / np.sum(w * th[:, 0]))

    var = 0.0
    for s in range(len(w)):
        g = np.zeros(2)
        for j in range(2):
            h = 1e-6
            up, dn = theta.copy(), theta.copy()
            up[s, j] += h
            dn[s, j] -= h
            g[j] = (log_rr(up) - log_rr(dn)) / (2 * h)
        var += g @ covs[s] @ g
    assert rr.estimate == pytest.approx(math.exp(log_rr(theta)), rel=1e-10)
    assert rr.se == pytest.approx(math.sqrt(var), rel=1e-6)  # central differences: O(h^2)


def test_to_dict_round_trip_and_none_for_nan():
    y, t, x, labels = _confounded(n=400)
    res = effects.stratified_regression(y, t, x, labels, estimand="ate",
                                        population="ATE in the overlap population")
    d = res.to_dict()
    assert json.loads(json.dumps(d, allow_nan=False)) == d
    assert d["estimand"] == "ATE in the overlap population"
    for key in ("estimate", "se", "ci_low", "ci_high", "measure", "population", "method",
                "alpha", "per_stratum", "choices"):
        assert key in d
    assert set(d["per_stratum"][0]) >= {"stratum", "n_exposed", "n_reference", "estimate", "se",
                                        "ci_low", "ci_high", "model", "weight"}
    nan = effects.Estimate(1.0, math.nan, math.nan, math.nan, "mean difference", "ATE", "p", "m")
    assert nan.to_dict()["se"] is None


def test_row_order_invariance():
    y, t, x, labels = _confounded(n=600)
    perm = np.random.default_rng(0).permutation(len(y))
    a = effects.stratified_regression(y, t, x, labels, estimand="ate")
    b = effects.stratified_regression(y[perm], t[perm], x[perm], labels[perm], estimand="ate")
    assert b.estimate == pytest.approx(a.estimate, abs=1e-12)
    assert b.se == pytest.approx(a.se, rel=1e-10)


@pytest.mark.parametrize("kwargs, match", [
    ({"estimand": "atc"}, "estimand"),
    ({"estimand": "ate", "measure": "hr"}, "measure"),
    ({"estimand": "ate", "alpha": 1.5}, "alpha"),
    ({"estimand": "ate", "measure": "rr"}, "binary"),
    ({"estimand": "ate", "interaction_min_extra": -1}, "interaction_min_extra"),
])
def test_bad_arguments(kwargs, match):
    y, t, x, labels = _confounded(n=200)
    with pytest.raises(InputError, match=match):
        effects.stratified_regression(y, t, x, labels, **kwargs)


def test_bad_data():
    y, t, x, labels = _confounded(n=200)
    with pytest.raises(InputError, match="lack one of the groups"):
        effects.stratified_regression(y, np.where(labels == 0, 0, t), x, labels, estimand="ate")
    with pytest.raises(InputError, match="0/1"):
        effects.crude(y, t * 2, "continuous")
    yy = y.copy()
    yy[3] = np.nan
    with pytest.raises(InputError, match="missing"):
        effects.crude(yy, t, "continuous")
    with pytest.raises(InputError, match="binary"):
        effects.mantel_haenszel(y, t, labels)


# --------------------------------------------------------------------------- Mantel-Haenszel
def test_mh_risk_difference_independent_formula():
    y, t, _, labels = _confounded(binary=True, seed=11)
    mh = effects.mantel_haenszel(y, t, labels)
    num = den = sp = sq = 0.0
    for s in np.unique(labels):  # Greenland & Robins 1985 / Sato 1989, written stratum by stratum
        ys, ts = y[labels == s], t[labels == s]
        a = float(np.sum(ys[ts == 1]))
        c = float(np.sum(ys[ts == 0]))
        n1, n0 = float(np.sum(ts == 1)), float(np.sum(ts == 0))
        N = n1 + n0
        num += (a * n0 - c * n1) / N
        den += n1 * n0 / N
        sp += (n1 * n1 * c - n0 * n0 * a + n1 * n0 * (n0 - n1) / 2) / (N * N)
        sq += (a * (n0 - c) + c * (n1 - a)) / (2 * N)
    rd = num / den
    assert mh["risk_difference"].estimate == pytest.approx(rd, abs=1e-13)
    assert mh["risk_difference"].se == pytest.approx(math.sqrt((rd * sp + sq) / den ** 2), 1e-12)


def test_mh_variances_calibrated_in_sparse_strata():
    # Sparse-data check of the dually consistent variances (Sato 1989; Greenland & Robins 1985;
    # Robins, Breslow & Greenland 1986): 200 strata of 6 units, common RR. Over 1000 datasets
    # the mean estimated variance should match the empirical variance of the estimates. The
    # empirical variance has relative MC SE about sqrt(2/999) = 4.5 %; the mean estimated
    # variance is far more precise; accept 4 SE (18 %).
    rng = np.random.default_rng(21)
    S, reps = 200, 1000
    labels = np.repeat(np.arange(S), 6)
    t = np.tile([1, 1, 0, 0, 0, 0], S).astype(np.int8)
    base = np.repeat(rng.uniform(0.1, 0.3, S), 6)
    risk = np.where(t == 1, 1.5 * base, base)
    est = {k: [] for k in ("risk_difference", "risk_ratio", "odds_ratio")}
    var = {k: [] for k in est}
    for _ in range(reps):
        y = (rng.random(len(t)) < risk).astype(float)
        mh = effects.mantel_haenszel(y, t, labels)
        for k in est:
            e = mh[k].estimate
            est[k].append(e if k == "risk_difference" else math.log(e))
            var[k].append(mh[k].se ** 2)
    for k in est:
        ratio = np.mean(var[k]) / np.var(est[k], ddof=1)
        assert abs(ratio - 1) < 0.18, (k, ratio)


# --------------------------------------------------------------------------- constant effect
def _residualize(v, X, labels):
    """Independent residualization: OLS with one dummy per stratum (numpy lstsq)."""
    D = np.column_stack([X, (labels[:, None] == np.unique(labels)[None, :]).astype(float)])
    return v - D @ np.linalg.lstsq(D, v, rcond=None)[0]


def _stat(r, t, labels, estimand):
    out = 0.0
    n1 = np.bincount(labels, weights=t)
    n = np.bincount(labels)
    w = n / n.sum() if estimand == "ate" else n1 / n1.sum()
    for s in range(len(n)):
        m = labels == s
        out += w[s] * (r[m][t[m] == 1].mean() - r[m][t[m] == 0].mean())
    return out


def test_constant_effect_exact_matches_enumeration():
    # Tiny strata: brute-force enumeration of every within-strata assignment (itertools).
    rng = np.random.default_rng(2)
    labels = np.repeat([0, 1, 2], [6, 5, 6])
    t = np.array([1, 1, 0, 0, 0, 0, 1, 0, 0, 1, 0, 1, 1, 1, 0, 0, 0], dtype=np.int8)
    x = rng.normal(size=(len(t), 1))
    y = x[:, 0] + 2.0 * t + rng.normal(size=len(t)) * 0.5
    res = effects.constant_effect(y, t, x, labels, estimand="ate", resamples=10000, seed=1)
    assert res.engine == "exact"
    r_y, r_t = _residualize(y, x, labels), _residualize(t.astype(float), x, labels)
    assert res.estimate == pytest.approx(_stat(r_y, t, labels, "ate") / _stat(r_t, t, labels,
                                                                                "ate"), 1e-10)
    groups = [np.flatnonzero(labels == s) for s in range(3)]
    choices = [list(itertools.combinations(g, int(t[g].sum()))) for g in groups]

    M = []
    for combo in itertools.product(*choices):  # every within-strata assignment
        tt = np.zeros(len(t))
        tt[list(itertools.chain(*combo))] = 1
        M.append(tt)
    M = np.array(M)
    n_s = np.bincount(labels)
    n1_s = np.bincount(labels, weights=t)
    w = n_s / n_s.sum()
    strata = (labels[None, :] == np.arange(3)[:, None]).astype(float)  # (3, n)

    def p_brute(tau):
        r = r_y - tau * r_t
        obs = _stat(r, t, labels, "ate")
        ex = (M * r) @ strata.T  # (A, 3) exposed sums
        tot = strata @ r
        null = ((ex / n1_s - (tot - ex) / (n_s - n1_s)) * w).sum(axis=1)
        g = 1e-9 * max(abs(obs), np.abs(null).max())
        return min(1, 2 * min(np.mean(null >= obs - g), np.mean(null <= obs + g)))

    for tau in (0.0, 1.0, res.estimate, 3.3):
        k = int(np.argmin(np.abs(np.array(res.curve_tau) - tau)))
        tau = res.curve_tau[k]
        assert res.curve_p[k] == pytest.approx(p_brute(tau), abs=1e-12)
    assert res.p_value_at_zero == pytest.approx(p_brute(0.0), abs=1e-12)
    # duality at the hull ends: just inside accepted, just outside rejected
    assert p_brute(res.ci_low + 1e-6) > 0.05 >= p_brute(res.ci_low - 1e-3)
    assert p_brute(res.ci_high - 1e-6) > 0.05 >= p_brute(res.ci_high + 1e-3)


def test_constant_effect_normal_closed_form_and_equivariance():
    y, t, x, labels = _confounded(n=1500, hetero=False)
    a = effects.constant_effect(y, t, x, labels, estimand="ate", engine="normal")
    b = effects.constant_effect(y + 0.8 * t, t, x, labels, estimand="ate", engine="normal")
    assert a.engine == "normal" and a.is_interval
    assert b.estimate - a.estimate == pytest.approx(0.8, abs=1e-9)  # shift equivariance
    assert b.ci_low - a.ci_low == pytest.approx(0.8, abs=1e-8)
    # the CI ends are where the normal p-value equals alpha (closed form vs p function)
    r_y, r_t = _residualize(y, x, labels), _residualize(t.astype(float), x, labels)
    n1 = np.bincount(labels, weights=t)
    n = np.bincount(labels)
    w = n / n.sum()

    def p_norm(tau):
        r = r_y - tau * r_t
        var = sum(w[s] ** 2 * n[s] / (n1[s] * (n[s] - n1[s])) * np.var(r[labels == s], ddof=1)
                  for s in range(len(n)))  # permutation variance of a difference of means
        return 2 * stats.norm.sf(abs(_stat(r, t, labels, "ate")) / math.sqrt(var))

    assert p_norm(a.ci_low) == pytest.approx(0.05, abs=1e-9)
    assert p_norm(a.ci_high) == pytest.approx(0.05, abs=1e-9)
    assert p_norm(0.0) == pytest.approx(a.p_value_at_zero, rel=1e-8)


def test_constant_effect_monte_carlo_interval_and_batches():
    y, t, x, labels = _confounded(n=600, hetero=False, seed=4)
    a = effects.constant_effect(y, t, x, labels, estimand="att", resamples=999, seed=7)
    b = effects.constant_effect(y, t, x, labels, estimand="att", resamples=999, seed=7,
                                batch_size=250)
    n = effects.constant_effect(y, t, x, labels, estimand="att", engine="normal")
    assert a.engine == "monte_carlo" and a.resamples == 999
    assert (a.ci_low, a.ci_high, a.p_value_at_zero) == (b.ci_low, b.ci_high, b.p_value_at_zero)
    assert a.ci_low < a.estimate < a.ci_high and a.is_interval
    # MC ends are near the 2.5 % / 97.5 % null quantiles, close to the normal-engine ends at
    # n = 600. SE of an estimated 2.5 % quantile with B = 999, in z units:
    # sqrt(.025 .975 / 999) / phi(1.96) = 0.085, i.e. 4.3 % of 1.96; the width (two ends,
    # roughly independent) has relative SE ~3 %: accept 12 % (4 SE).
    assert (a.ci_high - a.ci_low) == pytest.approx(n.ci_high - n.ci_low, rel=0.12)
    assert json.loads(json.dumps(a.to_dict(), allow_nan=False))["engine"] == "monte_carlo"


def test_constant_effect_rejects_binary():
    y, t, x, labels = _confounded(n=200, binary=True)
    with pytest.raises(InputError, match="continuous"):
        effects.constant_effect(y, t, x, labels, estimand="ate", resamples=99, seed=0)


@pytest.mark.parametrize("engine, n, resamples", [("monte_carlo", 400, 499), ("auto", 400, 299),
                                                  ("normal", 400, 999), ("exact", 17, 10000),
                                                  ("auto", 17, 10000)])
def test_constant_effect_agrees_with_core_test_at_zero(engine, n, resamples):
    # Same seed, same engine: p(tau0 = 0) is the core test's p-value on the same residuals.
    from stratagap.inference import permutation
    y, t, x, labels = _confounded(n=n, hetero=False, seed=12)
    if n == 17:
        labels = np.repeat([0, 1, 2], [6, 5, 6])
        t = np.array([1, 1, 0, 0, 0, 0, 1, 0, 0, 1, 0, 1, 1, 1, 0, 0, 0], dtype=np.int8)
    y = y - 1.0 * t + 0.08 * t  # small effect: a p-value away from its floor
    for estimand in ("ate", "att"):
        r = permutation.residualize(y, x, labels)
        core = permutation.stratified_test(r, t, labels, estimand=estimand, engine=engine,
                                           resamples=resamples, seed=5)
        ce = effects.constant_effect(y, t, x, labels, estimand=estimand, engine=engine,
                                     resamples=resamples, seed=5)
        assert ce.engine == core.engine
        assert ce.statistic_outcome == pytest.approx(core.statistic, rel=1e-12)
        assert ce.p_value_at_zero == pytest.approx(core.p_value, rel=1e-12)


def test_matched_pairs_ratio_variance_paired_delta_method():
    # Pairs, binary outcome: log RR of the marginal risks with the paired delta method
    # Var = [s11/p1^2 + s00/p0^2 - 2 s10/(p1 p0)] / S (sample covariances of the pair outcomes).
    rng = np.random.default_rng(13)
    S = 300
    labels = np.repeat(np.arange(S), 2)
    t = np.tile([1, 0], S).astype(np.int8)
    base = np.repeat(rng.uniform(0.1, 0.5, S), 2)
    y = (rng.random(2 * S) < np.where(t == 1, 1.4 * base, base)).astype(float)
    res = effects.stratified_regression(y, t, np.empty((2 * S, 0)), labels, estimand="att",
                                        measure="rr")
    y1, y0 = y[t == 1], y[t == 0]
    p1, p0 = y1.mean(), y0.mean()
    c = np.cov(y1, y0, ddof=1)
    var = (c[0, 0] / p1 ** 2 + c[1, 1] / p0 ** 2 - 2 * c[0, 1] / (p1 * p0)) / S
    assert res.estimate == pytest.approx(p1 / p0, rel=1e-12)
    assert res.se == pytest.approx(math.sqrt(var), rel=1e-10)


from hypothesis import given, settings, strategies as st  # noqa: E402


@settings(max_examples=60, deadline=None)
@given(seed=st.integers(0, 10_000), n_strata=st.integers(1, 4), size=st.integers(2, 14),
       p=st.integers(0, 3), estimand=st.sampled_from(["ate", "att"]))
def test_property_any_small_design_gives_a_recorded_result(seed, n_strata, size, p, estimand):
    rng = np.random.default_rng(seed)
    labels = np.repeat(np.arange(n_strata), size)
    t = np.zeros(len(labels), dtype=np.int8)
    for s in range(n_strata):  # at least one unit of each group per stratum
        k = rng.integers(1, size)
        t[np.flatnonzero(labels == s)[rng.permutation(size)[:k]]] = 1
    X = rng.integers(0, 3, size=(len(t), p)).astype(float)  # coarse: ties, constants, dummies
    y = rng.normal(size=len(t)) + t
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ModelWarning)
        res = effects.stratified_regression(y, t, X, labels, estimand=estimand)
    assert math.isfinite(res.estimate)
    assert all(r["model"] in ("interactions", "partial interactions", "main effects",
                              "difference of means") for r in res.per_stratum)
    assert math.isnan(res.se) or res.se >= 0
    json.dumps(res.to_dict(), allow_nan=False)
    perm = rng.permutation(len(t))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ModelWarning)
        again = effects.stratified_regression(y[perm], t[perm], X[perm], labels[perm],
                                              estimand=estimand)
    assert again.estimate == pytest.approx(res.estimate, abs=1e-8)


@pytest.mark.parametrize("measure", ["rr", "or"])
def test_crude_ratio_equals_statsmodels_table2x2(measure):
    """Crude risk ratio (Katz et al. 1978 log interval) and odds ratio (Woolf 1955) against
    statsmodels' Table2x2 (riskratio / oddsratio and their confint)."""
    import statsmodels.api as sm

    rng = np.random.default_rng(12)
    t = (rng.random(900) < 0.4).astype(np.int8)
    y = (rng.random(900) < np.where(t == 1, 0.3, 0.2)).astype(float)
    a, b = int(y[t == 1].sum()), int((1 - y[t == 1]).sum())
    c, d = int(y[t == 0].sum()), int((1 - y[t == 0]).sum())
    table = sm.stats.Table2x2(np.array([[a, b], [c, d]]))
    got = effects.crude(y, t, "binary", measure=measure)
    if measure == "rr":
        ref, (lo, hi) = table.riskratio, table.riskratio_confint()
    else:
        ref, (lo, hi) = table.oddsratio, table.oddsratio_confint()
    assert got.estimate == pytest.approx(ref, rel=1e-12)
    assert (got.ci_low, got.ci_high) == pytest.approx((lo, hi), rel=1e-10)
    assert got.measure == {"rr": "risk ratio", "or": "odds ratio"}[measure]


def test_spline_ladder_guard_of_ten_units_per_column():
    # Columns 0-1 linear, 2-3 spline columns (n_linear=2): 4 columns in all.
    rng = np.random.default_rng(15)
    n = 200
    x = rng.normal(size=(n, 4))
    labels = np.repeat([0, 1, 2], [100, 60, 40]).astype(np.int64)
    t = np.zeros(n, dtype=np.int8)
    t[:40] = 1     # stratum 0: 40 exposed, 60 reference >= 10 x 4: interacted splines
    t[100:125] = 1  # stratum 1: 25 exposed carry 2 interacted columns; 60 >= 10 x (4 + 2)
    t[160:175] = 1  # stratum 2: 15 exposed carry 1; 40 units < 10 x (4 + 1): main effects
    y = x[:, 0] + t + rng.normal(size=n)
    res = effects.stratified_regression(y, t, x, labels, estimand="att", n_linear=2,
                                        names=["a", "b", "a: spline 1", "b: spline 1"])
    s0, s1, s2 = res.per_stratum
    assert s0["model"] == "interactions" and s0["reason"] == "all checks passed"
    # stratum 1: the first covariate's columns (linear and spline) interacted, the second's
    # shared by the groups
    assert s1["model"] == "partial interactions" and s1["interacted"] == ["a", "a: spline 1"]
    assert "each group carries 2 interacted columns of 4" in s1["reason"]
    m1 = labels == 1
    Xc1 = x[m1] - x[m1][t[m1] == 1].mean(axis=0)
    D1 = np.column_stack([np.ones(m1.sum()), t[m1], Xc1, t[m1][:, None] * Xc1[:, [0, 2]]])
    assert s1["estimate"] == pytest.approx(np.linalg.lstsq(D1, y[m1], rcond=None)[0][1],
                                           abs=1e-10)
    assert s2["model"] == "main effects" and s2["interacted"] == []
    assert res.settings["spline_units_per_column"] == 10
    # the interacted fit is Lin's on all four columns, centred at the exposed mean (ATT)
    m = labels == 0
    Xc = x[m] - x[m][t[m] == 1].mean(axis=0)
    D = np.column_stack([np.ones(m.sum()), t[m], Xc, t[m][:, None] * Xc])
    assert s0["estimate"] == pytest.approx(np.linalg.lstsq(D, y[m], rcond=None)[0][1], abs=1e-10)
    # fewer than 40 units in a stratum: the linear ladder on the first two columns, and a warning
    small = labels == 2
    with pytest.warns(ModelWarning, match="simplified"):
        r2 = effects.stratified_regression(y[small][:30], t[small][:30], x[small][:30],
                                           np.zeros(30, np.int64), estimand="ate", n_linear=2,
                                           names=["a", "b", "a: spline 1", "b: spline 1"])
    row = r2.per_stratum[0]
    assert row["model"] == "linear interactions" and row["covariates"] == ["a", "b"]
    assert "splines need >= 40 units" in row["reason"]
    lin = effects.stratified_regression(y[small][:30], t[small][:30], x[small][:30, :2],
                                        np.zeros(30, np.int64), estimand="ate")
    assert row["estimate"] == pytest.approx(lin.estimate, abs=1e-12)
    # with no spline columns the ladder is unchanged (n_linear = p)
    same = effects.stratified_regression(y, t, x, labels, estimand="att", n_linear=4)
    base = effects.stratified_regression(y, t, x, labels, estimand="att")
    assert same.estimate == base.estimate


def test_spline_columns_give_way_before_linear_terms_when_a_unit_sits_alone():
    # One exposed unit at x = -3.3, every other unit of the stratum in [0.6, 3]: x's spline
    # columns fit that unit alone (leverage 1) in every spline design, interacted or not.
    # Spline columns give way from the last covariate's last one until the design is
    # estimable; x keeps its first spline column, and the stratum is not sent to linear terms
    # in every covariate. Knots by the package's rule on a pooled N(0, 1) sample (the analysed
    # sample is wider than one stratum). Reference: statsmodels OLS with HC2 on the design
    # kept, centred at the exposed means (ATT).
    import statsmodels.api as sm

    from stratagap.data._splines import choose_knots, nonlinear_columns

    rng = np.random.default_rng(41)
    knots, _ = choose_knots(rng.normal(size=2000))
    u_knots, _ = choose_knots(rng.random(2000))
    assert len(knots) == 5 and len(u_knots) == 5
    n1, n0 = 200, 60
    n = n1 + n0
    x = rng.uniform(0.6, 3.0, n)
    x[0] = -3.3
    u = rng.random(n)
    t = np.r_[np.ones(n1), np.zeros(n0)].astype(np.int8)
    X = np.column_stack([x, u, nonlinear_columns(x, knots), nonlinear_columns(u, u_knots)])
    names = ["x", "u"] + [f"{c}: spline {j}" for c in "xu" for j in (1, 2, 3)]
    y = x + x ** 2 + u + t * (1 + 0.5 * x ** 2) + rng.normal(size=n)
    main = np.column_stack([np.ones(n), t, X])
    r = np.linalg.qr(main, mode="r")
    keep = np.abs(np.diag(r)) > 1e-9 * np.abs(np.diag(r)).max()
    leverage = (np.linalg.qr(main[:, keep])[0] ** 2).sum(axis=1)
    assert leverage[0] > 1 - 1e-9  # the unit alone has leverage 1 even under main effects
    res = effects.stratified_regression(y, t, X, np.zeros(n, np.int64), estimand="att",
                                        n_linear=2, names=names)
    row = res.per_stratum[0]
    assert row["model"] == "interactions"
    assert row["covariates"] == ["x", "u", "x: spline 1"] == row["interacted"]
    assert "spline columns given up: x: spline 2, u: spline 1, u: spline 2, u: spline 3" \
        in row["reason"]
    Xk = X[:, [0, 1, 2]]
    Xc = Xk - Xk[t == 1].mean(axis=0)
    ref = sm.OLS(y, np.column_stack([np.ones(n), t, Xc, t[:, None] * Xc])).fit(cov_type="HC2")
    assert row["estimate"] == pytest.approx(ref.params[1], rel=1e-9)
    assert row["se"] == pytest.approx(ref.bse[1], rel=1e-8)


def test_spline_of_a_covariate_with_few_values_in_a_group_is_dropped_to_linear():
    """A cluster-level covariate (six values per group) keeps only its linear column; the
    other covariate keeps its spline, and the fit equals the same model built by hand."""
    from stratagap.estimation._within_strata import fit_stratum

    rng = np.random.default_rng(4)
    n = 600
    t = (np.arange(n) % 2).astype(np.int8)
    x = rng.normal(size=n)
    h = np.where(t == 1, rng.integers(0, 6, n), rng.integers(10, 16, n)).astype(float)
    xs, hs = x ** 3 / 10, h ** 3 / 100  # stand-ins for one spline column each
    X = np.column_stack([x, h, xs, hs])
    y = x + 0.1 * h + rng.normal(size=n)
    names = ["x", "h", "x: spline 1", "h: spline 1"]
    fit = fit_stratum(y, t, X, estimand="ate", min_extra=2, names=names, n_linear=2)
    assert "'h' linear here" in fit["reason"] and fit["columns"] == ["x", "h", "x: spline 1"]
    ref = fit_stratum(y, t, X[:, :3], estimand="ate", min_extra=2, names=names[:3], n_linear=2)
    assert fit["tau"] == pytest.approx(ref["tau"], rel=1e-12)
