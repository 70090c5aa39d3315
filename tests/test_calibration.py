"""Statistical calibration of the default test and the headline CI (issue 5, item 6; issue 2).

Stage-level simulations (see ``tests/_simulate.py``): the same stage calls the pipeline makes,
normal engine, fixed seeds, one ``SeedSequence`` child per dataset so any dataset can be rerun.
The measured figures are written down in ``docs/validation.md``; ``python -m pytest
tests/test_calibration.py -q -s`` prints them.

Binomial tolerances. With m datasets the Monte Carlo SE of a rejection rate p is
sqrt(p (1 - p) / m): for p = 0.05 and m = 2,000 it is 0.49 percentage points, so the band
3.5-7.0 % required by issue 5 is about -3 SE to +4 SE around 5 %; a correctly calibrated test
falls outside it with probability below 0.2 %. For a 95 % coverage rate and m = 2,000 the SE
is 0.49 points too, so the floor of 93 % is 4 SE below nominal. With m = 1,000 (study (c),
per variant) the SE of 5 % is 0.69 points.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

try:  # tests/ is not a package; pytest puts it on sys.path ("prepend" import mode)
    from ._simulate import (exp_null, heterogeneous_effect, mixed_binary_null, normal_null,
                            run_study)
except ImportError:
    from _simulate import exp_null, heterogeneous_effect, mixed_binary_null, normal_null, run_study

pytestmark = pytest.mark.slow

ALPHA = 0.05
N_NULL = 2000  # datasets per null study (a), (b)
N_MISSPEC = 1000  # datasets per variant of the misspecified study (c)
N_COVER = 2000  # datasets of the coverage study
N_MC = 100  # datasets of the Monte Carlo engine subset
MC_RESAMPLES = 999

# Root seeds of the studies (dataset i of a study uses SeedSequence(root).spawn(...)[i]).
ROOT_A, ROOT_B, ROOT_C, ROOT_COVER = 20261, 20262, 20263, 20264


def _rate(results, key="p"):
    p = np.array([r[key] for r in results])
    return float(np.mean(p < ALPHA))


def _se(rate, m):
    return math.sqrt(max(rate * (1 - rate), 0.05 * 0.95) / m)


def _report(label, rate, m):
    print(f"\n[calibration] {label}: {100 * rate:.2f} % of {m} datasets "
          f"(MC SE {100 * _se(rate, m):.2f} points)")


@pytest.fixture(scope="module")
def study_a():
    # (a) one normal confounder, P(exposed) = expit(0.8 x), y = x + N(0, 1), n = 2,000, no effect
    return run_study(normal_null, ROOT_A, N_NULL, {"default": dict(plain=True)})["default"]


def test_default_test_type1_error_normal_confounder(study_a):
    rate = _rate(study_a)
    _report("(a) default test, normal confounder, n=2000", rate, N_NULL)
    assert 0.035 <= rate <= 0.070  # issue 5: 3.5-7.0 % at alpha = 0.05 (see module docstring)


def test_plain_stratified_test_is_far_above_nominal(study_a):
    # Issue 2 reports about 30 % at n = 2,000 for the unadjusted 5-stratum test: five strata
    # leave about a tenth of the confounder's bias inside them (Cochran 1968).
    rate = _rate(study_a, "p_plain")
    _report("(a) plain stratified difference, normal confounder, n=2000", rate, N_NULL)
    # "Far above": at least 3x nominal, i.e. > 20 SE above 5 %; a calibrated test cannot get there.
    assert rate >= 0.15


def test_monte_carlo_and_normal_engines_agree():
    # The first N_MC datasets of study (a), default test with the Monte Carlo engine.
    # The normal engine's p-value uses the exact permutation mean and variance; at n = 2,000
    # its approximation error is far below the MC error of B = 999 resamples. The two-sided
    # MC p-value is 2 (b + 1) / (B + 1) for the smaller tail, whose probability is q = p / 2,
    # so its SE is 2 sqrt(q (1 - q) / (B + 1)) (binomial count b). Then
    # z = (p_mc - p_normal) / SE is about N(0, 1): max |z| over 100 datasets exceeds 4 with
    # probability about 100 * 6.3e-5 < 1 %, and the mean z has SE 0.1 (|mean z| < 0.5: 5 SE).
    res = run_study(normal_null, ROOT_A, N_MC,
                    {"mc": dict(engine="monte_carlo", resamples=MC_RESAMPLES, seed=7)})["mc"]
    p_mc = np.array([r["p"] for r in res])
    p_norm = np.array([r["p_normal"] for r in res])
    agree = float(np.mean((p_mc < ALPHA) == (p_norm < ALPHA)))
    q = np.clip(p_norm / 2, 1.0 / (MC_RESAMPLES + 1), 0.5)
    se = 2 * np.sqrt(q * (1 - q) / (MC_RESAMPLES + 1))
    z = (p_mc - np.minimum(p_norm, 1.0)) / se
    z = np.where((p_mc >= 1.0) & (p_norm > 1 - 2 * se), 0.0, z)  # both capped at 1
    print(f"\n[calibration] MC vs normal engine, {N_MC} datasets of (a), B={MC_RESAMPLES}: "
          f"decisions agree in {100 * agree:.0f} %, max |z| = {np.abs(z).max():.2f}, "
          f"mean z = {z.mean():.3f}, max |p_mc - p_normal| = {np.abs(p_mc - p_norm).max():.4f}")
    assert agree >= 0.95
    assert np.abs(z).max() <= 4.0
    assert abs(z.mean()) < 0.5
    assert np.all(p_mc > 0) and np.all(p_mc <= 1)  # Phipson & Smyth 2010: never zero


def test_default_test_type1_error_mixed_confounders_binary_outcome():
    # (b) a normal and a three-level confounder, binary outcome (logistic model), n = 3,000
    res = run_study(mixed_binary_null, ROOT_B, N_NULL, {"default": {}})["default"]
    rate = _rate(res)
    _report("(b) default test, normal + 3-level confounder, binary outcome, n=3000", rate, N_NULL)
    assert 0.035 <= rate <= 0.070  # issue 5: 3.5-7.0 %


def test_misspecified_outcome_model():
    # (c) y = exp(x) + N(0, 1), linear covariance adjustment (misspecified), n = 2,000.
    # Measured and reported in docs/validation.md with two mitigations: ten strata
    # (`n_strata=10`), and a cubic B-spline of the confounder (`--formula 'bs(x, df=4)'`),
    # which feeds both the score model and the covariance adjustment.
    variants = {"default": {}, "ten strata": dict(n_strata=10), "spline": dict(design="spline")}
    res = run_study(exp_null, ROOT_C, N_MISSPEC, variants)
    rates = {name: _rate(r) for name, r in res.items()}
    for name, rate in rates.items():
        _report(f"(c) misspecified exp(x) null, {name}", rate, N_MISSPEC)
    # The stratum fixed effects of the adjustment absorb most of the curvature: the default
    # must not be anti-conservative (upper end of the band; 0.69-point SE).
    assert rates["default"] <= 0.070
    assert rates["ten strata"] <= 0.070
    # A flexible adjustment (the remedy the docs recommend) is calibrated.
    assert 0.035 <= rates["spline"] <= 0.070


def test_headline_ci_coverage_under_heterogeneous_effect():
    # Non-null, heterogeneous effect tau_i = 1 + 0.5 x_i, confounded by x; n = 2,000, 5 strata.
    # Truth = the sample estimand: mean tau_i over the analysed units (ATE) or over the analysed
    # exposed units (ATT). Issue 2 measured 94-95 % for both; floor 93 % (4 SE, docstring).
    res = run_study(heterogeneous_effect, ROOT_COVER, N_COVER,
                    {"ate": dict(estimate=True), "att": dict(estimate=True, estimand="att")})
    for name, rows in res.items():
        est = np.array([r["est"] for r in rows])
        truth = np.array([r["truth"] for r in rows])
        covered = np.array([r["ci_low"] <= r["truth"] <= r["ci_high"] for r in rows])
        cover = float(covered.mean())
        bias = float(np.mean(est - truth))
        bias_se = float(np.std(est - truth, ddof=1) / math.sqrt(len(rows)))
        width = float(np.mean([r["ci_high"] - r["ci_low"] for r in rows]))
        print(f"\n[calibration] coverage {name.upper()}: {100 * cover:.2f} % of {len(rows)} "
              f"(MC SE {100 * _se(0.95, len(rows)):.2f}); mean error {bias:+.4f} "
              f"(SE {bias_se:.4f}); mean CI width {width:.3f}")
        assert cover >= 0.93
        # Five strata leave ~10 % of the bias of the score (Cochran 1968) before regression
        # adjustment; after it the headline should be close to unbiased: |bias| < 4 SE + 0.01.
        assert abs(bias) < 4 * bias_se + 0.01
