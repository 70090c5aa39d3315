"""The reduced nonlinear calibration battery (issue 11), through the public ``stratagap.analyze``.

Five cells of :mod:`nonlinear_scenarios` at n = 2,000 with ``M = 120`` datasets each, default
options (spline terms) except ``resamples=999`` and a one-point Gamma grid (see
``run_nonlinear_battery.py``). About 600 analyses, 3-4 CPU minutes on one core. The full battery
(2,000 datasets per cell, n = 1,000 and 5,000, both estimands, linear terms beside the default)
is ``run_nonlinear_battery.py``; its figures are in docs/validation.md.

Bands, sized for M (exact binomial quantiles, computed below): a calibrated test (rate 5 %)
rejects in a cell more than ``binom.isf(0.001, M, 0.05)`` = 14 of 120 with probability below
0.1 %; pooled over the four additive cells (480 datasets) the count lies within the 0.1 % and
99.9 % binomial quantiles (2.3 % to 8.3 %) unless the test is miscalibrated. Linear terms
reject 95-100 % of these datasets at n = 5,000 (docs/validation.md), so a default that
reverted to linear terms fails every cell. The coverage floor for a 95 % CI over M datasets is
``binom.ppf(0.001, M, 0.95)`` = 106 of 120 (88.3 %), under an effect quadratic in a
confounder (ATE); for the ATT cell (default terms only) the floor is sized at the issue's 93 %:
``binom.ppf(0.001, M, 0.93)`` = 102 of 120.
"""

from __future__ import annotations

import os
import sys

import pytest
from scipy import stats

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from run_nonlinear_battery import run_cell  # noqa: E402

pytestmark = pytest.mark.slow

M = 120
N = 2000
NULL_CELLS = [("quadratic", "ate"), ("exponential_binary", "att"), ("smooth_threshold", "ate"),
              ("smooth_threshold_binary", "att")]
TAIL = 0.001


@pytest.fixture(scope="module")
def null_cells():
    workers = min(2, os.cpu_count() or 1)
    return {key: run_cell(*key, N, M, workers=workers, terms=("spline",)) for key in NULL_CELLS}


@pytest.mark.parametrize("key", NULL_CELLS, ids=["-".join(k) for k in NULL_CELLS])
def test_default_terms_hold_the_level_in_each_nonlinear_null(null_cells, key):
    rate = null_cells[key]["spline"]["rejection"]
    print(f"\n[nonlinear calibration] {key}: {100 * rate:.1f} % of {M} (n = {N})")
    assert round(rate * M) <= stats.binom.isf(TAIL, M, 0.05)


def test_default_terms_pooled_rejection_rate(null_cells):
    count = sum(round(c["spline"]["rejection"] * M) for c in null_cells.values())
    m = M * len(NULL_CELLS)
    lo, hi = stats.binom.ppf(TAIL, m, 0.05), stats.binom.isf(TAIL, m, 0.05)
    print(f"\n[nonlinear calibration] pooled: {count} of {m} ({100 * count / m:.1f} %)")
    assert lo <= count <= hi


@pytest.fixture(scope="module")
def coverage_cell():
    return run_cell("heterogeneous_overlap", "ate", N, M, workers=min(2, os.cpu_count() or 1))


def test_headline_under_heterogeneous_effect_default_beats_linear(coverage_cell):
    spline, linear = coverage_cell["spline"], coverage_cell["linear"]
    print(f"\n[nonlinear calibration] heterogeneous effect, n = {N}: coverage spline "
          f"{100 * spline['coverage']:.1f} % (bias {spline['bias']:.4f}), linear "
          f"{100 * linear['coverage']:.1f} % (bias {linear['bias']:.4f}) of {M}")
    # measured (docs/validation.md): linear terms are biased by about +0.19 (SD of the
    # estimate about 0.10) and cover about 26-30 %; the default is unbiased to within its Monte
    # Carlo error (SD of the estimate 0.059 at most; 0.059 / sqrt(120) = 0.0054; 0.026 is
    # 4.8 of them)
    assert abs(spline["bias"]) < 0.026 < linear["bias"]
    assert spline["coverage"] > linear["coverage"] + 0.25


def test_headline_ci_coverage_under_heterogeneous_effect(coverage_cell):
    # issue 11's floor, sized for M: a 95 % interval covers fewer than binom.ppf(0.001, 120,
    # 0.95) = 106 of 120 with probability below 0.1 %. The full cell (1,000 datasets of the same
    # seeds) covers 94.0 % (docs/validation.md); before the shared-slope ladder it covered 87 %.
    cover = coverage_cell["spline"]["coverage"]
    print(f"\n[nonlinear calibration] coverage {round(cover * M)} of {M}")
    assert round(cover * M) >= stats.binom.ppf(TAIL, M, 0.95)


def test_att_headline_ci_coverage_under_heterogeneous_effect():
    # The ATT cell, default terms only. Floor sized for M at the 93 %: an interval that
    # covers 93 % of the time covers fewer than binom.ppf(0.001, 120, 0.93) of 120 with
    # probability below 0.1 %. The full cell (1,000 datasets of the same seeds) is in
    # docs/validation.md; before spline columns could give way it covered 92.6 %, before the
    # column-by-column interactions 89.2 %. Its first 120 datasets cover 110 (91.7 %).
    cell = run_cell("heterogeneous_overlap", "att", N, M, workers=min(2, os.cpu_count() or 1),
                    terms=("spline",))
    cover, bias = cell["spline"]["coverage"], cell["spline"]["bias"]
    print(f"\n[nonlinear calibration] ATT coverage {round(cover * M)} of {M} (bias {bias:.4f})")
    assert round(cover * M) >= stats.binom.ppf(TAIL, M, 0.93)
    assert abs(bias) < 0.03  # SD of the ATT estimate about 0.065: 0.065 / sqrt(120) = 0.006
