"""Reduced calibration and coverage studies of the shipped default, through ``stratagap.analyze``.

The CI runs these (marker ``slow``; ``python -m pytest`` runs everything in ``tests/``). Each
study is the first ``m`` datasets of the full study of the same name
(``python tests/calibration/run_studies.py --full``); the scenarios, options, seeds and bands
are in :mod:`calibration.studies`, the band arithmetic in :mod:`calibration.bands`, and the
figures in docs/validation.md.

Budget: at most 10 CPU-minutes on one core for the whole module (measured: 8.2 CPU-minutes,
490 s in the analyses; figures in docs/validation.md); it runs in two worker processes, so
about 4 minutes of wall time on two idle cores.

Sources: Rosenbaum 2002, Statistical Science 17:286 (permuting covariance-adjusted residuals
gives an exact test of the sharp null, so the nominal 5 % applies); Lin 2013, Annals of
Applied Statistics 7:295 and Imbens & Rubin 2015 ch. 17 (the headline interval, nominal 95 %);
Cochran 1968, Biometrics 24:295 (five subclasses leave about a tenth of the bias: the plain
stratified test is expected far above nominal).
"""

from __future__ import annotations

import pytest

from calibration.studies import STUDIES, run_study, summarize

pytestmark = pytest.mark.slow

SIZE = "reduced"


def _run(name):
    study = STUDIES[name]
    summary = summarize(study, run_study(study, study.m(SIZE)), SIZE)
    print(f"\n[calibration] {summary}")
    return summary


@pytest.mark.parametrize("name", ["a_default", "b_default", "c_spline"])
def test_default_type1_error_inside_two_sided_band(name):
    s = _run(name)
    assert s["passed"], f"{name}: rejection rate {100 * s['rate']:.2f} % outside {s['rule']}"


def test_plain_stratified_difference_is_far_above_nominal():
    # Cochran 1968: five strata leave about a tenth of the confounder's bias inside them; at
    # n = 2,000 that makes the unadjusted test reject far too often (issue 2 measured ~30 %).
    # A floor of 15 % is about 8 binomial SE above 5 % at m = 300 (SE 1.26 points at 5 %)
    # and about 5 SE below the ~29 % measured; expected: the floor is passed.
    s = _run("a_plain")
    assert s["passed"], f"plain test rejects only {100 * s['rate']:.2f} %"


@pytest.mark.parametrize("name", ["c_default"])
def test_misspecified_linear_adjustment_is_neither_anti_conservative_nor_dead(name):
    # Measured full-size: the default is conservative here (about 2.6 %), the stratum effects
    # absorbing the curvature between strata. Upper bound 6.5 %: not anti-conservative; lower
    # bound 1.0 % (about 3 SE below the measured rate): a test that stopped rejecting fails.
    s = _run(name)
    assert s["passed"], f"{name}: rejection rate {100 * s['rate']:.2f} % outside {s['rule']}"


def test_monte_carlo_and_normal_engines_agree():
    s = _run("engines")
    assert s["passed"], s


@pytest.mark.parametrize("name", ["cover_ate", "cover_att"])
def test_headline_ci_coverage_two_sided_and_unbiased(name):
    s = _run(name)
    assert s["passed"], (f"{name}: coverage {100 * s['rate']:.2f} %, mean error "
                         f"{s['bias']:+.4f} ({s['bias_in_se']:+.2f} SE); rule {s['rule']}")
