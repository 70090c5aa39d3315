"""Benchmark of the stratified permutation engine against two baselines, measured in one run.

    python tests/benchmarks/bench_engine.py                 # n = 1e6, 5 strata, B = 10,000
    python tests/benchmarks/bench_engine.py --quick         # smoke size (seconds)

Prints, per resample and extrapolated to B resamples:
  * our engine, continuous values, mean_difference (Monte Carlo);
  * our engine, binary values, sum statistic (hypergeometric draws; and the exact convolution);
  * baseline 1: scipy.stats.permutation_test (independent, vectorized difference of means) on
    ONE stratum of all n rows (the only case it covers), against our engine on the same data;
  * baseline 2: a Python loop that shuffles the label column of a pandas DataFrame within
    each stratum (``sample(frac=1)``) and recomputes grouped means.
Baselines run at ``--baseline-resamples`` and are reported per resample. Peak memory is the
tracemalloc peak of each call (numpy allocations are traced). Not a test: no assertions.
"""

from __future__ import annotations

import argparse
import os
import platform
import time
import tracemalloc

import numpy as np
import pandas as pd
from scipy import stats

from stratagap import permutation as P


def _data(n, n_strata, seed=0):
    rng = np.random.default_rng(seed)
    labels = rng.integers(0, n_strata, n)
    t = (rng.random(n) < 0.3).astype(np.int8)
    y = rng.normal(size=n) + 0.01 * t
    yb = (rng.random(n) < 0.1 + 0.002 * t).astype(float)
    return y, yb, t, labels


def _timed(fn):
    tracemalloc.start()
    t0 = time.perf_counter()
    out = fn()
    dt = time.perf_counter() - t0
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    return out, dt, peak


def _pandas_loop(y, t, labels, resamples, seed):
    frame = pd.DataFrame({"y": y, "t": t, "s": labels})
    rng = np.random.default_rng(seed)
    out = np.empty(resamples)
    weights = frame.groupby("s").size() / len(frame)
    for b in range(resamples):
        parts = []
        for _, g in frame.groupby("s"):
            parts.append(g.assign(t=g["t"].sample(frac=1, random_state=rng).to_numpy()))
        shuffled = pd.concat(parts)
        means = shuffled.groupby(["s", "t"])["y"].mean().unstack()
        out[b] = float(((means[1] - means[0]) * weights).sum())
    return out


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=1_000_000)
    ap.add_argument("--strata", type=int, default=5)
    ap.add_argument("--resamples", type=int, default=10_000)
    ap.add_argument("--baseline-resamples", type=int, default=100)
    ap.add_argument("--workers", type=int, default=None)
    ap.add_argument("--quick", action="store_true", help="smoke size: n=20,000, B=500")
    a = ap.parse_args(argv)
    if a.quick:
        a.n, a.resamples, a.baseline_resamples = 20_000, 500, 10
    B, Bb = a.resamples, a.baseline_resamples
    y, yb, t, labels = _data(a.n, a.strata)
    print(f"machine: {platform.processor() or platform.machine()}, {os.cpu_count()} CPUs, "
          f"load {os.getloadavg()[0]:.1f}; numpy {np.__version__}")
    print(f"data: n={a.n:,}, {a.strata} strata, exposed share 0.3, B={B:,} "
          f"(baselines at {Bb} resamples, extrapolated)")
    kw = dict(estimand="ate", engine="monte_carlo", resamples=B, seed=1, workers=a.workers)
    r, dt, peak = _timed(lambda: P.stratified_test(y, t, labels, **kw))
    print(f"ours  continuous mean_difference: {dt:8.2f} s for B={B:,} "
          f"({dt / B * 1e3:.3f} ms/resample), peak {peak / 2**20:.0f} MiB, p={r.p_value:.4f}")
    r, dt, peak = _timed(lambda: P.stratified_test(yb, t, labels, statistic="sum", **kw))
    print(f"ours  binary sum, hypergeometric:  {dt:8.2f} s for B={B:,}, peak "
          f"{peak / 2**20:.0f} MiB, p={r.p_value:.4f}")
    r, dt, _ = _timed(lambda: P.stratified_test(yb, t, labels, estimand="ate", statistic="sum"))
    print(f"ours  binary sum, exact convolution: {dt:6.2f} s, p={r.p_value:.4f} ({r.engine})")

    one = np.zeros(a.n, dtype=np.int64)
    ours1, dt1, _ = _timed(lambda: P.stratified_test(y, t, one, **kw))
    a1, b1 = y[t == 1], y[t == 0]

    def diff(x, z, axis):
        return np.mean(x, axis=axis) - np.mean(z, axis=axis)

    _, dts, _ = _timed(lambda: stats.permutation_test(
        (a1, b1), diff, permutation_type="independent", vectorized=True, n_resamples=Bb,
        random_state=np.random.default_rng(1)))
    print(f"one stratum: ours {dt1 / B * 1e3:.3f} ms/resample; scipy.permutation_test "
          f"{dts / Bb * 1e3:.3f} ms/resample (x{B / Bb * dts:.0f} s at B); ratio "
          f"{(dts / Bb) / (dt1 / B):.0f}x")
    _, dtp, _ = _timed(lambda: _pandas_loop(y, t, labels, Bb, 1))
    _, dto, _ = _timed(lambda: P.stratified_test(y, t, labels, **kw))
    print(f"{a.strata} strata: ours {dto / B * 1e3:.3f} ms/resample; pandas shuffle loop "
          f"{dtp / Bb * 1e3:.3f} ms/resample ({B / Bb * dtp:.0f} s at B); ratio "
          f"{(dtp / Bb) / (dto / B):.0f}x")


if __name__ == "__main__":
    main()
