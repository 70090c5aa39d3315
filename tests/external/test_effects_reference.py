"""Effect estimators against reference libraries and a published worked example.

* Per-stratum Lin regressions and their HC2 errors vs statsmodels
  ``OLS(...).fit(cov_type="HC2")`` (MacKinnon & White 1985).
* Mantel-Haenszel odds ratio, its Robins-Breslow-Greenland SE and CI, and the MH risk ratio
  vs statsmodels ``StratifiedTable``.
* The UGDP tolbutamide trial by age (Rothman & Greenland, Modern Epidemiology, 2nd ed. 1998,
  ch. 15; counts and results from memory): MH risk ratio 1.33, MH risk difference 0.035,
  crude risk ratio 1.44.
"""

import math

import numpy as np
import pytest

import statsmodels.api as sm  # a hard dependency: a missing reference must fail, not skip
from statsmodels.stats.contingency_tables import StratifiedTable

from stratagap.estimation import effects
from stratagap.errors import ModelWarning


def _data(n=1500, seed=3, binary=False):
    rng = np.random.default_rng(seed)
    x = np.column_stack([rng.normal(size=n), rng.integers(0, 2, n), rng.gamma(2.0, size=n)])
    score = 1 / (1 + np.exp(-(0.7 * x[:, 0] - 0.5 * x[:, 1] + 0.2 * x[:, 2] - 0.4)))
    t = (rng.random(n) < score).astype(np.int8)
    # heteroskedastic, heterogeneous: HC2 differs from the classical covariance here
    y = x[:, 0] + x[:, 2] + t * (0.5 + x[:, 1]) + rng.normal(size=n) * (0.5 + x[:, 2])
    if binary:
        y = (y > 1.2).astype(float)
    labels = np.searchsorted(np.quantile(score, [0.2, 0.4, 0.6, 0.8]), score).astype(np.int64)
    return y, t, x, labels


@pytest.mark.parametrize("estimand", ["ate", "att"])
@pytest.mark.parametrize("binary", [False, True])
def test_per_stratum_hc2_matches_statsmodels(estimand, binary):
    y, t, x, labels = _data(binary=binary)
    res = effects.stratified_regression(y, t, x, labels, estimand=estimand)
    for row in res.per_stratum:
        m = labels == row["stratum"]
        xs = x[m]
        centre = xs.mean(axis=0) if estimand == "ate" else xs[t[m] == 1].mean(axis=0)
        xc = xs - centre
        D = np.column_stack([np.ones(m.sum()), t[m], xc, t[m][:, None] * xc])
        fit = sm.OLS(y[m], D).fit(cov_type="HC2")
        assert row["model"] == "interactions"
        assert row["estimate"] == pytest.approx(fit.params[1], abs=1e-10)
        assert row["se"] == pytest.approx(fit.bse[1], rel=1e-10)
        assert row["reference_mean"] == pytest.approx(fit.params[0], abs=1e-10)


def test_main_effects_hc2_matches_statsmodels():
    y, t, x, labels = _data(n=400, seed=5)
    with pytest.warns(ModelWarning, match="simplified"):
        res = effects.stratified_regression(y, t, x, labels, estimand="ate",
                                            interaction_min_extra=200)  # forces main effects
    for row in res.per_stratum:
        m = labels == row["stratum"]
        D = np.column_stack([np.ones(m.sum()), t[m], x[m]])
        fit = sm.OLS(y[m], D).fit(cov_type="HC2")
        assert row["model"] == "main effects"
        assert row["estimate"] == pytest.approx(fit.params[1], abs=1e-10)
        assert row["se"] == pytest.approx(fit.bse[1], rel=1e-10)


def _tables(y, t, labels):
    return np.array([[[np.sum((labels == s) & (t == i) & (y == j)) for j in (1, 0)]
                      for i in (1, 0)] for s in np.unique(labels)], dtype=float)


@pytest.mark.parametrize("alpha", [0.05, 0.1])
def test_mantel_haenszel_ratios_match_statsmodels(alpha):
    y, t, _, labels = _data(binary=True, seed=9)
    mh = effects.mantel_haenszel(y, t, labels, alpha=alpha)
    st = StratifiedTable(np.transpose(_tables(y, t, labels), (1, 2, 0)))
    assert mh["odds_ratio"].estimate == pytest.approx(st.oddsratio_pooled, rel=1e-10)
    assert mh["odds_ratio"].se == pytest.approx(st.logodds_pooled_se, rel=1e-10)
    lo, hi = st.oddsratio_pooled_confint(alpha=alpha)
    assert (mh["odds_ratio"].ci_low, mh["odds_ratio"].ci_high) == pytest.approx((lo, hi),
                                                                               rel=1e-10)
    assert mh["risk_ratio"].estimate == pytest.approx(st.riskratio_pooled, rel=1e-10)
    assert mh["odds_ratio"].scale == "log" and mh["risk_difference"].scale == "identity"


def _ugdp():
    """UGDP tolbutamide vs placebo, deaths by age group (Modern Epidemiology 2nd ed., from
    memory): age < 55: 8/106 vs 5/120; age >= 55: 22/98 vs 16/85."""
    rows = []
    for stratum, (a, n1, c, n0) in enumerate([(8, 106, 5, 120), (22, 98, 16, 85)]):
        rows += [(stratum, 1, 1)] * a + [(stratum, 1, 0)] * (n1 - a)
        rows += [(stratum, 0, 1)] * c + [(stratum, 0, 0)] * (n0 - c)
    arr = np.array(rows)
    return arr[:, 2].astype(float), arr[:, 1].astype(np.int8), arr[:, 0].astype(np.int64)


def test_ugdp_published_example():
    y, t, labels = _ugdp()
    mh = effects.mantel_haenszel(y, t, labels)
    # Modern Epidemiology (2nd ed., ch. 15), from memory: RR_MH 1.33, RD_MH 0.035
    assert mh["risk_ratio"].estimate == pytest.approx(1.33, abs=0.005)
    assert mh["risk_difference"].estimate == pytest.approx(0.035, abs=0.0005)
    crude_rr = y[t == 1].mean() / y[t == 0].mean()
    assert crude_rr == pytest.approx(1.44, abs=0.005)  # crude RR 1.44 (same source)
    # Sato's and Greenland-Robins' RD variances agree closely in these large strata
    n1 = np.array([106, 98.0])
    n0 = np.array([120, 85.0])
    p1 = np.array([8 / 106, 22 / 98])
    p0 = np.array([5 / 120, 16 / 85])
    W = n1 * n0 / (n1 + n0)
    v_large = np.sum(W ** 2 * (p1 * (1 - p1) / (n1 - 1) + p0 * (1 - p0) / (n0 - 1))) / W.sum() ** 2
    assert mh["risk_difference"].se == pytest.approx(math.sqrt(v_large), rel=0.03)
