"""Run the nonlinear calibration battery through the public ``stratagap.analyze``.

Each cell is (scenario, estimand, n); each dataset is analysed with the default terms and with
``terms="linear"`` so the gain is visible. Options other than the terms are the defaults except
``resamples=999`` (the Monte Carlo error of a p-value near 0.05 is then 0.007, which moves a
rejection rate by much less than its binomial error) and ``gamma_grid=(1.0,)`` (the Gamma
curve does not touch the test or the headline).

The full battery (2,000 datasets per cell; hours of CPU)::

    PYTHONPATH=src nice -n 10 python tests/calibration_nonlinear/run_nonlinear_battery.py \\
        --datasets 2000 --workers 2 --out battery.json

A smaller run for a quick look: ``--datasets 200 --n 5000``; ``--terms spline`` skips the
linear-terms analysis. The figures recorded in
docs/validation.md name the command that produced them.
"""

from __future__ import annotations

import argparse
import json
import multiprocessing
import os
import sys
import time
import warnings

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from nonlinear_scenarios import ADDITIVE, COVARIATES, REPORTED, dataset_rng, make  # noqa: E402

ALPHA = 0.05
#: Root seed of a cell: a fixed base plus stable offsets, so cells do not share datasets.
ROOT = 2026_1100
SCENARIO_ORDER = (*ADDITIVE, *REPORTED, "heterogeneous", "heterogeneous_overlap")
TERMS = ("spline", "linear")


def cell_root(scenario: str, estimand: str, n: int) -> int:
    return ROOT + 1000 * SCENARIO_ORDER.index(scenario) + 100 * ("ate", "att").index(estimand) \
        + n // 1000


def analyse_one(scenario: str, estimand: str, n: int, index: int, terms=TERMS) -> dict:
    """Both analyses of dataset ``index`` of a cell: ``{terms: {p, est, lo, hi, truth}}``."""
    import stratagap

    df, tau = make(scenario, dataset_rng(cell_root(scenario, estimand, n), index), n)
    out = {}
    for term in terms:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            res = stratagap.analyze(df, exposure="t", outcome="y", covariates=COVARIATES,
                                    estimand=estimand, terms=term, resamples=999,
                                    gamma_grid=(1.0,), seed=index)
        row = {"p": float(res.tests.main.p_value), "est": float(res.adjusted.estimate),
               "lo": float(res.adjusted.ci_low), "hi": float(res.adjusted.ci_high)}
        if tau is not None:  # the sample estimand of the analysed rows
            rows = np.asarray(res.arrays["row_ids"])[np.asarray(res.arrays["used"])]
            t = df["t"].to_numpy()[rows]
            row["truth"] = float(tau[rows].mean() if estimand == "ate" else tau[rows][t == 1].mean())
        out[term] = row
    return out


def _job(args):
    return args[3], analyse_one(*args)


def _init_worker():
    try:
        from threadpoolctl import threadpool_limits
        threadpool_limits(1)
    except ImportError:  # pragma: no cover
        pass


def run_cell(scenario, estimand, n, datasets, *, workers=1, terms=TERMS) -> dict:
    """Rejection rates (null scenarios) or coverage (heterogeneous) of one cell, per terms."""
    jobs = [(scenario, estimand, n, i, terms) for i in range(datasets)]
    if workers > 1:
        with multiprocessing.get_context("spawn").Pool(workers, initializer=_init_worker) as pool:
            results = dict(pool.imap_unordered(_job, jobs, chunksize=4))
    else:
        results = dict(map(_job, jobs))
    summary = {"scenario": scenario, "estimand": estimand, "n": n, "datasets": datasets,
               "root": cell_root(scenario, estimand, n)}
    for term in terms:
        rows = [results[i][term] for i in range(datasets)]
        p = np.array([r["p"] for r in rows])
        summary[term] = {"rejection": float(np.mean(p < ALPHA))}
        if "truth" in rows[0]:
            cover = [r["lo"] <= r["truth"] <= r["hi"] for r in rows]
            summary[term]["coverage"] = float(np.mean(cover))
            summary[term]["bias"] = float(np.mean([r["est"] - r["truth"] for r in rows]))
    return summary


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--datasets", type=int, default=2000)
    ap.add_argument("--n", type=int, nargs="*", default=[1000, 5000])
    ap.add_argument("--estimands", nargs="*", default=["ate", "att"])
    ap.add_argument("--scenarios", nargs="*", default=list(SCENARIO_ORDER))
    ap.add_argument("--workers", type=int, default=1)
    ap.add_argument("--terms", nargs="*", default=list(TERMS),
                    help="terms to analyse each dataset with (default: spline and linear)")
    ap.add_argument("--out", default=None)
    a = ap.parse_args(argv)
    cells = []
    for scenario in a.scenarios:
        for estimand in a.estimands:
            for n in a.n:
                t0 = time.perf_counter()
                c = run_cell(scenario, estimand, n, a.datasets, workers=a.workers,
                             terms=tuple(a.terms))
                c["wall_seconds"] = round(time.perf_counter() - t0, 1)
                cells.append(c)
                print(json.dumps(c), flush=True)
    if a.out:
        with open(a.out, "w", encoding="utf-8") as fh:
            json.dump(cells, fh, indent=1)


if __name__ == "__main__":
    main()
