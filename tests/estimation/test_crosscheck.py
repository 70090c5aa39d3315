"""Unit tests of the cross-check estimators (IPW, AIPW, standardization) and weight diagnostics.

Independent references: weighted means and model predictions recomputed here with
numpy/statsmodels, a brute-force finite-difference sandwich, a nonparametric bootstrap,
closed-form truths of simulated populations (Gauss-Hermite quadrature), and Kish's formula.
"""

import json
import math
import warnings

import numpy as np
import pytest
import statsmodels.api as sm
from scipy import stats

from stratagap.estimation import _ipw
from stratagap.errors import InputError, ModelWarning, SeparationWarning, WeightWarning
from stratagap.estimation.crosscheck import aipw, cross_checks, ipw, standardize


def expit(x):
    return 1.0 / (1.0 + np.exp(-x))


def simulate(n, seed, b=(-0.5, 1.0, -0.6), binary=False):
    """Two normal confounders, logistic exposure (correct for our score model), linear outcome
    with an effect 1 + x1 that varies with the confounder (so ATE != ATT)."""
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, 2))
    e = expit(b[0] + b[1] * X[:, 0] + b[2] * X[:, 1])
    t = (rng.random(n) < e).astype(np.int8)
    if binary:
        p = expit(-0.5 + 0.8 * X[:, 0] + 0.4 * X[:, 1] + t * (0.7 + 0.3 * X[:, 0]))
        y = (rng.random(n) < p).astype(float)
    else:
        y = 1 + 2 * X[:, 0] + X[:, 1] + t * (1 + X[:, 0]) + rng.normal(size=n)
    return y, t, X


def hajek_by_hand(y, t, X, estimand):
    """Independent Hájek estimate: statsmodels Logit score, numpy weighted means."""
    Z = sm.add_constant(X, has_constant="add")
    e = sm.Logit(t, Z).fit(disp=0).predict(Z)
    if estimand == "ate":
        w = np.where(t == 1, 1 / e, 1 / (1 - e))
    else:
        w = np.where(t == 1, 1.0, e / (1 - e))
    mu1 = np.average(y[t == 1], weights=w[t == 1])
    mu0 = np.average(y[t == 0], weights=w[t == 0])
    return mu1, mu0, e, w


@pytest.mark.parametrize("estimand", ["ate", "att"])
def test_ipw_point_estimate_matches_weighted_means(estimand):
    y, t, X = simulate(1500, 11)
    mu1, mu0, _, _ = hajek_by_hand(y, t, X, estimand)
    row, _ = ipw(y, t, X, estimand=estimand, outcome_type="continuous")
    assert row.estimate == pytest.approx(mu1 - mu0, abs=1e-8)
    assert (row.mu1, row.mu0) == pytest.approx((mu1, mu0), abs=1e-8)
    assert row.estimand == estimand.upper() and row.estimand_kind == "marginal"


def brute_force_sandwich_se(y, t, X, estimand):
    """Stacked M-estimation sandwich with a central finite-difference Jacobian, written
    independently of the package (Stefanski & Boos 2002, eqs. 5-6)."""
    n = y.size
    Z = np.column_stack([np.ones(n), X])
    mu1, mu0, _, _ = hajek_by_hand(y, t, X, estimand)
    beta = sm.Logit(t, Z).fit(disp=0).params
    theta = np.concatenate([beta, [mu1, mu0]])

    def psi(th):
        b, m1, m0 = th[:-2], th[-2], th[-1]
        e = expit(Z @ b)
        if estimand == "ate":
            w1, w0 = t / e, (1 - t) / (1 - e)
        else:
            w1, w0 = t * 1.0, (1 - t) * e / (1 - e)
        return np.column_stack([Z * (t - e)[:, None], w1 * (y - m1), w0 * (y - m0)])

    k = theta.size
    J = np.empty((k, k))
    for j in range(k):
        h = 1e-6 * max(1.0, abs(theta[j]))
        up, dn = theta.copy(), theta.copy()
        up[j] += h
        dn[j] -= h
        J[:, j] = (psi(up).mean(0) - psi(dn).mean(0)) / (2 * h)
    A = -J
    P = psi(theta)
    B = P.T @ P / n
    V = np.linalg.inv(A) @ B @ np.linalg.inv(A).T / n
    g = np.zeros(k)
    g[-2], g[-1] = 1, -1
    return math.sqrt(g @ V @ g)


@pytest.mark.parametrize("estimand", ["ate", "att"])
def test_stacked_se_matches_brute_force_numerical_sandwich(estimand):
    y, t, X = simulate(1200, 5)
    row, _ = ipw(y, t, X, estimand=estimand, outcome_type="continuous")
    # finite differences with h ~ 1e-6: relative error ~1e-8, so 1e-6 is safe and tight
    assert row.se == pytest.approx(brute_force_sandwich_se(y, t, X, estimand), rel=1e-6)


@pytest.mark.parametrize("estimand", ["ate", "att"])
@pytest.mark.parametrize("truncate", [None, (5, 95)])
def test_analytic_bread_matches_numerical_jacobian(estimand, truncate):
    y, t, X = simulate(800, 8)
    sfit = _ipw.fit_score(t, X)
    fit = _ipw.ipw_fit(y, t, sfit, estimand, truncate=truncate)
    theta = np.concatenate([sfit["beta"], fit["mu"]])
    limits = None
    if truncate is not None:
        b = fit["bounds"]
        limits = (np.where(t == 1, b["exposed"][0], b["reference"][0]),
                  np.where(t == 1, b["exposed"][1], b["reference"][1]))
    Z = sfit["Z"]
    A = _ipw.ipw_bread(theta, y, t, Z, estimand, limits)
    J = np.empty_like(A)
    for j in range(theta.size):
        h = 1e-7
        up, dn = theta.copy(), theta.copy()
        up[j] += h
        dn[j] -= h
        J[:, j] = (_ipw.ipw_equations(up, y, t, Z, estimand, limits).mean(0)
                   - _ipw.ipw_equations(dn, y, t, Z, estimand, limits).mean(0)) / (2 * h)
    # the clipped weights are piecewise; a step of 1e-7 crosses no clip limit at this seed
    np.testing.assert_allclose(A, -J, rtol=1e-5, atol=1e-7)
    # at the solution the stacked equations are zero (the means solve their equations)
    np.testing.assert_allclose(_ipw.ipw_equations(theta, y, t, Z, estimand, limits).mean(0), 0, atol=1e-7)


@pytest.mark.parametrize("estimand", ["ate", "att"])
def test_standard_errors_agree_with_the_bootstrap(estimand):
    # Nonparametric bootstrap, B = 200, refitting every model in each replicate. The bootstrap
    # SD's Monte Carlo relative SE is about sqrt((kappa - 1) / (4B)) = 1/sqrt(2B) = 5 % for
    # near-normal estimates (kappa = 3); tolerance = 4 MC SEs = 20 %. At this design the SE
    # that treats the score as known is about twice the stacked one, so the test discriminates.
    y, t, X = simulate(1000, 3)
    base = cross_checks(y, t, X, estimand=estimand, outcome_type="continuous")
    rng = np.random.default_rng(20260)
    B = 200
    boot = np.empty((B, 3))
    for b in range(B):
        i = rng.integers(0, y.size, y.size)
        r = cross_checks(y[i], t[i], X[i], estimand=estimand, outcome_type="continuous")
        boot[b] = [row.estimate for row in r.rows]
    sd = boot.std(axis=0, ddof=1)
    tol = 4 / math.sqrt(2 * B)
    for row, s in zip(base.rows, sd):
        assert abs(row.se / s - 1) < tol, (row.method, row.se, s)
    known = base.rows[0].details["se_known_score"]
    assert abs(known / sd[0] - 1) > tol  # the naive SE is visibly off here


# --------------------------------------------------------------------------- double robustness
def _gh2(f):
    """E f(X1, X2) for independent standard normals by Gauss-Hermite quadrature (80 nodes)."""
    x, w = np.polynomial.hermite_e.hermegauss(80)
    w = w / w.sum()
    X1, X2 = np.meshgrid(x, x, indexing="ij")
    return float(np.sum(np.outer(w, w) * f(X1, X2)))


def _scenario(which, n, seed):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, 2))
    if which == "score_right":
        logit = lambda a, b: -0.3 + 1.0 * a - 0.5 * b  # noqa: E731 - linear: our score model is right
        y0 = 1.5 * np.exp(X[:, 0]) + 0.5 * X[:, 1] ** 2  # nonlinear: our linear outcome model is wrong
    else:
        logit = lambda a, b: -0.3 + 0.5 * a + 1.2 * a * b  # noqa: E731 - interaction: score wrong
        y0 = 1 + 2 * X[:, 0] + 2 * X[:, 1]  # linear in each group: outcome model right
    e = expit(logit(X[:, 0], X[:, 1]))
    t = (rng.random(n) < e).astype(np.int8)
    y = y0 + t * (1 + X[:, 0]) + rng.normal(size=n)
    # truths: tau(x) = 1 + x1; ATE = 1, ATT = 1 + E[x1 e(x)] / E[e(x)]
    ett = _gh2(lambda a, b: a * expit(logit(a, b))) / _gh2(lambda a, b: expit(logit(a, b)))
    return y, t, X, {"ate": 1.0, "att": 1.0 + ett}


@pytest.mark.parametrize("which", ["score_right", "outcome_right"])
@pytest.mark.parametrize("estimand", ["ate", "att"])
def test_aipw_is_doubly_robust(which, estimand):
    y, t, X, truth = _scenario(which, 20000, 7)
    res = cross_checks(y, t, X, estimand=estimand, outcome_type="continuous")
    rows = {r.method.split(" ")[0]: r for r in res.rows}
    dr = rows["AIPW"]
    # consistency: |estimate - truth| < 3.5 SE (two-sided tail 5e-4); finite-sample bias is
    # O(1/n), negligible at n = 20,000
    assert abs(dr.estimate - truth[estimand]) < 3.5 * dr.se
    # the estimator that relies only on the wrong model is visibly biased: the test can fail
    wrong = rows["Outcome"] if which == "score_right" else rows["IPW"]
    assert abs(wrong.estimate - truth[estimand]) > 3.5 * wrong.se
    # the one that relies on the right model is consistent too
    right = rows["IPW"] if which == "score_right" else rows["Outcome"]
    assert abs(right.estimate - truth[estimand]) < 3.5 * right.se


def test_aipw_att_formula_by_hand():
    y, t, X = simulate(1000, 21)
    _, _, e, _ = hajek_by_hand(y, t, X, "att")
    Z = sm.add_constant(X)
    m0 = sm.OLS(y[t == 0], Z[t == 0]).fit().predict(Z)
    tau = (np.sum(t * (y - m0)) - np.sum((1 - t) * e / (1 - e) * (y - m0))) / np.sum(t)
    row = aipw(y, t, X, estimand="att", outcome_type="continuous")
    assert row.estimate == pytest.approx(tau, abs=1e-8)


# --------------------------------------------------------------------------- standardization
@pytest.mark.parametrize("estimand", ["ate", "att"])
def test_standardization_matches_statsmodels_predictions(estimand):
    y, t, X = simulate(1500, 4)
    Z = sm.add_constant(X)
    pop = np.ones(y.size, bool) if estimand == "ate" else t == 1
    m1 = sm.OLS(y[t == 1], Z[t == 1]).fit().predict(Z[pop]).mean()
    m0 = sm.OLS(y[t == 0], Z[t == 0]).fit().predict(Z[pop]).mean()
    row = standardize(y, t, X, estimand=estimand, outcome_type="continuous")
    assert row.estimate == pytest.approx(m1 - m0, abs=1e-8)
    # one model with a single exposure x X[:, 1] interaction, built here by hand
    D = np.column_stack([np.ones(y.size), t, X, t * X[:, 1]])
    fit = sm.OLS(y, D).fit()
    one = np.ones(y.size)
    p1 = fit.predict(np.column_stack([one, one, X, X[:, 1]]))[pop].mean()
    p0 = fit.predict(np.column_stack([one, 0 * one, X, 0 * X[:, 1]]))[pop].mean()
    row = standardize(y, t, X, estimand=estimand, outcome_type="continuous", interactions=[1])
    assert row.estimate == pytest.approx(p1 - p0, abs=1e-8)


def test_binary_standardization_and_ratios():
    y, t, X = simulate(3000, 9, binary=True)
    Z = sm.add_constant(X)
    r1 = sm.GLM(y[t == 1], Z[t == 1], family=sm.families.Binomial()).fit().predict(Z).mean()
    r0 = sm.GLM(y[t == 0], Z[t == 0], family=sm.families.Binomial()).fit().predict(Z).mean()
    for measure, ref in (("difference", r1 - r0), ("rr", r1 / r0),
                         ("or", r1 / (1 - r1) / (r0 / (1 - r0)))):
        row = standardize(y, t, X, estimand="ate", outcome_type="binary", measure=measure)
        assert row.estimate == pytest.approx(ref, rel=1e-7)
        if measure != "difference":
            z = stats.norm.ppf(0.975)
            # ratio CIs are symmetric on the log scale with the reported log-scale SE
            assert math.log(row.ci_high / row.ci_low) == pytest.approx(2 * z * row.se, rel=1e-10)
            assert row.se_scale == "log ratio"
    mu1, mu0, _, _ = hajek_by_hand(y, t, X, "ate")
    row, _ = ipw(y, t, X, estimand="ate", outcome_type="binary", measure="rr")
    assert row.estimate == pytest.approx(mu1 / mu0, rel=1e-8)


# --------------------------------------------------------------------------- weights
def test_weight_diagnostics_and_truncation_by_hand():
    y, t, X = simulate(1000, 13, b=(0.0, 1.8, 0.0))
    _, _, e, w = hajek_by_hand(y, t, X, "ate")
    row, diag = ipw(y, t, X, estimand="ate", outcome_type="continuous", truncate=(2, 98))
    for name, g in (("exposed", 1), ("reference", 0)):
        wg = w[t == g]
        assert diag.ess[name] == pytest.approx(wg.sum() ** 2 / (wg**2).sum(), rel=1e-8)  # Kish 1965
        assert diag.max_weight[name] == pytest.approx(wg.max(), rel=1e-8)
        assert diag.max_share[name] == pytest.approx(wg.max() / wg.sum(), rel=1e-8)
        lo, hi = np.percentile(wg, [2, 98])
        assert diag.truncation_bounds[name] == pytest.approx([lo, hi], rel=1e-8)
        assert diag.n_truncated[name] == int(np.sum((wg < lo) | (wg > hi)))
        w[t == g] = np.clip(wg, lo, hi)
    ref = np.average(y[t == 1], weights=w[t == 1]) - np.average(y[t == 0], weights=w[t == 0])
    assert row.estimate == pytest.approx(ref, abs=1e-8)
    assert diag.percentiles == (2.0, 98.0)
    res = cross_checks(y, t, X, estimand="ate", outcome_type="continuous", truncate=(2, 98))
    assert [r.method.split(" (")[0] for r in res.rows] == ["IPW", "IPW", "AIPW", "Outcome regression, standardized"]


def test_extreme_weights_warn_and_truncation_tames_them():
    rng = np.random.default_rng(0)
    X = rng.normal(size=(300, 1))
    t = (rng.random(300) < expit(-3.5 + 3.0 * X[:, 0])).astype(np.int8)
    y = X[:, 0] + rng.normal(size=300)
    with pytest.warns(WeightWarning, match="exposed"):
        _, diag = ipw(y, t, X, estimand="ate", outcome_type="continuous", truncate=(1, 99))
    assert diag.max_share["exposed"] > diag.share_flag
    assert diag.max_weight_truncated["exposed"] < diag.max_weight["exposed"]
    assert diag.ess_truncated["exposed"] > diag.ess["exposed"]


# --------------------------------------------------------------------------- contract
def test_to_dict_is_json_ready_and_reproducible():
    y, t, X = simulate(600, 1)
    res = cross_checks(y, t, X, estimand="att", outcome_type="continuous", truncate=(1, 99))
    d = res.to_dict()
    assert json.loads(json.dumps(d)) == d
    assert d == cross_checks(y, t, X, estimand="att", outcome_type="continuous", truncate=(1, 99)).to_dict()
    assert {"method", "estimate", "se", "ci_low", "ci_high", "estimand", "estimand_kind", "notes"} <= set(d["rows"][0])
    assert set(d["weights"]) >= {"max_weight", "max_share", "ess", "n_truncated", "percentiles"}
    assert res.to_frame().shape[0] == 4


def test_row_order_invariance():
    y, t, X = simulate(700, 6)
    perm = np.random.default_rng(0).permutation(y.size)
    a = cross_checks(y, t, X, estimand="ate", outcome_type="continuous")
    b = cross_checks(y[perm], t[perm], X[perm], estimand="ate", outcome_type="continuous")
    for ra, rb in zip(a.rows, b.rows):
        assert ra.estimate == pytest.approx(rb.estimate, abs=1e-9)
        assert ra.se == pytest.approx(rb.se, rel=1e-7)


def test_separation_falls_back_to_given_score():
    y, t, X = simulate(400, 3)
    X = np.column_stack([X, t + 0.0])  # a covariate identical to the exposure
    with pytest.warns(SeparationWarning), pytest.raises(InputError, match="score"):
        cross_checks(y, t, X, estimand="ate", outcome_type="continuous")
    score = np.clip(expit(X[:, 0]), 0.05, 0.95)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = cross_checks(y, t, X, estimand="ate", outcome_type="continuous", score=score)
    assert res.score_source.startswith("given score")
    assert "known" in res.rows[0].se_method


def test_score_disagreement_is_noted():
    y, t, X = simulate(500, 2)
    res = cross_checks(y, t, X, estimand="ate", outcome_type="continuous",
                       score=np.full(y.size, t.mean()))
    assert any("differs" in n for n in res.notes)


@pytest.mark.parametrize("kwargs, match", [
    ({"estimand": "atc"}, "estimand"),
    ({"outcome_type": "count"}, "outcome_type"),
    ({"measure": "rr"}, "measure"),
    ({"measure": "hr"}, "measure"),
    ({"alpha": 1.5}, "alpha"),
    ({"alpha": True}, "alpha"),
    ({"truncate": (99, 1)}, "truncate"),
    ({"truncate": "1-99"}, "truncate"),
    ({"score": np.ones(50)}, "score"),
])
def test_bad_arguments(kwargs, match):
    y, t, X = simulate(50, 1)
    args = {"estimand": "ate", "outcome_type": "continuous", **kwargs}
    with pytest.raises(InputError, match=match):
        cross_checks(y, t, X, **args)


def test_bad_arrays():
    y, t, X = simulate(50, 1)
    with pytest.raises(InputError, match="`t`"):
        cross_checks(y, t + 1, X, estimand="ate", outcome_type="continuous")
    with pytest.raises(InputError, match="binary"):
        cross_checks(y, t, X, estimand="ate", outcome_type="binary")
    with pytest.raises(InputError, match="`X`"):
        cross_checks(y, t, X[:10], estimand="ate", outcome_type="continuous")
    y2 = y.copy()
    y2[0] = np.nan
    with pytest.raises(InputError, match="finite"):
        cross_checks(y2, t, X, estimand="ate", outcome_type="continuous")
    with pytest.raises(InputError, match="interactions"):
        standardize(y, t, X, estimand="ate", outcome_type="continuous", interactions=[5])


def test_binary_cross_checks_aipw_ate_by_hand():
    y, t, X = simulate(2500, 17, binary=True)
    _, _, e, _ = hajek_by_hand(y, t, X, "ate")
    Z = sm.add_constant(X)
    fam = sm.families.Binomial()
    m1 = sm.GLM(y[t == 1], Z[t == 1], family=fam).fit().predict(Z)
    m0 = sm.GLM(y[t == 0], Z[t == 0], family=fam).fit().predict(Z)
    r1 = np.mean(m1 + t * (y - m1) / e)  # Lunceford & Davidian 2004
    r0 = np.mean(m0 + (1 - t) * (y - m0) / (1 - e))
    res = cross_checks(y, t, X, estimand="ate", outcome_type="binary", measure="rr",
                       estimand_label="ATE in the overlap population")
    row = next(r for r in res.rows if r.method.startswith("AIPW"))
    assert row.estimate == pytest.approx(r1 / r0, rel=1e-7)
    assert all(r.estimand == "ATE in the overlap population" for r in res.rows)
    assert all(r.measure == "rr" and r.ci_low < r.estimate < r.ci_high for r in res.rows)
    # numpy integer indexes are accepted for the interactions
    assert standardize(y, t, X, estimand="att", outcome_type="binary",
                       interactions=np.array([0])).notes[0].endswith("columns [0]")


def test_no_events_in_a_group_warns_and_leaves_ratios_undefined():
    y, t, X = simulate(300, 5, binary=True)
    y[t == 1] = 0.0
    with pytest.warns(ModelWarning, match="outcome model"):
        res = cross_checks(y, t, X, estimand="ate", outcome_type="binary", measure="rr")
    d = res.to_dict()
    assert all(r["estimate"] is None and r["ci_low"] is None for r in d["rows"])
    assert "undefined" in d["rows"][0]["notes"][-1]


def test_gap_from_the_headline_in_combined_se_units():
    """Closed form: z = (c - h) / sqrt(se_c^2 + se_h^2), on the log scale for ratios."""
    from types import SimpleNamespace
    from stratagap.estimation.crosscheck import (CrossCheckResult, CrossCheckRow,
                                                 compare_with_headline)

    def row(est, se, measure):
        return CrossCheckRow(method="m", estimate=est, se=se, ci_low=est, ci_high=est,
                             measure=measure, se_scale="x", estimand="ATE", estimand_kind="marginal",
                             population="p", mu1=0.0, mu0=0.0, se_method="s")

    res = CrossCheckResult(rows=(row(3.0, 0.3, "difference"), row(1.2, 0.4, "difference")),
                           weights=None, estimand="ate", measure="difference",
                           outcome_type="continuous", alpha=0.05, score_source="s")
    head = SimpleNamespace(estimate=2.0, se=0.4, scale="identity")
    out = compare_with_headline(res, head)
    assert out.rows[0].headline_gap_z == pytest.approx(1.0 / 0.5)
    assert out.rows[0].differs_from_headline is True
    assert out.rows[1].headline_gap_z == pytest.approx(-0.8 / math.sqrt(0.32))
    assert out.rows[1].differs_from_headline is False
    ratio = CrossCheckResult(rows=(row(2.0, 0.2, "rr"),), weights=None, estimand="ate",
                             measure="rr", outcome_type="binary", alpha=0.05, score_source="s")
    out = compare_with_headline(ratio, SimpleNamespace(estimate=1.0, se=0.1, scale="log"))
    assert out.rows[0].headline_gap_z == pytest.approx(math.log(2.0) / math.sqrt(0.05))


@pytest.mark.parametrize("n, spline_kept", [(300, False), (3000, True)])
def test_outcome_models_keep_spline_columns_only_with_ten_units_per_column(n, spline_kept):
    """The headline's rule (10 units per column in each group) also guards the outcome models of
    AIPW and standardization; the reference value is statsmodels OLS on the columns used."""
    y, t, X = simulate(n, 4)
    rng = np.random.default_rng(9)
    extra = rng.normal(size=(n, 16))  # stand-ins for spline columns: 18 columns in all
    Xs = np.column_stack([X, extra])
    res = cross_checks(y, t, Xs, estimand="ate", outcome_type="continuous", n_linear=2)
    used = Xs if spline_kept else X
    Z = sm.add_constant(used)
    m1 = sm.OLS(y[t == 1], Z[t == 1]).fit().predict(Z).mean()
    m0 = sm.OLS(y[t == 0], Z[t == 0]).fit().predict(Z).mean()
    row = next(r for r in res.rows if r.method.startswith("Outcome regression"))
    assert row.estimate == pytest.approx(m1 - m0, abs=1e-8)
    assert any("use linear terms" in note for note in res.notes) is (not spline_kept)
