"""The shipped default, pinned end to end through ``stratagap.analyze``.

Each test recomputes one documented default from the analysed rows with an independent tool
(statsmodels, scipy) and compares it with what ``analyze`` reports, so a wrong default in the
pipeline's wiring fails here (docs/validation.md lists the mutations this module must catch):

* the strata: five quantile strata of a main-effects logistic score (ATE: pooled quantiles;
  ATT: quantiles of the exposed scores after setting aside reference units outside the exposed
  score range);
* the test's values are the residuals of the covariance adjustment, least squares of the outcome
  on the covariates with stratum fixed effects, never the exposure (Rosenbaum 2002, Statistical
  Science 17:286, section 3), and the statistic is their estimand-weighted stratified difference
  of means; its normal-engine p-value is the normal tail from the exact permutation variance;
* the Gamma = 1 end of the sensitivity curve is the test's own one-sided p-value in the direction
  of the effect (Rosenbaum 2002, Observational Studies, ch. 4: Gamma = 1 is the randomization
  distribution);
* the headline CI is estimate +/- z_{1 - alpha/2} SE, with SE^2 = sum_s w_s^2 V_s from Lin's
  (2013) interacted regression within each stratum with HC2 errors (Annals of Applied
  Statistics 7:295; MacKinnon & White 1985, J. Econometrics 29:305).
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy import stats
from scipy.special import expit

import stratagap

TIGHT = 1e-9  # exact computations on the same rows: rounding error only


def _confounded(seed=11, n=2000, effect=0.25, skew=False):
    """Two confounders (normal, binary); x raises both exposure and outcome."""
    rng = np.random.default_rng(seed)
    x1 = rng.standard_normal(n)
    x2 = (rng.random(n) < 0.4).astype(float)
    t = (rng.random(n) < expit(-0.2 + 0.8 * x1 + 0.6 * x2)).astype(int)
    noise = rng.lognormal(0.0, 1.2, n) if skew else rng.standard_normal(n)
    y = 1.0 * x1 + 0.5 * x2 + effect * t * (1 + 0.5 * x1) + noise
    yb = (rng.random(n) < expit(-0.4 + 0.7 * x1 + 0.4 * x2 + 0.3 * t)).astype(int)
    return pd.DataFrame({"t": t, "y": y, "yb": yb, "x1": x1, "x2": x2})


def _analyze(table, outcome="y", covariates=("x1", "x2"), **options):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return stratagap.analyze(table, exposure="t", outcome=outcome,
                                 covariates=list(covariates), **options)


def _rows(result, table, columns):
    """The analysed rows of the original table, in the result's order."""
    rows = result.arrays["row_ids"][result.arrays["used"]]
    return table.iloc[rows][list(columns)].to_numpy(float)


def _weights(labels, t, estimand):
    ids = np.unique(labels)
    n1 = np.array([np.sum(t[labels == s]) for s in ids], float)
    ns = np.array([np.sum(labels == s) for s in ids], float)
    return ids, (ns / ns.sum() if estimand == "ate" else n1 / n1.sum())


def _reference_design(table):
    """The default terms built with formulaic, not the package: the binary x2 as it is, the
    continuous x1 as a natural cubic spline, formulaic's centred cr() (a natural cubic
    spline, linear beyond the outer knots), with 5 knots at Harrell's quantiles .05, .275, .5,
    .725, .95 of the analysed sample (Harrell 2015, Regression Modeling Strategies, ch. 2, from
    memory; 5 knots from 1,000 rows is our rule, docs/methods.md). Only the span matters to
    every check below, and cr() with the centring constraint spans x1 and its nonlinear part."""
    import formulaic

    k = np.quantile(table["x1"], (0.05, 0.275, 0.5, 0.725, 0.95))
    spline = formulaic.model_matrix(
        f"cr(x1, knots={list(k[1:-1])}, lower_bound={k[0]}, upper_bound={k[-1]}, "
        "constraints='center') - 1", table[["x1"]]).to_numpy(float)
    return np.column_stack([table["x1"].to_numpy(float), table["x2"].to_numpy(float), spline])


def _reference_score(table, covariates):
    """The default score model (the default terms) fitted by statsmodels' Logit."""
    design = sm.add_constant(_reference_design(table))
    fit = sm.Logit(table["t"].to_numpy(float), design).fit(disp=0, method="newton", tol=1e-12)
    return fit.predict(design)


# --------------------------------------------------------------------------- the strata
@pytest.mark.parametrize("estimand", ["ate", "att"])
def test_default_strata_are_score_quintiles_and_att_sets_aside_reference_units(estimand):
    table = _confounded()
    res = _analyze(table, engine="normal", estimand=estimand)
    score = _reference_score(table, ["x1", "x2"])
    t_all = table["t"].to_numpy()
    keep = np.ones(len(table), bool)
    if estimand == "att":  # default rule "auto": reference units outside the exposed range go
        lo, hi = score[t_all == 1].min(), score[t_all == 1].max()
        keep = (t_all == 1) | ((score >= lo) & (score <= hi))
        assert (~keep).sum() > 0  # the check needs some to set aside
    base = score[keep] if estimand == "ate" else score[keep & (t_all == 1)]
    cuts = np.quantile(base, [0.2, 0.4, 0.6, 0.8])
    expected = np.searchsorted(cuts, score, side="left")  # stratum j holds (c_{j-1}, c_j]
    rows = res.arrays["row_ids"][res.arrays["used"]]
    assert sorted(rows) == sorted(np.flatnonzero(keep))
    np.testing.assert_array_equal(res.arrays["labels"], expected[rows])


# --------------------------------------------------------------------------- the statistic
@pytest.mark.parametrize("estimand", ["ate", "att"])
@pytest.mark.parametrize("alternative", ["two-sided", "greater", "less"])
def test_statistic_is_weighted_difference_of_covariance_adjusted_residuals(estimand, alternative):
    table = _confounded()
    res = _analyze(table, engine="normal", estimand=estimand, alternative=alternative)
    labels, t, y = res.arrays["labels"], res.arrays["t"], res.arrays["y"]
    X = _reference_design(table)[res.arrays["row_ids"][res.arrays["used"]]]
    np.testing.assert_allclose(y, _rows(res, table, ["y"])[:, 0], rtol=0, atol=0)
    # Rosenbaum 2002: residuals of y on the covariates and stratum dummies, without t
    dummies = pd.get_dummies(labels).to_numpy(float)
    r = sm.OLS(y, np.column_stack([X, dummies])).fit().resid
    ids, w = _weights(labels, t, estimand)
    diff = np.array([r[(labels == s) & (t == 1)].mean() - r[(labels == s) & (t == 0)].mean()
                     for s in ids])
    statistic = float(np.sum(w * diff))
    main = res.tests.main
    assert main.statistic == pytest.approx(statistic, rel=TIGHT, abs=1e-12)
    # exact permutation variance of a within-stratum difference of means: n_s S_s^2 / (n1 n0)
    var = sum(ws ** 2 * np.sum(labels == s) * r[labels == s].var(ddof=1)
              / (np.sum(t[labels == s]) * np.sum(1 - t[labels == s])) for s, ws in zip(ids, w))
    z = statistic / math.sqrt(var)
    expected = {"two-sided": 2 * stats.norm.sf(abs(z)), "greater": stats.norm.sf(z),
                "less": stats.norm.cdf(z)}[alternative]
    assert main.alternative == alternative
    assert main.p_value == pytest.approx(expected, rel=1e-8)
    # the confounding is strong enough that the unadjusted statistic is far from this one
    raw = sum(ws * (y[(labels == s) & (t == 1)].mean() - y[(labels == s) & (t == 0)].mean())
              for s, ws in zip(ids, w))
    assert abs(raw - statistic) > 0.02


def test_default_engine_p_value_is_the_permutation_p_of_the_adjusted_statistic():
    # The shipped default engine ("auto": Monte Carlo, 10,000 shuffles here) against the normal
    # tail of the same statistic; the tolerance is 4 Monte Carlo SEs plus the normal
    # approximation's error at n = 2,000 with near-normal residuals (well below 0.005).
    table = _confounded(effect=0.1)
    res = _analyze(table)
    main = res.tests.main
    assert main.engine == "monte_carlo" and main.resamples == 10_000
    normal = _analyze(table, engine="normal").tests.main
    assert main.statistic == pytest.approx(normal.statistic, rel=TIGHT)
    assert 0.01 < normal.p_value < 0.9  # a p-value where the comparison means something
    assert abs(main.p_value - normal.p_value) <= 4 * main.mc_se + 0.005


# --------------------------------------------------------------------------- Gamma = 1
def _one_sided(result):
    main = result.tests.main
    return main.p_greater if result.sensitivity.gamma_direction == "greater" else main.p_less


def _pairs(seed=3, n_pairs=400, binary=False):
    rng = np.random.default_rng(seed)
    x = rng.normal(size=n_pairs).repeat(2) + rng.normal(0, 0.1, 2 * n_pairs)
    t = np.tile([1, 0], n_pairs)
    y = x + 0.15 * t + rng.normal(size=2 * n_pairs)
    return pd.DataFrame({"pair": np.arange(n_pairs).repeat(2), "t": t, "x": x,
                         "y": (y > 0.3).astype(int) if binary else y})


PATHS = {
    "continuous": (lambda: _confounded(effect=0.1), dict(outcome="y")),
    "binary": (lambda: _confounded(), dict(outcome="yb")),
    "pairs": (lambda: _pairs(), dict(covariates=("x",), strata_column="pair")),
    "pairs_binary": (lambda: _pairs(binary=True), dict(covariates=("x",), strata_column="pair")),
}


@pytest.mark.parametrize("path", list(PATHS))
def test_gamma_one_is_the_tests_one_sided_p_normal_engine(path):
    make, options = PATHS[path]
    res = _analyze(make(), engine="normal", **options)
    assert res.sensitivity.gamma_curve[0]["gamma"] == 1.0
    assert res.sensitivity.gamma_curve[0]["p_upper"] == pytest.approx(_one_sided(res), rel=1e-9)
    direction = "greater" if res.tests.main.statistic >= 0 else "less"
    assert res.sensitivity.gamma_direction == direction


@pytest.mark.parametrize("path", list(PATHS))
def test_gamma_one_is_the_tests_one_sided_p_default_engine(path):
    # With the default engine the test's p is a Monte Carlo (or exact) p: the curve at
    # Gamma = 1 is that p-value itself, whichever engine computed it.
    make, options = PATHS[path]
    res = _analyze(make(), **options)
    assert res.sensitivity.gamma_curve[0]["p_upper"] == _one_sided(res)


def test_gamma_one_equals_the_monte_carlo_p_on_a_skewed_outcome():
    table = _confounded(effect=0.3, skew=True)
    res = _analyze(table, estimand="att")
    assert res.tests.main.engine == "monte_carlo"
    assert res.sensitivity.gamma_curve[0]["p_upper"] == pytest.approx(_one_sided(res), rel=1e-9)


# --------------------------------------------------------------------------- headline CI
def _lin_stratum(y, t, X, estimand):
    """statsmodels OLS of y on [1, t, Xc, t Xc] with HC2; Xc centred for the estimand."""
    centre = X.mean(axis=0) if estimand == "ate" else X[t == 1].mean(axis=0)
    Xc = X - centre
    D = np.column_stack([np.ones(len(y)), t, Xc, t[:, None] * Xc])
    fit = sm.OLS(y, D).fit(cov_type="HC2")
    return fit.params[1], fit.bse[1]


@pytest.mark.parametrize("estimand", ["ate", "att"])
@pytest.mark.parametrize("alpha", [0.05, 0.10])
def test_headline_ci_is_estimate_plus_minus_z_se_with_the_documented_variance(estimand, alpha):
    table = _confounded()
    res = _analyze(table, engine="normal", estimand=estimand, alpha=alpha)
    adj = res.adjusted
    assert {row["model"] for row in adj.per_stratum} == {"interactions"}  # the full Lin model
    labels, t, y = res.arrays["labels"], res.arrays["t"], res.arrays["y"]
    X = _reference_design(table)[res.arrays["row_ids"][res.arrays["used"]]]
    ids, w = _weights(labels, t, estimand)
    fits = [_lin_stratum(y[labels == s], t[labels == s].astype(float), X[labels == s], estimand)
            for s in ids]
    tau = np.array([f[0] for f in fits])
    se = math.sqrt(float(np.sum(w ** 2 * np.array([f[1] for f in fits]) ** 2)))
    z = stats.norm.ppf(1 - alpha / 2)
    assert adj.estimate == pytest.approx(float(np.sum(w * tau)), rel=TIGHT)
    assert adj.se == pytest.approx(se, rel=TIGHT)
    assert adj.ci_low == pytest.approx(adj.estimate - z * se, rel=TIGHT)
    assert adj.ci_high == pytest.approx(adj.estimate + z * se, rel=TIGHT)
    assert (adj.ci_high - adj.ci_low) / (2 * se) == pytest.approx(z, rel=TIGHT)


def test_headline_risk_ratio_ci_is_exp_log_estimate_plus_minus_z_se():
    # measure="rr": the ratio of standardized risks with a delta-method CI on the log scale
    table = _confounded()
    res = _analyze(table, outcome="yb", engine="normal", measure="rr")
    adj = res.adjusted
    assert adj.measure == "risk ratio" and adj.scale == "log"
    assert adj.estimate == pytest.approx(adj.risk_exposed / adj.risk_reference, rel=TIGHT)
    z = stats.norm.ppf(0.975)
    assert adj.ci_low == pytest.approx(adj.estimate * math.exp(-z * adj.se), rel=TIGHT)
    assert adj.ci_high == pytest.approx(adj.estimate * math.exp(z * adj.se), rel=TIGHT)


def test_gamma_bounds_beyond_one_are_those_of_the_tests_residuals():
    """Above Gamma = 1 the bounds are computed on the values the test ran on: the residuals of
    the covariance adjustment (recomputed here with statsmodels), not the raw outcome."""
    from stratagap.sensitivity import gamma_bounds

    table = _confounded()
    res = _analyze(table, engine="normal")
    labels, t, y = res.arrays["labels"], res.arrays["t"], res.arrays["y"]
    X = _reference_design(table)[res.arrays["row_ids"][res.arrays["used"]]]
    r = sm.OLS(y, np.column_stack([X, pd.get_dummies(labels).to_numpy(float)])).fit().resid
    grid = [g["gamma"] for g in res.sensitivity.gamma_curve]
    ref = gamma_bounds(r, t, labels, estimand="ate", statistic="mean_difference",
                       direction=res.sensitivity.gamma_direction, gammas=grid)
    got = res.sensitivity.gamma_curve
    p_one = got[0]["p_upper"]
    for g, row, up in zip(grid, got, ref.p_upper):
        if g > 1.0:
            assert row["p_upper"] == pytest.approx(max(up, p_one), rel=1e-6)
