"""Effects on follow-up times against statsmodels, closed forms and independent computations.

Sources: Kaplan-Meier and Greenwood against statsmodels ``SurvfuncRight``; log(-log) pointwise
limits against the closed form of Klein & Moeschberger (2003, eq. 4.3.2); the restricted mean
and its variance (K&M 2003 sec. 4.5) against a numerical double integral of Greenwood's
covariance ``Cov(S(u), S(v)) = S(u) S(v) G(min(u, v))`` (K&M 2003 sec. 4.2); Cox predictions
against statsmodels ``PHReg``'s own Breslow baseline; the hazard ratio against our own Breslow
score equation; the bootstrap SE against Greenwood's SE within Monte Carlo error.
"""

import math

import numpy as np
import pytest
from scipy import stats
from statsmodels.duration.hazard_regression import PHReg
from statsmodels.duration.survfunc import SurvfuncRight

from stratagap.errors import DataWarning, InputError
from stratagap.estimation.survival import (adjusted_risk_difference, censoring_difference,
                                           choose_horizon, combine_curves,
                                           crude_risk_difference, hazard_ratio, kaplan_meier,
                                           restricted_mean, rmst_difference,
                                           stratum_hazard_ratios)
from stratagap.estimation.survival.risk_difference import _survival_cox
from stratagap.inference.survival_scores import breslow_cumulative_hazard


def _data(n=400, seed=2, effect=0.4):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, 2))
    t = (rng.random(n) < 1 / (1 + np.exp(-X[:, 0]))).astype(np.int8)
    codes = np.digitize(X[:, 0], [0.0]).astype(np.int64)
    ev = rng.exponential(1 / np.exp(0.6 * X[:, 0] + 0.3 * X[:, 1] + effect * t))
    cens = rng.uniform(0.5, 3.0, size=n)
    time = np.round(np.minimum(ev, cens), 3)
    return time, (ev <= cens).astype(float), t, X, codes


def _through(times, cumhaz, h):
    """statsmodels 0.15's baseline at an event time excludes that time's own jump (cumsum - h0):
    Lambda(h) including every event <= h is its value at the first event time after h."""
    return cumhaz[np.searchsorted(times, h, side="right")]


def test_kaplan_meier_against_survfuncright():
    time, event, *_ = _data()
    sf = SurvfuncRight(time, event)  # statsmodels Kaplan-Meier with Greenwood SE
    c = kaplan_meier(time, event)
    assert np.array_equal(c.times, sf.surv_times)
    assert np.allclose(c.surv, sf.surv_prob, atol=1e-12)
    ok = np.isfinite(sf.surv_prob_se)
    assert np.allclose(c.var[ok], sf.surv_prob_se[ok] ** 2, atol=1e-12)
    w = np.random.default_rng(0).uniform(0.5, 2, time.size)
    wsf = SurvfuncRight(time, event, freq_weights=w)  # weighted point estimate (Cole & Hernan)
    assert np.allclose(kaplan_meier(time, event, w).surv, wsf.surv_prob, atol=1e-12)


def test_restricted_mean_against_double_integral():
    time, event, *_ = _data(n=120, seed=4)
    c = kaplan_meier(time, event)
    H = 1.5
    mu, var = restricted_mean(c, H)
    m = 6000
    u = (np.arange(m) + 0.5) * H / m  # midpoint rule
    s, _ = c.at(u)
    assert mu == pytest.approx(np.sum(s) * H / m, abs=2 * H / m)
    k = np.searchsorted(c.times, u, side="right") - 1
    g = np.where(k >= 0, np.cumsum(c.greenwood_terms)[np.maximum(k, 0)], 0.0)
    cov = np.outer(s, s) * g[np.minimum.outer(np.arange(m), np.arange(m))]
    assert var == pytest.approx(cov.sum() * (H / m) ** 2, rel=2e-3)


def test_combined_curve_one_stratum_is_km_with_loglog_limits():
    time, event, t, X, codes = _data()
    grid = np.linspace(0.1, 2.0, 12)
    cc = combine_curves(time, event, t, np.zeros(time.size, np.int64), np.array([1.0]), grid)
    for g, name in ((1, "exposed"), (0, "reference")):
        sf = SurvfuncRight(time[t == g], event[t == g])
        k = np.searchsorted(sf.surv_times, grid, side="right") - 1
        s = sf.surv_prob[k]
        sigma = sf.surv_prob_se[k] / s  # K&M 2003 eq. 4.3.2
        theta = np.exp(1.959963984540054 * sigma / np.log(s))
        assert np.allclose(cc.surv[name], s, atol=1e-12)
        assert np.allclose(cc.ci_low[name], s ** (1 / theta), atol=1e-10)
        assert np.allclose(cc.ci_high[name], s ** theta, atol=1e-10)
        assert np.array_equal(cc.at_risk[name], [(time[t == g] >= x).sum() for x in grid])


def test_horizon_rule_and_refusal():
    t = np.array([1] * 20 + [0] * 30, np.int8)
    codes = np.zeros(50, np.int64)
    time = np.concatenate([np.arange(1, 21), np.arange(1, 31)]).astype(float)
    h = choose_horizon(time, t, codes)
    assert h.value == 11.0 and h.min_at_risk == 10  # exposed: 10 units have time >= 11
    assert choose_horizon(time, t, codes, horizon=20).chosen_by == "user"
    with pytest.raises(InputError, match="beyond the follow-up of the exposed group"):
        choose_horizon(time, t, codes, horizon=20.5)
    small = choose_horizon(time[15:], t[15:], codes[15:])  # exposed group of 5 units
    assert small.value == 16.0 and "fewer than 10" in small.reason


def test_censoring_difference_warns():
    t = np.array([1] * 50 + [0] * 50, np.int8)
    time = np.full(100, 5.0)
    event = np.ones(100)
    event[:20] = 0
    time[:20] = 1.0  # 40 % of the exposed censored early, none of the reference
    with pytest.warns(DataWarning, match="censoring before the horizon differs"):
        out = censoring_difference(time, event, t, np.zeros(100, np.int64), np.array([1.0]), 4.0)
    assert out["difference"] == pytest.approx(0.4)


def test_cox_prediction_against_phreg_baseline():
    time, event, t, X, codes = _data(seed=6)
    fit = PHReg(time, X, status=event, ties="breslow").fit()
    times, cumhaz, _ = fit.baseline_cumulative_hazard[0]  # statsmodels' Breslow baseline
    H = 1.2
    lam = _through(times, cumhaz, H)
    expected = np.mean(np.exp(-lam * np.exp(X @ fit.params)))
    assert _survival_cox(time, event, X, X, H)[0] == pytest.approx(expected, abs=1e-8)
    ours = breslow_cumulative_hazard(time, event, np.exp(X @ fit.params), np.zeros(time.size),
                                     at=np.full(time.size, H))
    assert ours[0] == pytest.approx(lam, rel=1e-8)


def test_risk_difference_km_only_and_bootstrap_se():
    time, event, t, X, codes = _data(n=300, seed=8)
    weights = np.array([0.5, 0.5])
    rd = adjusted_risk_difference(time, event, t, np.zeros((time.size, 0)), codes, weights,
                                  1.0, estimand="ate", bootstrap=400, seed=3)
    risks, var = np.zeros((2, 2)), 0.0
    for s in range(2):
        for j, g in enumerate((1, 0)):
            rows = (codes == s) & (t == g)
            sf = SurvfuncRight(time[rows], event[rows])
            k = np.searchsorted(sf.surv_times, 1.0, side="right") - 1
            risks[s, j] = 1 - sf.surv_prob[k]
            var += weights[s] ** 2 * sf.surv_prob_se[k] ** 2
    assert rd.estimate == pytest.approx(weights @ (risks[:, 0] - risks[:, 1]), abs=1e-12)
    assert all(p["model_exposed"] == "kaplan-meier" for p in rd.per_stratum)
    # bootstrap SE vs Greenwood SE: relative MC error of an SD from B = 400 is ~ 1/sqrt(2B)
    assert rd.se == pytest.approx(math.sqrt(var), rel=4 / math.sqrt(800) + 0.05)
    again = adjusted_risk_difference(time, event, t, np.zeros((time.size, 0)), codes, weights,
                                     1.0, estimand="ate", bootstrap=400, seed=3)
    assert np.array_equal(rd.bootstrap_draws, again.bootstrap_draws)  # seeded
    assert rd.risk_ratio["estimate"] == pytest.approx(rd.risk_exposed / rd.risk_reference)
    assert rd.risk_ratio["ci_low"] < rd.risk_ratio["estimate"] < rd.risk_ratio["ci_high"]


def test_risk_difference_uses_cox_where_events_allow():
    time, event, t, X, codes = _data(n=800, seed=9)
    w = np.array([0.5, 0.5])
    rd = adjusted_risk_difference(time, event, t, X, codes, w, 1.0, estimand="att",
                                  bootstrap=0)
    models = {p["model_exposed"] for p in rd.per_stratum} | {p["model_reference"]
                                                            for p in rd.per_stratum}
    assert "cox" in models
    s = 1
    rows = (codes == s) & (t == 0)
    target = X[(codes == s) & (t == 1)]
    if rd.per_stratum[s]["model_reference"] == "cox":
        fit = PHReg(time[rows], X[rows], status=event[rows], ties="breslow").fit()
        times, cumhaz, _ = fit.baseline_cumulative_hazard[0]
        lam = _through(times, cumhaz, 1.0)
        expected = 1 - np.mean(np.exp(-lam * np.exp(target @ fit.params)))
        assert rd.per_stratum[s]["risk_reference"] == pytest.approx(expected, abs=1e-8)


def test_rmst_difference_one_stratum():
    time, event, t, X, codes = _data(seed=10)
    one = np.zeros(time.size, np.int64)
    r = rmst_difference(time, event, t, one, np.array([1.0]), 1.5)
    m1, v1 = restricted_mean(kaplan_meier(time[t == 1], event[t == 1]), 1.5)
    m0, v0 = restricted_mean(kaplan_meier(time[t == 0], event[t == 0]), 1.5)
    assert r.estimate == pytest.approx(m1 - m0, abs=1e-12)
    assert r.se == pytest.approx(math.sqrt(v1 + v0), abs=1e-12)


def test_hazard_ratio_solves_breslow_score_and_is_robust():
    time, event, t, X, codes = _data(n=600, seed=11)
    hr = hazard_ratio(time, event, t, X, codes)
    fit = PHReg(time, np.column_stack([t, X]), status=event, strata=codes,
                ties="breslow").fit()
    beta = fit.params
    risk = np.exp(np.column_stack([t, X]) @ beta)
    m = event - risk * breslow_cumulative_hazard(time, event, risk, codes)
    assert abs(np.sum(t * m)) < 1e-6  # our Breslow score for exposure vanishes at the estimate
    assert hr.estimate == pytest.approx(math.exp(beta[0]), rel=1e-10)
    assert hr.se_log != pytest.approx(fit.bse[0], rel=1e-6)  # the sandwich, not model-based
    assert hr.se_log == pytest.approx(fit.bse[0], rel=0.2)  # correct model: close to it
    assert 1.2 < hr.estimate < 1.9  # true HR exp(0.4) = 1.49
    none = hazard_ratio(time, np.where(t == 1, 0.0, event), t, X, codes)
    assert none.estimate is None and "no events in the exposed group" in none.reason
    rows = stratum_hazard_ratios(time, event, t, codes)
    assert len(rows) == 2 and all(r["estimate"] > 0 for r in rows)


def test_crude_against_survfuncright():
    time, event, t, *_ = _data(seed=12)
    c = crude_risk_difference(time, event, t, 1.0)
    parts = []
    for g in (1, 0):
        sf = SurvfuncRight(time[t == g], event[t == g])
        k = np.searchsorted(sf.surv_times, 1.0, side="right") - 1
        parts.append((1 - sf.surv_prob[k], sf.surv_prob_se[k]))
    assert c["estimate"] == pytest.approx(parts[0][0] - parts[1][0], abs=1e-12)
    assert c["se"] == pytest.approx(math.hypot(parts[0][1], parts[1][1]), abs=1e-12)


def test_combined_curve_two_strata_weighted_greenwood():
    time, event, t, X, codes = _data(seed=13)
    w = np.array([0.3, 0.7])
    grid = np.array([0.5, 1.0, 1.5])
    cc = combine_curves(time, event, t, codes, w, grid)
    s, v = np.zeros(3), np.zeros(3)
    for k in (0, 1):
        rows = (codes == k) & (t == 0)
        sf = SurvfuncRight(time[rows], event[rows])  # statsmodels KM and Greenwood SE
        idx = np.searchsorted(sf.surv_times, grid, side="right") - 1
        s += w[k] * sf.surv_prob[idx]
        v += w[k] ** 2 * sf.surv_prob_se[idx] ** 2
    z = stats.norm.isf(0.025)
    se = np.sqrt(v) / np.abs(s * np.log(s))  # delta method on log(-log S)
    assert np.allclose(cc.surv["reference"], s, atol=1e-12)
    assert np.allclose(cc.ci_low["reference"], s ** np.exp(z * se), atol=1e-10)


def test_events_per_column_rule_is_pinned():
    # Peduzzi et al. 1995 (about ten events per covariate): 2 columns need 20 events per group
    from stratagap.estimation.survival.risk_difference import EVENTS_PER_COLUMN
    assert EVENTS_PER_COLUMN == 10
    rng = np.random.default_rng(21)
    n = 120
    X = rng.normal(size=(n, 2))
    t = np.repeat([1, 0], n // 2).astype(np.int8)
    time = rng.exponential(1.0, n) + 0.01
    # exposed 19 < 20: the stratum's model with an exposure term (49 >= 30 events); with 10
    # reference events the stratum has 29 < 30: Kaplan-Meier
    for events, ref, model in ((20, 30, "cox"), (19, 30, "cox with exposure term (stratum)"),
                               (19, 10, "kaplan-meier")):
        event = np.zeros(n)
        event[:events] = 1  # exposed group: `events` events
        event[n // 2:n // 2 + ref] = 1
        rd = adjusted_risk_difference(time, event, t, X, np.zeros(n, np.int64),
                                      np.array([1.0]), 0.8, estimand="ate", bootstrap=0)
        assert rd.per_stratum[0]["model_exposed"] == model


def test_stratum_model_with_exposure_term_against_phreg():
    rng = np.random.default_rng(22)
    n = 120
    X = rng.normal(size=(n, 2))
    t = np.repeat([1, 0], n // 2).astype(np.int8)
    time = rng.exponential(1.0, n) + 0.01
    event = np.zeros(n)
    event[:19] = 1
    event[n // 2:n // 2 + 30] = 1
    rd = adjusted_risk_difference(time, event, t, X, np.zeros(n, np.int64), np.array([1.0]),
                                  0.8, estimand="ate", bootstrap=0)
    Z = np.column_stack([t, X])
    fit = PHReg(time, Z, status=event, ties="breslow").fit()  # statsmodels, Breslow baseline
    times, cumhaz, _ = fit.baseline_cumulative_hazard[0]
    lam = _through(times, cumhaz, 0.8)
    expected = 1 - np.mean(np.exp(-lam * np.exp(np.column_stack([np.ones(n), X]) @ fit.params)))
    assert rd.per_stratum[0]["risk_exposed"] == pytest.approx(expected, abs=1e-8)


def test_model_over_all_strata_where_a_stratum_lacks_the_events():
    """Stratum 0 is too small for its own models; the Cox model over both strata (a baseline
    per stratum, exposure and covariate effects shared) predicts its risks, checked against
    statsmodels ``PHReg(..., strata=)`` and its own per-stratum Breslow baselines."""
    rng = np.random.default_rng(23)
    n0, n1 = 40, 200  # stratum sizes
    codes = np.repeat([0, 1], [n0, n1])
    X = rng.normal(size=(n0 + n1, 2))
    t = (rng.random(n0 + n1) < 0.5).astype(np.int8)
    time = rng.exponential(1 / np.exp(0.5 * X[:, 0] + 0.3 * t)) + 0.01
    event = (rng.random(n0 + n1) < 0.7).astype(float)
    rd = adjusted_risk_difference(time, event, t, X, codes, np.array([0.3, 0.7]), 0.8,
                                  estimand="ate", bootstrap=0)
    small = rd.per_stratum[0]
    assert small["model_exposed"] == small["model_reference"] == \
        "cox with exposure term (all strata)"
    assert rd.per_stratum[1]["model_exposed"] == "cox"
    Z = np.column_stack([t, X])
    fit = PHReg(time, Z, status=event, strata=codes, ties="breslow").fit()
    times, cumhaz, _ = fit.baseline_cumulative_hazard[0]  # stratum 0's Breslow baseline
    lam = _through(times, cumhaz, 0.8)
    for g, key in ((1, "risk_exposed"), (0, "risk_reference")):
        aim = np.column_stack([np.full(n0, g), X[:n0]])
        expected = 1 - np.mean(np.exp(-lam * np.exp(aim @ fit.params)))
        assert small[key] == pytest.approx(expected, abs=1e-8)


def test_hazard_ratio_sandwich_matches_statsmodels_and_survives_early_censoring():
    """The robust SE equals statsmodels PHReg's own (``fit(groups=arange)``) where that one is
    defined, and stays finite when a unit is censored before its stratum's first event (where
    statsmodels 0.15 returns NaN for every SE)."""
    time, event, t, X, codes = _data(n=500, seed=21)
    design = np.column_stack([t, X])
    reference = PHReg(time, design, status=event, strata=codes, ties="breslow").fit(
        groups=np.arange(t.size))
    assert np.isfinite(reference.bse[0])
    hr = hazard_ratio(time, event, t, X, codes)
    assert hr.se_log == pytest.approx(reference.bse[0], rel=1e-10)
    first_event = time[(codes == 0) & (event == 1)].min()
    early = time.copy()
    unit = np.flatnonzero((codes == 0) & (event == 0))[0]
    early[unit] = first_event / 2  # censored before stratum 0's first event
    broken = PHReg(early, design, status=event, strata=codes, ties="breslow").fit(
        groups=np.arange(t.size))
    assert not np.isfinite(broken.bse[0])  # the reason for our own sandwich
    kept = hazard_ratio(early, event, t, X, codes)
    assert kept.estimate is not None and math.isfinite(kept.se_log)
    # dropping the unit that enters no risk set changes neither the fit nor the sandwich
    keep = np.arange(t.size) != unit
    dropped = hazard_ratio(early[keep], event[keep], t[keep], X[keep], codes[keep])
    assert kept.se_log == pytest.approx(dropped.se_log, rel=1e-8)
    assert kept.estimate == pytest.approx(dropped.estimate, rel=1e-10)


def test_cox_newton_equals_phreg_with_ties_strata_and_separation():
    """The headline's Cox fit against statsmodels ``PHReg(ties="breslow", strata=)``."""
    from stratagap.estimation.survival._cox_fit import cox_newton
    rng = np.random.default_rng(24)
    n = 300
    Z = np.column_stack([rng.normal(size=n), rng.integers(0, 2, n), rng.normal(size=n)])
    codes = rng.integers(0, 4, n)
    time = np.round(rng.exponential(1 / np.exp(Z @ [0.6, -0.4, 0.2])), 1) + 0.1  # many ties
    event = (rng.random(n) < 0.6).astype(float)
    for strata in (None, codes):
        ref = PHReg(time, Z, status=event, strata=strata, ties="breslow").fit().params
        assert np.allclose(cox_newton(time, event, Z, strata=strata), ref, atol=1e-8)
        # from the other side of the maximum (the bootstrap starts at the full-sample fit)
        assert np.allclose(cox_newton(time, event, Z, strata=strata, start=ref + 0.5), ref,
                           atol=1e-8)
    # large designs go to PHReg itself (memory n p rather than n p^2): the same answer
    from stratagap.estimation.survival import _cox_fit
    limit = _cox_fit.VECTORISED_LIMIT
    try:
        _cox_fit.VECTORISED_LIMIT = 10
        assert np.allclose(cox_newton(time, event, Z, strata=codes), ref, atol=1e-8)
    finally:
        _cox_fit.VECTORISED_LIMIT = limit
    # a covariate that separates the events from the rest: no finite maximum
    sep = np.column_stack([Z[:, 0], event])
    assert cox_newton(time, event, sep) is None
    # collinear columns: not identified
    assert cox_newton(time, event, np.column_stack([Z[:, 0], 2 * Z[:, 0]])) is None
