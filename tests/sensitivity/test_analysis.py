"""Tests of stratagap.sensitivity.analysis (the sensitivity block) and of the E-value choice
(stratagap.sensitivity._evalue.headline_e_value, pooled_sd)."""

import json
from types import SimpleNamespace

import numpy as np
import pytest

from stratagap.errors import ModelWarning
from stratagap.sensitivity import (DEFAULT_GAMMAS, e_value, gamma_bounds, headline_e_value, pooled_sd,
                                   sensitivity_analysis, sensitivity_value)


def test_pooled_sd_is_the_anova_within_group_sd():
    rng = np.random.default_rng(4)
    y = rng.normal(size=57)
    t = (rng.random(57) < 0.4).astype(np.int8)
    # closed form: within-group sum of squares over n - 2 (one-way ANOVA error mean square)
    ss = sum(((y[t == g] - y[t == g].mean()) ** 2).sum() for g in (0, 1))
    assert abs(pooled_sd(y, t) - np.sqrt(ss / (len(y) - 2))) < 1e-12


def test_e_value_choice_follows_the_outcome_type():
    rng = np.random.default_rng(5)
    y = rng.normal(size=80)
    t = np.repeat([0, 1], 40).astype(np.int8)
    adjusted = SimpleNamespace(estimate=0.5, ci_low=0.1, ci_high=0.9, se=0.2)
    rr = SimpleNamespace(estimate=1.8, ci_low=1.2, ci_high=2.7)
    cont = headline_e_value(adjusted, None, y, t, binary=False, alpha=0.05)
    assert cont == e_value(0.5, 0.1, 0.9, measure="difference", outcome_sd=pooled_sd(y, t),
                           se=0.2, alpha=0.05)
    binary = headline_e_value(adjusted, rr, y, t, binary=True, alpha=0.05)
    assert binary == e_value(1.8, 1.2, 2.7, measure="rr", alpha=0.05)
    # VanderWeele & Ding 2017: E = RR + sqrt(RR (RR - 1))
    assert abs(binary.point - (1.8 + np.sqrt(1.8 * 0.8))) < 1e-12


def test_undefined_risk_ratio_gives_no_e_value_and_a_warning():
    rr = SimpleNamespace(estimate=1.8, ci_low=0.0, ci_high=np.inf)
    with pytest.warns(ModelWarning, match="E-value not computed"):
        assert headline_e_value(None, rr, None, None, binary=True, alpha=0.05) is None


def test_block_is_the_stage_functions_and_round_trips():
    rng = np.random.default_rng(6)
    n = 200
    labels = np.repeat(np.arange(4), n // 4).astype(np.int64)
    x = rng.normal(size=n)
    t = (rng.random(n) < 0.5).astype(np.int8)
    y = 0.4 * t + x + rng.normal(size=n)
    values = y - x
    adjusted = SimpleNamespace(estimate=0.4, ci_low=0.1, ci_high=0.7, se=0.15)
    # a test of another statistic: the bounds are the stage functions' own, not anchored
    test = SimpleNamespace(statistic=-0.3, normal_mean=0.0, statistic_name="studentized",
                           p_greater=0.9, p_less=0.1, engine="monte_carlo")
    out = sensitivity_analysis(values, t, labels, x[:, None], y, [], test=test,
                               statistic="mean_difference", estimand="ate",
                               alternative="two-sided", alpha=0.05, gammas=DEFAULT_GAMMAS,
                               adjusted=adjusted, risk_ratio=None, binary=False)
    # a negative observed statistic bounds the lower tail
    assert out.gamma_direction == "less"
    assert out.gamma_bounds == gamma_bounds(values, t, labels, estimand="ate",
                                            statistic="mean_difference", direction="less",
                                            gammas=DEFAULT_GAMMAS)
    threshold = sensitivity_value(values, t, labels, estimand="ate", direction="less",
                                  alpha=0.05, two_sided=True)
    assert out.gamma_threshold_detail == threshold and out.gamma_level == threshold.alpha == 0.025
    d = out.to_dict()
    assert json.loads(json.dumps(d, allow_nan=False)) == d
    assert list(d) == ["e_value", "gamma_threshold", "gamma_threshold_detail", "gamma_level",
                       "gamma_direction", "gamma_curve", "gamma_bounds", "tipping"]


def _block(values, t, labels, y, test):
    adjusted = SimpleNamespace(estimate=0.4, ci_low=0.1, ci_high=0.7, se=0.15)
    return sensitivity_analysis(values, t, labels, values[:, None] * 0, y, [], test=test,
                                statistic="mean_difference", estimand="ate",
                                alternative="greater", alpha=0.05, gammas=DEFAULT_GAMMAS,
                                adjusted=adjusted, risk_ratio=None, binary=False)


def test_gamma_one_is_the_tests_own_p_value_and_the_curve_never_falls_below_it():
    """At Gamma = 1 the sensitivity model is the randomization distribution (Rosenbaum 2002,
    ch. 4): the curve there is the test's one-sided p-value, whichever engine computed it,
    and the worst case cannot fall below it at a larger Gamma."""
    rng = np.random.default_rng(8)
    n = 120
    labels = np.repeat(np.arange(3), n // 3).astype(np.int64)
    t = (rng.random(n) < 0.5).astype(np.int8)
    y = 0.5 * t + rng.exponential(size=n)
    from stratagap.inference.permutation import stratified_test
    test = stratified_test(y, t, labels, statistic="mean_difference", alternative="greater",
                           estimand="ate",
                           engine="monte_carlo", resamples=999, seed=4)
    out = _block(y.astype(float), t, labels, y, test)
    curve = out.gamma_curve
    assert curve[0]["gamma"] == 1.0 and curve[0]["p_upper"] == test.p_greater
    assert curve[0]["p_upper"] != test.normal_p_greater  # the MC value, not the normal one
    assert all(c["p_upper"] >= test.p_greater and c["p_separable"] >= test.p_greater
               for c in curve)
    assert "own one-sided p-value" in out.gamma_bounds.at_one


@pytest.mark.parametrize("p_test, expected", [(0.2, "not significant at Gamma=1"),
                                              (0.01, "significant at Gamma=1 only")])
def test_significance_at_gamma_one_follows_the_test(p_test, expected):
    rng = np.random.default_rng(9)
    n = 60
    labels = np.repeat(np.arange(2), n // 2).astype(np.int64)
    t = (rng.random(n) < 0.5).astype(np.int8)
    y = rng.normal(size=n) + 0.35 * t  # a normal p near 0.05-0.2: on the other side of the test's
    values = y.astype(float)
    normal = sensitivity_value(values, t, labels, estimand="ate", direction="greater",
                               alpha=0.05)
    test = SimpleNamespace(statistic=1.0, normal_mean=0.0, statistic_name="mean_difference",
                           p_greater=p_test, p_less=1 - p_test, engine="monte_carlo")
    out = _block(values, t, labels, y, test)
    if expected == "significant at Gamma=1 only":
        assert normal.flag == "not significant at Gamma=1"  # the normal value alone says not
    assert out.gamma_threshold_detail.flag == expected
    assert out.gamma_threshold == 1.0


def test_an_extreme_headline_gets_no_e_value_and_a_warning_not_a_crash():
    """exp(0.91 d) overflows (or its inverse underflows to 0) beyond d of about 770 SDs."""
    from stratagap.sensitivity import headline_e_value

    rng = np.random.default_rng(2)
    y = rng.normal(size=100)
    t = (np.arange(100) % 2).astype(np.int8)
    extreme = SimpleNamespace(estimate=-2e4, ci_low=-3e4, ci_high=-1e4, se=5e3)
    with pytest.warns(ModelWarning, match="E-value not computed"):
        assert headline_e_value(extreme, None, y, t, binary=False, alpha=0.05) is None
    usual = SimpleNamespace(estimate=0.5, ci_low=0.2, ci_high=0.8, se=0.15)
    assert headline_e_value(usual, None, y, t, binary=False, alpha=0.05) is not None
