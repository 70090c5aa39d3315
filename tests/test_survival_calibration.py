"""Known-truth simulation of time-to-event outcomes, reduced for CI (marker ``slow``).

The scenario and its truths are in tests/survival_study.py (invented; the covariates confound
exposure and hazard; horizon 8). Here: the first m = 20 datasets of each arm, through
``stratagap.analyze`` (about 7 s each on one core). Bands (exact binomial,
tests/calibration/bands.py): coverage of the 95 % interval of the risk difference at the
horizon inside [80 %, 100 %] (false alarm 0.26 % for a method at 95 %); rejection by the
default test under the sharp null (beta = 0) inside [0 %, 20 %] (false alarm 0.26 % at 5 %,
power 76 % against a true 30 %). The fuller study: ``python tests/survival_study.py --m 200``;
the measured figures of m = 200 per arm are in docs/methods.md (time-to-event section).

Sources: Rosenbaum 2002 (Statistical Science 17:286): permuting scores fixed under the sharp
null gives an exact test, so the nominal 5 % applies; the interval's nominal 95 %.
"""

import pytest

from calibration.bands import Band
from survival_study import study

pytestmark = pytest.mark.slow

M = 20


def test_risk_difference_interval_covers_the_truth_under_confounding():
    s = study(M, beta=0.5)
    band = Band(0.80, 1.0, M, 0.95, (0.80,))
    print(f"\n[survival] coverage {s['coverage']:.3f}, {band.describe()}; bias {s['bias']:.4f}")
    assert band.contains(s["coverage"]), f"coverage {s['coverage']:.3f} outside {band.describe()}"
    # the headline's bias is small beside its spread (3 SE of a mean over m datasets)
    assert abs(s["bias"]) < 3 * s["mc_sd"] / M ** 0.5


def test_default_test_size_under_the_sharp_null():
    s = study(M, beta=0.0)
    band = Band(0.0, 0.20, M, 0.05, (0.30,))
    print(f"\n[survival] rejection {s['rejection']:.3f}, {band.describe()}")
    assert band.contains(s["rejection"]), f"rejection {s['rejection']:.3f} outside {band.describe()}"
