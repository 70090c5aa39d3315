"""Calibration of the rate outcome through stratagap.analyze, with a known truth.

Scenario: :mod:`calibration.rates_scenario` (invented; confounded by age and smoking; truth in
closed form). Two studies of m datasets each:

* confounding, rate ratio 1.4: coverage of the headline rate difference's 95 % CI (target at
  least 93 %), and the crude difference's bias (to show the confounding is real);
* true null (rate ratio 1): rejection rate of the default permutation test at 5 % (target 2 to
  7 %) and coverage of 0.

Bands are binomial (:mod:`calibration.bands`): the widest band around the nominal rate whose
false-alarm probability at the nominal rate is at most 0.5 %, so the small CI run (m = 150 by
default) only catches gross failures; ``STRATAGAP_RATE_SIM_M=400`` runs the fuller study
(minutes), and ``python tests/calibration/test_rate_calibration.py 400`` prints its numbers.
"""

from __future__ import annotations

import os
import sys
import warnings
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from calibration.rates_scenario import make_rate_data, true_rate_difference  # noqa: E402

M = int(os.environ.get("STRATAGAP_RATE_SIM_M", "150"))
N = 1000
KW = dict(exposure="shift", exposed_value="nights", outcome="spells", person_time="years",
          covariates=["age_z", "smoker"], resamples=199)


def band(nominal: float, m: int, false_alarm: float = 0.005) -> tuple[float, float]:
    """Equal-tailed binomial acceptance band [lo, hi] for a rate measured over m datasets."""
    lo = stats.binom.ppf(false_alarm / 2, m, nominal) / m
    hi = stats.binom.isf(false_alarm / 2, m, nominal) / m
    return float(lo), float(hi)


def run(rate_ratio: float, m: int, seed0: int) -> dict:
    import stratagap  # noqa: PLC0415

    truth = true_rate_difference(rate_ratio)
    cover = reject = 0
    crude = []
    for k in range(m):
        df = make_rate_data(n=N, rate_ratio=rate_ratio, seed=seed0 + k)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            d = stratagap.analyze(df, seed=k, **KW).to_dict()
        adj = d["adjusted"]
        cover += adj["ci_low"] <= truth <= adj["ci_high"]
        reject += d["test"]["p_value"] < 0.05
        crude.append(d["crude"]["estimate"] - truth)
    return {"m": m, "truth": truth, "coverage": cover / m, "rejection": reject / m,
            "crude_bias": float(np.mean(crude)),
            "crude_bias_se": float(np.std(crude, ddof=1) / np.sqrt(m))}


@pytest.mark.slow
def test_rate_difference_covers_under_confounding():
    res = run(1.4, M, seed0=10_000)
    lo, hi = band(0.95, M)
    assert lo <= res["coverage"] <= hi, res
    assert res["crude_bias"] > 4 * res["crude_bias_se"], res  # the scenario is confounded


@pytest.mark.slow
def test_rate_test_size_and_coverage_under_the_null():
    res = run(1.0, M, seed0=20_000)
    lo, hi = band(0.05, M)
    assert lo <= res["rejection"] <= hi, res
    lo, hi = band(0.95, M)
    assert lo <= res["coverage"] <= hi, res


if __name__ == "__main__":
    m = int(sys.argv[1]) if len(sys.argv) > 1 else 400
    for rr, seed0 in ((1.4, 10_000), (1.0, 20_000)):
        out = run(rr, m, seed0)
        se_c = np.sqrt(out["coverage"] * (1 - out["coverage"]) / m)
        se_r = np.sqrt(out["rejection"] * (1 - out["rejection"]) / m)
        print(f"rate ratio {rr}: m={m} truth={out['truth']:.4f} coverage={out['coverage']:.3f} "
              f"(SE {se_c:.3f}) rejection={out['rejection']:.3f} (SE {se_r:.3f}) "
              f"crude bias={out['crude_bias']:.4f} (SE {out['crude_bias_se']:.4f})", flush=True)
