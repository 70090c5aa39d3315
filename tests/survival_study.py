"""Simulation with known truth for time-to-event outcomes, through ``stratagap.analyze``.

Scenario (invented): n = 400 units, covariates x1, x2 ~ N(0, 1) and x3 ~ Bernoulli(0.5);
exposure logit = -0.3 + 0.6 x1 + 0.4 x2; exponential event times with hazard
0.05 exp(0.5 x1 + 0.4 x2 + 0.3 x3 + beta a) (so the covariates confound: they raise both the
chance of exposure and the hazard); censoring uniform on (10, 30), so every unit without an
event is at risk at the horizon 8 (given).

Truths (ATE, exact up to the Monte Carlo error of 2,000,000 covariate draws, about 1e-4): the
risk difference at 12, ``E[S_0(12 | x) - S_1(12 | x)]`` with ``S_a(u | x) = exp(-lambda_a(x) u)``,
and the RMST difference ``E[(1 - exp(-lambda_1 H)) / lambda_1 - (1 - exp(-lambda_0 H)) / lambda_0]``.
Under ``beta = 0`` both are 0 and the sharp null holds.

Run ``python tests/survival_study.py --m 200`` for a fuller study; the CI runs a few datasets
(tests/test_survival_calibration.py).
"""

from __future__ import annotations

import argparse
import math
import sys
import time as _time
import warnings

import numpy as np
import pandas as pd

N, HORIZON, BASE = 400, 8.0, 0.05
COEF = np.array([0.5, 0.4, 0.3])


def draw(seed: int, beta: float, n: int = N) -> pd.DataFrame:
    rng = np.random.default_rng([20261202, seed])
    x = np.column_stack([rng.normal(size=n), rng.normal(size=n), rng.integers(0, 2, n)])
    a = (rng.random(n) < 1 / (1 + np.exp(-(-0.3 + 0.6 * x[:, 0] + 0.4 * x[:, 1])))).astype(int)
    rate = BASE * np.exp(x @ COEF + beta * a)
    event_time = rng.exponential(1 / rate)
    censor = rng.uniform(10, 30, n)
    return pd.DataFrame({"a": a, "x1": x[:, 0], "x2": x[:, 1], "x3": x[:, 2],
                         "time": np.minimum(event_time, censor),
                         "event": (event_time <= censor).astype(int)})


def truth(beta: float) -> dict:
    rng = np.random.default_rng(7)
    m = 2_000_000
    x = np.column_stack([rng.normal(size=m), rng.normal(size=m), rng.integers(0, 2, m)])
    lam0 = BASE * np.exp(x @ COEF)
    lam1 = lam0 * math.exp(beta)
    rd = float(np.mean(np.exp(-lam0 * HORIZON) - np.exp(-lam1 * HORIZON)))
    rmst = float(np.mean((1 - np.exp(-lam1 * HORIZON)) / lam1
                         - (1 - np.exp(-lam0 * HORIZON)) / lam0))
    return {"risk_difference": rd, "rmst_difference": rmst}


def one(seed: int, beta: float) -> dict:
    import stratagap

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        r = stratagap.analyze(draw(seed, beta), exposure="a", outcome="event", time="time",
                              covariates=["x1", "x2", "x3"], horizon=HORIZON, resamples=999,
                              seed=seed)
    d = r.to_dict()
    adj = d["adjusted"]
    return {"estimate": adj["estimate"], "ci_low": adj["ci_low"], "ci_high": adj["ci_high"],
            "rmst": adj["rmst_difference"]["estimate"],
            "rmst_low": adj["rmst_difference"]["ci_low"],
            "rmst_high": adj["rmst_difference"]["ci_high"],
            "plain": adj["plain_stratified"]["estimate"], "p": d["test"]["p_value"]}


def study(m: int, beta: float, first_seed: int = 0) -> dict:
    true = truth(beta)
    rows = [one(first_seed + k, beta) for k in range(m)]
    f = pd.DataFrame(rows)
    rd, rm = true["risk_difference"], true["rmst_difference"]
    return {"m": m, "beta": beta, "truth": true,
            "coverage": float(np.mean((f.ci_low <= rd) & (rd <= f.ci_high))),
            "rmst_coverage": float(np.mean((f.rmst_low <= rm) & (rm <= f.rmst_high))),
            "rejection": float(np.mean(f.p < 0.05)),
            "bias": float(f.estimate.mean() - rd), "plain_bias": float(f.plain.mean() - rd),
            "mc_sd": float(f.estimate.std(ddof=1))}


if __name__ == "__main__":
    parser = argparse.ArgumentParser()
    parser.add_argument("--m", type=int, default=200)
    parser.add_argument("--beta", type=float, nargs="*", default=[0.5, 0.0])
    parser.add_argument("--first-seed", type=int, default=0)
    args = parser.parse_args()
    for beta in args.beta:
        start = _time.time()
        print(study(args.m, beta, args.first_seed), f"{_time.time() - start:.0f} s", flush=True)
    sys.exit(0)
