"""Calibration of ``cluster=`` on clustered nulls, through the public ``stratagap.analyze``.

Scenarios (no effect of exposure anywhere): G hospitals of ``lo..hi`` patients; a hospital
covariate h ~ N(0, 1), a patient covariate x ~ N(0, 1), a hospital random effect
u ~ N(0, sd^2); y = 0.5 x + 0.7 h + u + N(0, 1). Exposure is decided per hospital with
P = expit(0.8 h) ("cluster"), or per patient with P = expit(0.8 h + 0.5 x) ("unit"). The
intraclass correlation of y given the covariates is sd^2 / (sd^2 + 1).

Each dataset is analysed twice with the defaults (covariates x and h; Monte Carlo engine with
``RESAMPLES`` resamples for speed), with and without ``cluster="hospital"``; we record the
default test's rejection at alpha = 0.05 and whether the headline 95 % CI covers 0.

Full version (>= 1,000 datasets per scenario; hours of CPU)::

    PYTHONPATH=src nice -n 10 python tests/cluster_study.py --datasets 1000

Dataset ``i`` of scenario ``k`` uses ``SeedSequence(ROOT, spawn_key=(k, i))``.
"""

from __future__ import annotations

import argparse
import math
import sys
import time
import warnings

import numpy as np
import pandas as pd
from scipy.special import expit

import stratagap

ROOT = 20140133
RESAMPLES = 999
ALPHA = 0.05

#: name -> (clusters, min size, max size, random-effect SD, exposure level)
SCENARIOS = {
    "cluster_G60_icc0.08": (60, 20, 60, 0.3, "cluster"),
    "cluster_G60_icc0.50": (60, 20, 60, 1.0, "cluster"),
    "cluster_G30_icc0.50": (30, 20, 60, 1.0, "cluster"),
    "cluster_G100_icc0.20": (100, 10, 30, 0.5, "cluster"),
    "unit_G60_icc0.50": (60, 20, 60, 1.0, "unit"),
}


def hospitals(rng, G, lo, hi, sd, level) -> pd.DataFrame:
    sizes = rng.integers(lo, hi + 1, size=G)
    h = rng.standard_normal(G)
    u = sd * rng.standard_normal(G)
    g = np.repeat(np.arange(G), sizes)
    x = rng.standard_normal(g.size)
    if level == "cluster":
        t = (rng.random(G) < expit(0.8 * h)).astype(int)[g]
    else:
        t = (rng.random(g.size) < expit(0.8 * h[g] + 0.5 * x)).astype(int)
    y = 0.5 * x + 0.7 * h[g] + u[g] + rng.standard_normal(g.size)
    return pd.DataFrame({"hospital": [f"H{k:03d}" for k in g], "t": t, "x": x, "h": h[g],
                         "y": y})


def one(k, i, scenario, cluster):
    rng = np.random.default_rng(np.random.SeedSequence(ROOT, spawn_key=(k, i)))
    data = hospitals(rng, *SCENARIOS[scenario])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            r = stratagap.analyze(data, exposure="t", outcome="y", covariates=["x", "h"],
                                  resamples=RESAMPLES, seed=i,
                                  **({"cluster": "hospital"} if cluster else {}))
        except stratagap.InputError as exc:  # counted, and reported by `run`
            print(f"  dataset {i} of {scenario}: {exc}", file=sys.stderr)
            return None
    return r.test.p_value < ALPHA, r.adjusted.ci_low <= 0.0 <= r.adjusted.ci_high


def run(scenario, datasets, *, cluster, start=0):
    """(rejection rate, coverage, m) over datasets ``start .. start + datasets - 1``.

    ``m`` counts the datasets analysed; one the analysis refuses (an ``InputError``, e.g. a
    group of a single cluster) is named on stderr and left out.
    """
    k = list(SCENARIOS).index(scenario)
    runs = [one(k, i, scenario, cluster) for i in range(start, start + datasets)]
    out = np.array([r for r in runs if r is not None])  # refused datasets are left out (stderr)
    return float(out[:, 0].mean()), float(out[:, 1].mean()), len(out)


def se(rate, m):
    return math.sqrt(max(rate * (1 - rate), 0.05 * 0.95) / m)


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--datasets", type=int, default=1000)
    parser.add_argument("--scenarios", default=",".join(SCENARIOS))
    parser.add_argument("--start", type=int, default=0, help="first dataset index")
    args = parser.parse_args(argv)
    print("scenario | --cluster | rejection % (MC SE) | coverage % (MC SE) | m | CPU s")
    for name in args.scenarios.split(","):
        for cluster in (True, False):
            t0 = time.process_time()
            rej, cov, m = run(name, args.datasets, cluster=cluster, start=args.start)
            print(f"{name} | {'yes' if cluster else 'no'} | {100 * rej:.1f} ({100 * se(rej, m):.1f})"
                  f" | {100 * cov:.1f} ({100 * se(cov, m):.1f}) | {m} | "
                  f"{time.process_time() - t0:.0f}", flush=True)


if __name__ == "__main__":
    sys.exit(main())
