"""The calibration and coverage studies: each runs ``stratagap.analyze`` on simulated tables.

Every dataset goes through the public entry point with the shipped defaults (five quantile
strata of a main-effects logistic score, the ``auto`` overlap rule, the covariance-adjusted
statistic, ATE weights, two-sided, alpha = 0.05, seed 2026), so the wiring of
``stratagap.pipeline`` is what is validated. Two settings are changed for speed, and said so
in each study's ``options``:

* ``engine="normal"`` in the rejection and coverage studies: the permutation distribution's
  exact mean and variance with a normal tail (the ``auto`` engine would draw 10,000 shuffles per
  dataset). The ``engines`` study ties the two: Monte Carlo (999 shuffles) against normal, on the
  same datasets, through ``analyze``.
* ``gamma_grid=(1.0,)``: the sensitivity curve is not what these studies measure (the Gamma
  threshold is still computed).

Dataset ``i`` of a study is ``scenario(dataset_rng(root, i))``; a study's reduced version uses
its first ``m`` datasets, so every reduced figure is a prefix of the full one.
"""

from __future__ import annotations

import math
import multiprocessing
import os
import time
import warnings
from dataclasses import dataclass

import numpy as np

from .bands import Band, binomial_se
from .scenarios import SCENARIOS, dataset_rng

__all__ = ["Study", "STUDIES", "run_study", "summarize", "ALPHA"]

ALPHA = 0.05
FAST = {"engine": "normal", "gamma_grid": (1.0,)}


@dataclass(frozen=True)
class Study:
    """One study: a scenario, the ``analyze`` options, a root seed and its acceptance rule.

    ``kind``: "rejection" (share of datasets with p < alpha, inside a two-sided band),
    "floor" (share of rejections at least ``floor``: a known-biased comparator),
    "coverage" (share of headline CIs covering the sample estimand, inside 93-97 %, and
    the mean error within 4 of its SEs), "engines" (Monte Carlo against normal p-values).
    ``band`` maps "reduced" / "full" to ``(m, lo, hi)`` (a study without "reduced" runs only
    on demand). For the misspecified study (c) the band's lower end is not a nominal
    requirement: the linear adjustment is expected to be conservative there, and the lower
    end catches a test that has stopped rejecting.
    """

    name: str
    scenario: str
    root: int
    options: dict
    kind: str
    band: dict
    description: str
    bad: tuple = (0.07,)
    floor: float | None = None
    n: int | None = None  # rows per dataset; None: the scenario's default

    def m(self, size: str) -> int:
        return self.band[size][0]

    def acceptance(self, size: str) -> Band | None:
        m, lo, hi = self.band[size]
        if lo is None:
            return None
        nominal = 1 - ALPHA if self.kind == "coverage" else ALPHA
        return Band(lo, hi, m, nominal, self.bad)


_COVER_BAD = (0.975, 0.91)  # a 97.5 % interval labelled 95 %; an interval too narrow by ~13 %

STUDIES = {s.name: s for s in [
    Study("a_default", "normal_null", 20261, dict(FAST), "rejection",
          {"reduced": (2000, 0.035, 0.065), "full": (5000, 0.040, 0.060)},
          "(a) default test, normal confounder, n = 2,000, sharp null"),
    Study("a_plain", "normal_null", 20261, dict(FAST, statistic="difference"), "floor",
          {"reduced": (300, None, None), "full": (2000, None, None)},
          "(a) plain stratified difference (`statistic='difference'`), same datasets",
          floor=0.15),
    Study("b_default", "mixed_binary_null", 20262, dict(FAST), "rejection",
          {"reduced": (2000, 0.035, 0.065), "full": (5000, 0.040, 0.060)},
          "(b) default test, normal + three-level confounder, binary outcome, n = 3,000"),
    Study("c_default", "exp_null", 20263, dict(FAST), "rejection",
          {"reduced": (1000, 0.010, 0.065), "full": (2000, 0.010, 0.065)},
          "(c) default (linear) adjustment, outcome exp(x), n = 2,000"),
    Study("c_ten_strata", "exp_null", 20263, dict(FAST, n_strata=10), "rejection",
          {"full": (2000, 0.010, 0.065)},
          "(c) as above, `n_strata=10`"),
    Study("c_spline", "exp_null", 20263,
          dict(FAST, formula="bs(x, df=4)", covariates=None), "rejection",
          {"reduced": (1000, 0.030, 0.070), "full": (4000, 0.038, 0.062)},
          "(c) as above, `formula='bs(x, df=4)'` (score model and adjustment)"),
    Study("engines", "normal_null", 20261,
          dict(engine="monte_carlo", resamples=999, seed=7, gamma_grid=(1.0,)), "engines",
          {"reduced": (100, None, None), "full": (500, None, None)},
          "(a)'s first datasets, Monte Carlo engine (B = 999, seed 7) against the normal engine"),
    Study("cover_ate", "heterogeneous", 20264, dict(FAST), "coverage",
          {"reduced": (1000, 0.93, 0.97), "full": (4000, 0.93, 0.97)},
          "coverage of the headline 95 % CI, ATE, heterogeneous effect, n = 1,000",
          bad=_COVER_BAD, n=1000),
    Study("cover_att", "heterogeneous", 20264, dict(FAST, estimand="att"), "coverage",
          {"reduced": (1000, 0.93, 0.97), "full": (4000, 0.93, 0.97)},
          "coverage of the headline 95 % CI, ATT, heterogeneous effect, n = 1,000",
          bad=_COVER_BAD, n=1000),
]}


# ------------------------------------------------------------------------- one dataset
def analyse_dataset(study: Study, index: int) -> dict:
    """Run ``stratagap.analyze`` on dataset ``index`` of ``study``; the figures it needs."""
    import stratagap

    make = SCENARIOS[study.scenario]
    rng = dataset_rng(study.root, index)
    ds = make(rng) if study.n is None else make(rng, n=study.n)
    options = dict(study.options)
    covariates = options.pop("covariates", list(ds.covariates))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # per-dataset warnings are not what is measured
        result = stratagap.analyze(ds.table, exposure="t", outcome="y", covariates=covariates,
                                   **options)
    main, adj = result.tests.main, result.adjusted
    rec = {"p": float(main.p_value), "p_normal": float(main.normal_p_value),
           "est": float(adj.estimate), "ci_low": float(adj.ci_low),
           "ci_high": float(adj.ci_high)}
    if ds.tau is not None:
        # the sample estimand: mean effect over the analysed units (ATE) or analysed exposed
        rows = result.arrays["row_ids"][result.arrays["used"]]
        tau = ds.tau[rows]
        exposed = np.asarray(result.arrays["t"]) == 1
        rec["truth"] = float(tau.mean() if result.spec.estimand == "ate" else tau[exposed].mean())
    return rec


def _job(args):
    name, index = args
    cpu = time.process_time()
    rec = analyse_dataset(STUDIES[name], index)
    rec["cpu"] = time.process_time() - cpu
    return index, rec


def _init_worker():
    os.environ.setdefault("OMP_NUM_THREADS", "1")
    try:  # one BLAS thread per worker: no oversubscription of the cores
        from threadpoolctl import threadpool_limits
        threadpool_limits(1)
    except ImportError:  # pragma: no cover
        pass


def run_study(study: Study, m: int, *, workers: int | None = None) -> list:
    """Per-dataset records of datasets ``0..m-1`` (ordered; independent of ``workers``)."""
    workers = workers or min(2, os.cpu_count() or 1)
    jobs = [(study.name, i) for i in range(m)]
    if workers > 1:
        ctx = multiprocessing.get_context("fork")
        with ctx.Pool(workers, initializer=_init_worker) as pool:
            done = pool.map(_job, jobs, chunksize=max(1, m // (8 * workers)))
    else:
        _init_worker()
        done = [_job(j) for j in jobs]
    done.sort(key=lambda item: item[0])
    return [rec for _, rec in done]


# ------------------------------------------------------------------------- summaries
def summarize(study: Study, records: list, size: str) -> dict:
    """The study's figures and whether they pass its acceptance rule."""
    m = len(records)
    out = {"study": study.name, "description": study.description, "m": m,
           "cpu_seconds": float(sum(r["cpu"] for r in records))}
    if study.kind in ("rejection", "floor"):
        rate = float(np.mean([r["p"] < ALPHA for r in records]))
        out.update(rate=rate, se=binomial_se(rate if 0 < rate < 1 else ALPHA, m))
        if study.kind == "floor":
            out.update(rule=f">= {100 * study.floor:.0f} %", passed=rate >= study.floor)
        else:
            band = study.acceptance(size)
            out.update(rule=band.describe(), passed=band.contains(rate))
    elif study.kind == "coverage":
        est = np.array([r["est"] for r in records])
        truth = np.array([r["truth"] for r in records])
        covered = np.array([r["ci_low"] <= r["truth"] <= r["ci_high"] for r in records])
        cover = float(covered.mean())
        err = est - truth
        bias, bias_se = float(err.mean()), float(err.std(ddof=1) / math.sqrt(m))
        band = study.acceptance(size)
        out.update(rate=cover, se=binomial_se(1 - ALPHA, m), bias=bias, bias_se=bias_se,
                   bias_in_se=bias / bias_se,
                   width=float(np.mean([r["ci_high"] - r["ci_low"] for r in records])),
                   rule=band.describe() + "; |mean error| <= 4 SE",
                   passed=band.contains(cover) and abs(bias) <= 4 * bias_se)
    elif study.kind == "engines":
        out.update(_engines(records, study.options["resamples"]))
    return out


def _engines(records, resamples):
    # The two-sided MC p-value is 2 (b + 1) / (B + 1) for the smaller tail, whose probability
    # is q = p / 2, so its SE is 2 sqrt(q (1 - q) / (B + 1)) (binomial count b). Then
    # z = (p_mc - p_normal) / SE is about N(0, 1): over 100 datasets max |z| > 4 has chance
    # about 100 * 6.3e-5 < 1 %, and the mean z has SE 1 / sqrt(m) (|mean z| < 5 SE).
    p_mc = np.array([r["p"] for r in records])
    p_norm = np.array([r["p_normal"] for r in records])
    m = len(records)
    agree = float(np.mean((p_mc < ALPHA) == (p_norm < ALPHA)))
    q = np.clip(p_norm / 2, 1.0 / (resamples + 1), 0.5)
    se = 2 * np.sqrt(q * (1 - q) / (resamples + 1))
    z = (p_mc - np.minimum(p_norm, 1.0)) / se
    z = np.where((p_mc >= 1.0) & (p_norm > 1 - 2 * se), 0.0, z)  # both capped at 1
    max_z_rule = 4.0 + 0.5 * math.log10(m / 100) if m > 100 else 4.0
    passed = (agree >= 0.95 and np.abs(z).max() <= max_z_rule
              and abs(z.mean()) < 5 / math.sqrt(m) and bool(np.all((p_mc > 0) & (p_mc <= 1))))
    return {"agree": agree, "max_abs_z": float(np.abs(z).max()), "mean_z": float(z.mean()),
            "max_abs_diff": float(np.abs(p_mc - p_norm).max()),
            "rule": (f"decisions agree >= 95 %; max |z| <= {max_z_rule:.2f}; "
                     f"|mean z| < {5 / math.sqrt(m):.2f} (5 SE); 0 < p_mc <= 1"),
            "passed": bool(passed)}
