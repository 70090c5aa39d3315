"""The rate outcome's sensitivity block (VanderWeele & Ding 2017; Rosenbaum 2002, ch. 4)."""

import math

import numpy as np
import pytest
import statsmodels.api as sm

from stratagap.errors import ModelWarning
from stratagap.estimation import Estimate
from stratagap.estimation.rates import standardized_rate_difference
from stratagap.inference import stratified_test
from stratagap.inference.rate_scores import rate_scores
from stratagap.sensitivity import gamma_bounds
from stratagap.sensitivity.rates import rate_ratio_e_value, rate_sensitivity


def _rr(est, lo, hi):
    return Estimate(est, math.log(hi / lo) / 3.92, lo, hi, "rate ratio", "c", "p", "m",
                    0.05, "log")


def test_e_value_of_the_rate_ratio_is_the_closed_form():
    # VanderWeele & Ding 2017: E = RR + sqrt(RR (RR - 1)); limit from the lower CI limit
    ev = rate_ratio_e_value(_rr(1.8, 1.3, 2.5), 0.05)
    assert ev.point == pytest.approx(1.8 + math.sqrt(1.8 * 0.8), rel=1e-12)
    assert ev.ci_limit == pytest.approx(1.3 + math.sqrt(1.3 * 0.3), rel=1e-12)
    assert "Mantel-Haenszel rate ratio" in ev.computed_from


def test_no_e_value_when_the_ratio_is_not_estimable():
    nan = Estimate(math.nan, math.nan, math.nan, math.nan, "rate ratio", "c", "p", "m")
    with pytest.warns(ModelWarning, match="not estimable"):
        assert rate_ratio_e_value(nan, 0.05) is None


def _data(seed=2, n=600):
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(n, 2))
    t = rng.binomial(1, 1 / (1 + np.exp(-x[:, 0]))).astype(np.int8)
    labels = np.minimum(((x[:, 0] + 3) / 1.5).astype(np.int64).clip(0), 3)
    pt = rng.uniform(0.5, 3, n)
    y = rng.poisson(pt * 0.3 * np.exp(0.4 * x[:, 0] + 0.3 * x[:, 1] + 0.3 * t)).astype(float)
    return y, t, pt, x, labels


def test_bounds_are_those_of_the_poisson_residuals_and_start_at_the_test_p():
    # values recomputed with statsmodels' Poisson GLM (offset, stratum dummies, covariates)
    y, t, pt, x, labels = _data()
    values = rate_scores(y, pt, labels, x).values
    test = stratified_test(values, t, labels, estimand="ate", resamples=999, seed=1)
    adjusted = standardized_rate_difference(y, t, pt, x, labels, estimand="ate")
    sens = rate_sensitivity(values, t, labels, x, y, pt, [], test=test, estimand="ate",
                            alternative="two-sided", alpha=0.05, gammas=(1.0, 1.5, 2.0),
                            adjusted=adjusted, rate_ratio=_rr(1.3, 1.1, 1.6), seed=0)
    D = (labels[:, None] == np.unique(labels)[None, :]).astype(float)
    fit = sm.GLM(y, np.column_stack([D, x]), family=sm.families.Poisson(),
                 offset=np.log(pt)).fit(tol=1e-14)
    ref = gamma_bounds(y - fit.fittedvalues, t, labels, estimand="ate",
                       statistic="mean_difference", direction=sens.gamma_direction,
                       gammas=(1.5, 2.0), seed=0).to_dict()["curve"]
    curve = sens.gamma_bounds.to_dict()["curve"]
    assert curve[0]["p_upper"] == pytest.approx(test.p_greater if sens.gamma_direction ==
                                                "greater" else test.p_less)
    for mine, other in zip(curve[1:], ref):
        assert mine["p_upper"] == pytest.approx(other["p_upper"], rel=1e-6)
    assert sens.tipping.measure == "difference"
    assert sens.tipping.estimate == adjusted.estimate
