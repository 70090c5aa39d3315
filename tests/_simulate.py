"""Simulation set-ups shared by the calibration studies (tests/test_calibration.py).

Every study runs at *stage level* (score -> overlap -> strata -> residualize -> test /
headline estimate), the same calls `stratagap.pipeline` makes, without the reporting layers, so
that 2,000 datasets per study fit the CI budget. Dataset ``i`` of a study with root seed ``root``
is drawn from ``numpy.random.SeedSequence(root).spawn(...)[i]`` (built directly with
``spawn_key=(i,)``), so any single dataset can be regenerated and rerun on its own::

    from tests._simulate import dataset_rng, normal_null, analyse
    sim = normal_null(dataset_rng(20261, 17), n=2000)
    analyse(sim)

The scenarios are the confounded nulls of issues 2 and 5 and a non-null heterogeneous effect:

* :func:`normal_null`: x ~ N(0, 1), P(exposed) = expit(0.8 x), y = x + N(0, 1), no effect.
* :func:`mixed_binary_null`: a normal and a three-level confounder, binary outcome from a
  logistic model that does not involve the exposure.
* :func:`exp_null`: as :func:`normal_null` but y = exp(x) + N(0, 1) (the linear covariance
  adjustment is misspecified).
* :func:`heterogeneous_effect`: as :func:`normal_null` but y = x + t * (1 + 0.5 x) + N(0, 1), so
  the individual effect varies with the confounder and the ATE and ATT differ.
"""

from __future__ import annotations

import multiprocessing
import os
import warnings
from dataclasses import dataclass

import numpy as np
from scipy.special import expit

from stratagap.estimation import effects
from stratagap.stratify import overlap, scores, strata
from stratagap.inference import permutation

__all__ = ["Sim", "dataset_rng", "normal_null", "mixed_binary_null", "exp_null",
           "heterogeneous_effect", "spline_design", "propensity", "analyse", "run_study"]


@dataclass
class Sim:
    """One simulated dataset: outcome, exposure, covariates and (if any) individual effects."""

    y: np.ndarray
    t: np.ndarray
    X: np.ndarray
    names: list
    tau: np.ndarray | None = None  # individual effects y(1) - y(0); None under the sharp null


def dataset_rng(root: int, index: int) -> np.random.Generator:
    """Generator of dataset ``index`` of a study: child ``index`` of ``SeedSequence(root)``."""
    return np.random.default_rng(np.random.SeedSequence(entropy=root, spawn_key=(index,)))


def _exposure(rng, linear):
    return (rng.random(linear.shape[0]) < expit(linear)).astype(np.int8)


def normal_null(rng, n=2000) -> Sim:
    """Issue 2's confounded null: logit coefficient 0.8, outcome = confounder + noise."""
    x = rng.standard_normal(n)
    t = _exposure(rng, 0.8 * x)
    y = x + rng.standard_normal(n)
    return Sim(y=y, t=t, X=x[:, None], names=["x"])


def mixed_binary_null(rng, n=3000) -> Sim:
    """A normal and a three-level confounder (two dummies); binary outcome, no exposure effect.

    P(exposed) = expit(-0.3 + 0.8 x + 0.5 [g=1] + 1.0 [g=2]);
    P(y = 1)   = expit(-0.5 + 0.8 x + 0.6 [g=1] - 0.7 [g=2]).
    """
    x = rng.standard_normal(n)
    g = rng.choice(3, size=n, p=[0.4, 0.35, 0.25])
    d1, d2 = (g == 1).astype(float), (g == 2).astype(float)
    t = _exposure(rng, -0.3 + 0.8 * x + 0.5 * d1 + 1.0 * d2)
    y = (rng.random(n) < expit(-0.5 + 0.8 * x + 0.6 * d1 - 0.7 * d2)).astype(float)
    return Sim(y=y, t=t, X=np.column_stack([x, d1, d2]), names=["x", "g[1]", "g[2]"])


def exp_null(rng, n=2000) -> Sim:
    """Misspecified confounded null: outcome = exp(confounder) + noise, adjusted linearly."""
    x = rng.standard_normal(n)
    t = _exposure(rng, 0.8 * x)
    y = np.exp(x) + rng.standard_normal(n)
    return Sim(y=y, t=t, X=x[:, None], names=["x"])


def heterogeneous_effect(rng, n=2000) -> Sim:
    """Confounded, heterogeneous effect: tau_i = 1 + 0.5 x_i (population ATE 1, ATT > 1)."""
    x = rng.standard_normal(n)
    t = _exposure(rng, 0.8 * x)
    tau = 1.0 + 0.5 * x
    y = x + t * tau + rng.standard_normal(n)
    return Sim(y=y, t=t, X=x[:, None], names=["x"], tau=tau)


def spline_design(sim: Sim, df: int = 4) -> Sim:
    """Replace the single covariate by a cubic B-spline basis of it (formula ``bs(x, df=4)``).

    This is what ``--formula 'bs(x, df=4)'`` gives the pipeline: the basis feeds both the score
    model and the covariance adjustment.
    """
    from formulaic import model_matrix
    import pandas as pd

    mm = model_matrix(f"bs(x, df={df})", pd.DataFrame({"x": sim.X[:, 0]}))
    cols = [c for c in mm.columns if c != "Intercept"]
    return Sim(y=sim.y, t=sim.t, X=np.asarray(mm[cols], dtype=float), names=cols, tau=sim.tau)


def propensity(sim: Sim):
    """The default score model (main-effects logistic regression) of one dataset."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return scores.fit_propensity(sim.X, sim.t, sim.names, seed=0)


def analyse(sim: Sim, *, estimand="ate", n_strata=5, engine="normal", resamples=999, seed=0,
            plain=False, estimate=False, alpha=0.05, fit=None) -> dict:
    """The default analysis of one dataset at stage level.

    Returns a dict with ``p`` (the default test: covariance-adjusted, estimand-weighted,
    two-sided), optionally ``p_plain`` (unadjusted stratified difference in means) and, with
    ``estimate=True``, the headline estimate ``est``, ``ci_low``, ``ci_high`` and the sample
    estimand ``truth`` (mean individual effect among analysed units: all of them for the ATE,
    the analysed exposed ones for the ATT).
    """
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # per-dataset warnings are not what is being measured
        fit = scores.fit_propensity(sim.X, sim.t, sim.names, seed=0)
        ov = overlap.apply_overlap(fit.score, sim.t, estimand=estimand)
        keep = np.flatnonzero(np.asarray(ov.keep, dtype=bool))
        st = strata.make_strata(fit.score[keep], sim.t[keep], estimand=estimand,
                                n_strata=n_strata, logit=fit.logit[keep])
        lab = np.asarray(st.labels)
        used = keep[lab >= 0]
        lab = lab[lab >= 0]
        y, t, X = sim.y[used], sim.t[used], sim.X[used]
        r = permutation.residualize(y, X, lab)  # Rosenbaum 2002: covariates only, never t
        common = dict(estimand=estimand, alternative="two-sided", engine=engine,
                      resamples=resamples, seed=seed)
        test = permutation.stratified_test(r, t, lab, statistic="mean_difference", **common)
        out = {"p": float(test.p_value), "p_normal": float(test.normal_p_value)}
        if engine == "monte_carlo":
            out["mc_se"] = float(test.mc_se)
        if plain:
            out["p_plain"] = float(permutation.stratified_test(
                y, t, lab, statistic="mean_difference", **common).p_value)
        if estimate:
            e = effects.stratified_regression(y, t, X, lab, estimand=estimand, alpha=alpha)
            tau = sim.tau[used]
            truth = tau.mean() if estimand == "ate" else tau[t == 1].mean()
            out.update(est=float(e.estimate), ci_low=float(e.ci_low), ci_high=float(e.ci_high),
                       truth=float(truth))
    return out


# ------------------------------------------------------------------------------ running
DESIGNS = {None: lambda sim: sim, "spline": spline_design}


def _one(job):
    scenario, root, index, variants = job
    base = scenario(dataset_rng(root, index))
    cache, results = {}, {}
    for name, kw in variants.items():
        kw = dict(kw)
        design = kw.pop("design", None)
        if design not in cache:  # one score fit per design, shared by the variants using it
            sim = DESIGNS[design](base)
            cache[design] = (sim, propensity(sim))
        sim, fit = cache[design]
        results[name] = analyse(sim, fit=fit, **kw)
    return index, results


def _init_worker():
    # One BLAS thread per worker process: two workers on two cores, no oversubscription.
    try:
        from threadpoolctl import threadpool_limits
        threadpool_limits(1)
    except ImportError:  # pragma: no cover
        pass


def run_study(scenario, root, n_datasets, variants, *, workers=None):
    """Run ``analyse(sim, **variants[name])`` for every dataset and variant.

    A variant may carry ``design="spline"`` to analyse :func:`spline_design` of the dataset.

    Returns ``{name: list of per-dataset dicts}`` ordered by dataset index. Datasets are
    independent of the number of workers (each has its own seed), so results are too.
    """
    workers = workers or min(2, os.cpu_count() or 1)
    jobs = [(scenario, root, i, variants) for i in range(n_datasets)]
    if workers > 1:
        ctx = multiprocessing.get_context("fork")
        with ctx.Pool(workers, initializer=_init_worker) as pool:
            done = pool.map(_one, jobs, chunksize=max(1, n_datasets // (8 * workers)))
    else:
        done = [_one(j) for j in jobs]
    done.sort(key=lambda item: item[0])
    return {name: [res[name] for _, res in done] for name in variants}
