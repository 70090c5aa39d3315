"""Tests of stratagap.estimation.heterogeneity: Cochran's Q and Breslow-Day (Tarone).

Independent values: Q and I^2 from statsmodels' meta-analysis (combine_effects) and a hand
formula; Breslow-Day with Tarone's correction written out here from Breslow & Day (1980,
sec. 4.4) and Tarone (1985); null calibration by simulation.
"""

import json
import math

import numpy as np
import pytest
from scipy import optimize, stats

from stratagap.estimation import effects, heterogeneity
from stratagap.errors import InputError, ModelWarning


def test_cochran_q_hand_formula_and_statsmodels():
    from statsmodels.stats.meta_analysis import combine_effects

    est = np.array([1.2, 0.4, 0.9, 1.7, 1.1])
    se = np.array([0.3, 0.25, 0.4, 0.5, 0.2])
    res = heterogeneity.cochran_q(est, se)
    w = 1 / se ** 2
    mean = np.sum(w * est) / w.sum()
    q = np.sum(w * (est - mean) ** 2)  # Cochran 1954
    assert res.statistic == pytest.approx(q, rel=1e-12)
    assert res.df == 4 and res.p_value == pytest.approx(stats.chi2.sf(q, 4), rel=1e-12)
    ref = combine_effects(est, se ** 2)  # statsmodels meta-analysis: Q and I^2
    assert res.statistic == pytest.approx(ref.q, rel=1e-12)
    assert res.i_squared == pytest.approx(ref.i2, rel=1e-12)
    assert res.pooled_estimate == pytest.approx(ref.mean_effect_fe, rel=1e-12)
    d = res.to_dict()
    assert json.loads(json.dumps(d, allow_nan=False)) == d


def test_cochran_q_skips_missing_and_warns():
    with pytest.warns(ModelWarning, match="left out"):
        res = heterogeneity.cochran_q([1.0, None, 2.0, 1.5], [0.2, 0.3, None, 0.25])
    assert res.strata_used == 2 and [e["stratum"] for e in res.strata_excluded] == [1, 2]
    with pytest.raises(InputError, match="at least 2 strata"):
        heterogeneity.cochran_q([1.0], [0.1])
    with pytest.raises(InputError, match="same length"):
        heterogeneity.cochran_q([1.0, 2.0], [0.1])


def test_cochran_q_calibrated_under_equal_effects():
    # Equal stratum effects, normal estimates with known SEs: P(p < 0.05) = 0.05.
    # 2000 replicates: MC SE = sqrt(.05 .95 / 2000) = 0.0049; accept +-3 SE.
    rng = np.random.default_rng(3)
    se = np.array([0.1, 0.2, 0.15, 0.3, 0.25])
    rej = 0
    for _ in range(2000):
        rej += heterogeneity.cochran_q(rng.normal(0.5, se), se).p_value < 0.05
    assert abs(rej / 2000 - 0.05) <= 3 * math.sqrt(0.05 * 0.95 / 2000)


def test_cochran_q_on_stratified_regression_detects_heterogeneity():
    rng = np.random.default_rng(4)
    n = 3000
    x = rng.normal(size=(n, 1))
    t = (rng.random(n) < 1 / (1 + np.exp(-x[:, 0]))).astype(np.int8)
    y = x[:, 0] + t * (1 + 1.5 * x[:, 0]) + rng.normal(size=n)  # effect grows with the score
    ps = 1 / (1 + np.exp(-x[:, 0]))
    labels = np.searchsorted(np.quantile(ps, [0.2, 0.4, 0.6, 0.8]), ps).astype(np.int64)
    per = effects.stratified_regression(y, t, x, labels, estimand="ate").per_stratum
    res = heterogeneity.cochran_q([p["estimate"] for p in per], [p["se"] for p in per])
    assert res.p_value < 1e-6


def _breslow_day_tarone(tables):
    """Breslow & Day (1980) statistic with Tarone's (1985) correction, written out by hand."""
    a = tables[:, 0, 0]
    b = tables[:, 0, 1]
    c = tables[:, 1, 0]
    d = tables[:, 1, 1]
    n = a + b + c + d
    psi = np.sum(a * d / n) / np.sum(b * c / n)  # Mantel-Haenszel odds ratio
    stat = corr_num = corr_den = 0.0
    for k in range(len(a)):
        m1, n1, t1 = a[k] + b[k], a[k] + c[k], n[k]  # row 1 total, column 1 total, N
        lo, hi = max(0.0, n1 + m1 - t1), min(m1, n1)

        def f(x):  # odds ratio of the fitted table minus psi
            return x * (t1 - m1 - n1 + x) - psi * (m1 - x) * (n1 - x)

        e = optimize.brentq(f, lo + 1e-12, hi - 1e-12) if hi > lo else lo
        v = 1 / (1 / e + 1 / (m1 - e) + 1 / (n1 - e) + 1 / (t1 - m1 - n1 + e))
        stat += (a[k] - e) ** 2 / v
        corr_num += a[k] - e
        corr_den += v
    return stat - corr_num ** 2 / corr_den  # Tarone 1985


def test_breslow_day_against_hand_formula_and_statsmodels():
    from statsmodels.stats.contingency_tables import StratifiedTable

    rng = np.random.default_rng(7)
    n = 2400
    labels = rng.integers(0, 4, n)
    t = rng.integers(0, 2, n).astype(np.int8)
    logit = -1 + 0.3 * labels + t * (0.2 + 0.4 * labels)  # odds ratio varies by stratum
    y = (rng.random(n) < 1 / (1 + np.exp(-logit))).astype(float)
    res = heterogeneity.breslow_day(y, t, labels)
    tabs = np.array([[[np.sum((labels == s) & (t == i) & (y == j)) for j in (1, 0)]
                      for i in (1, 0)] for s in range(4)], dtype=float)
    hand = _breslow_day_tarone(tabs)
    assert res.statistic == pytest.approx(hand, rel=1e-8)
    ref = StratifiedTable(np.transpose(tabs, (1, 2, 0))).test_equal_odds(adjust=True)
    assert res.statistic == pytest.approx(ref.statistic, rel=1e-12)
    assert res.p_value == pytest.approx(stats.chi2.sf(hand, 3), rel=1e-7)
    assert res.df == 3 and res.scale == "odds ratio"


def test_breslow_day_drops_uninformative_strata():
    rng = np.random.default_rng(8)
    n = 900
    labels = np.repeat([0, 1, 2], 300)
    t = rng.integers(0, 2, n).astype(np.int8)
    y = (rng.random(n) < 0.3).astype(float)
    y[labels == 2] = 0.0  # no events: no information on the odds ratio
    with pytest.warns(ModelWarning, match="left out"):
        res = heterogeneity.breslow_day(y, t, labels)
    assert res.strata_used == 2 and res.strata_excluded[0]["stratum"] == 2
    with pytest.raises(InputError, match="binary"):
        heterogeneity.breslow_day(y + 0.5, t, labels)
