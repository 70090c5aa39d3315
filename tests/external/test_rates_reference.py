"""The Mantel-Haenszel rate ratio against a published worked example and independent routes.

* Published example: coronary deaths among British male doctors by smoking and age group
  (Doll & Hill's cohort, as worked in Rothman & Greenland, Modern Epidemiology, 2nd ed. 1998,
  ch. 15). The counts, the person-years and the book's Mantel-Haenszel rate ratio of about
  1.42 are from memory; the book's interval limits are not recalled reliably, so the variance
  is checked by the routes below instead.
* Greenland & Robins (1985, Biometrics 41:55-68) give
  ``Var(ln RR_MH) = sum_s (a_s + b_s) PT1_s PT0_s / PT_s^2 / (R S)``,
  ``R = sum_s a_s PT0_s / PT_s``, ``S = sum_s b_s PT1_s / PT_s`` (formula from memory). Checked
  here by: the point estimate summed by hand from the table; the one-stratum conditional
  Poisson (binomial) likelihood's observed information, by a numerical second derivative;
  statsmodels' Poisson GLM with stratum effects, which gives exactly the same estimate and
  variance when the exposed share of person-time is the same in every stratum (then the
  Mantel-Haenszel estimator is the conditional maximum likelihood one); and the sampling
  variance of ln RR_MH in a Monte Carlo study on the book's strata.
"""

import math

import numpy as np
import pytest
import statsmodels.api as sm  # a hard dependency: a missing reference must fail, not skip

from stratagap.estimation.rates import RateTable, mantel_haenszel_rates, mh_rate_parts

# Rothman & Greenland 1998, ch. 15 (from memory): age groups 35-44, 45-54, 55-64, 65-74, 75-84
SMOKER_DEATHS = [32, 104, 206, 186, 102]
SMOKER_YEARS = [52407, 43248, 28612, 12663, 5317]
NONSMOKER_DEATHS = [2, 12, 28, 28, 31]
NONSMOKER_YEARS = [18790, 10673, 5710, 2585, 1462]
BOOK_MH_RATE_RATIO = 1.42  # "about 1.42", two decimals (from memory)


def _table(a, pt1, b, pt0):
    return RateTable(*(np.asarray(v, dtype=float) for v in (a, pt1, b, pt0)))


def _doctors():
    return _table(SMOKER_DEATHS, SMOKER_YEARS, NONSMOKER_DEATHS, NONSMOKER_YEARS)


def test_british_doctors_mh_rate_ratio_matches_the_book():
    mh = mantel_haenszel_rates(_doctors(), alpha=0.05)["rate_ratio"]
    # the memory supports two decimals: agree to half a unit in the second
    assert abs(mh.estimate - BOOK_MH_RATE_RATIO) <= 0.005, mh.estimate
    # and the crude ratio is far from it (the age confounding the example is about)
    crude = (sum(SMOKER_DEATHS) / sum(SMOKER_YEARS)) / (sum(NONSMOKER_DEATHS) / sum(NONSMOKER_YEARS))
    assert crude > 1.6


def test_british_doctors_point_estimate_and_variance_summed_by_hand():
    # the same sums written out stratum by stratum with plain Python floats
    R = S = num = 0.0
    for a, p1, b, p0 in zip(SMOKER_DEATHS, SMOKER_YEARS, NONSMOKER_DEATHS, NONSMOKER_YEARS):
        total = p1 + p0
        R += a * p0 / total
        S += b * p1 / total
        num += (a + b) * p1 * p0 / total ** 2
    parts = mh_rate_parts(_doctors())
    assert math.exp(parts["log_rr"]) == pytest.approx(R / S, rel=1e-12)
    assert parts["var_log_rr"] == pytest.approx(num / (R * S), rel=1e-12)
    mh = mantel_haenszel_rates(_doctors(), alpha=0.10)["rate_ratio"]
    z = 1.6448536269514722  # normal 0.95 quantile
    se = math.sqrt(num / (R * S))
    assert (mh.ci_low, mh.ci_high) == pytest.approx(
        (R / S * math.exp(-z * se), R / S * math.exp(z * se)), rel=1e-12)


def test_one_stratum_variance_is_the_conditional_poisson_information():
    # Given a + b = n events in one stratum, a ~ Binomial(n, p), p = theta PT1 / (theta PT1 +
    # PT0): the conditional likelihood of theta. Its maximum is the crude ratio and the inverse
    # observed information of ln theta there is the Greenland-Robins variance; the second
    # derivative is taken numerically (central differences, step 1e-4: error ~1e-8 relative).
    a, p1, b, p0 = SMOKER_DEATHS[2], SMOKER_YEARS[2], NONSMOKER_DEATHS[2], NONSMOKER_YEARS[2]

    def loglik(log_theta):
        p = math.exp(log_theta) * p1 / (math.exp(log_theta) * p1 + p0)
        return a * math.log(p) + b * math.log(1 - p)

    parts = mh_rate_parts(_table([a], [p1], [b], [p0]))
    x, h = parts["log_rr"], 1e-4
    slope = (loglik(x + h) - loglik(x - h)) / (2 * h)
    info = -(loglik(x + h) - 2 * loglik(x) + loglik(x - h)) / h ** 2
    assert abs(slope) < 1e-6  # the MH estimate is the conditional MLE with one stratum
    assert parts["var_log_rr"] == pytest.approx(1 / info, rel=1e-6)


def test_proportional_person_time_matches_statsmodels_poisson_with_stratum_effects():
    # With PT1_s = c PT0_s in every stratum the conditional likelihood's score is
    # sum_s a_s - n_s p with one p for all strata, so the MLE is the Mantel-Haenszel ratio and
    # its inverse information is the Greenland-Robins variance; for the Poisson model the
    # unconditional fit with stratum effects gives the same coefficient and variance.
    pt0 = np.asarray(NONSMOKER_YEARS, dtype=float)
    pt1 = 2.5 * pt0
    a = np.asarray(SMOKER_DEATHS, dtype=float)
    b = np.asarray(NONSMOKER_DEATHS, dtype=float)
    parts = mh_rate_parts(_table(a, pt1, b, pt0))
    S = a.size
    y = np.concatenate([a, b])
    exposure = np.repeat([1.0, 0.0], S)
    strata = np.tile(np.eye(S), (2, 1))
    design = np.column_stack([exposure, strata])
    fit = sm.GLM(y, design, family=sm.families.Poisson(),
                 offset=np.log(np.concatenate([pt1, pt0]))).fit(tol=1e-12)
    assert fit.params[0] == pytest.approx(parts["log_rr"], rel=1e-8)
    assert fit.bse[0] ** 2 == pytest.approx(parts["var_log_rr"], rel=1e-8)


def test_variance_matches_the_sampling_variance_on_the_book_strata():
    # Poisson counts drawn on the book's person-years with a common rate ratio (the book's
    # fitted one) and each age group's reference rate estimated under it. The empirical
    # variance of ln RR_MH over m = 20,000 draws has a Monte Carlo SE of
    # sqrt((m4 - s^4 (m - 3)/(m - 1)) / m) (the sample variance's SE, from the draws' own
    # fourth moment), about 0.7 % of it; the mean of the formula's values must lie within 4 such
    # SEs. The formula is consistent, not unbiased: its small-sample bias here (the smallest
    # expected count is about 7) is well inside that band.
    table = _doctors()
    parts = mh_rate_parts(table)
    theta = math.exp(parts["log_rr"])
    lam0 = (table.a + table.b) / (theta * table.pt1 + table.pt0)
    rng = np.random.default_rng(20261203)
    m = 20000
    a = rng.poisson(theta * lam0 * table.pt1, size=(m, lam0.size)).astype(float)
    b = rng.poisson(lam0 * table.pt0, size=(m, lam0.size)).astype(float)
    logs, variances = np.empty(m), np.empty(m)
    for i in range(m):
        draw = mh_rate_parts(RateTable(a[i], table.pt1, b[i], table.pt0))
        logs[i], variances[i] = draw["log_rr"], draw["var_log_rr"]
    assert np.isfinite(logs).all()
    centred = logs - logs.mean()
    s2 = centred @ centred / (m - 1)
    m4 = np.mean(centred ** 4)
    mc_se = math.sqrt((m4 - s2 ** 2 * (m - 3) / (m - 1)) / m)
    assert abs(variances.mean() - s2) < 4 * mc_se, (variances.mean(), s2, mc_se)
