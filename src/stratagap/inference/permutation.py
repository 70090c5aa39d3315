"""Stratified permutation test: shuffle the exposure labels within strata, keeping group sizes.

Every statistic here is a function of the per-stratum sums ``S_s`` of the value columns over
the exposed units (the sufficient statistics of a within-stratum shuffle), so one engine core
(:func:`null_exposed_sums`) serves them all. The statistics (``"mean_difference"``, the
default; ``"studentized"``, for the weak null, Wu & Ding 2021, Chung & Romano 2013; ``"sum"``,
the Mantel--Haenszel statistic for a binary outcome), their permutation moments and the tie
rule live in :mod:`stratagap.inference.statistic`; the stratum sizes and estimand weights in
the :class:`~stratagap._base.layout.StratumLayout`; the shared Monte Carlo draws in
:mod:`stratagap.inference.draws`.

Engines: ``"exact"`` (enumeration of all assignments when there are few, or the exact
convolution of hypergeometrics for the binary sum), ``"monte_carlo"`` (see
:mod:`stratagap.inference._engines.monte_carlo`), ``"normal"`` (normal approximation with the exact permutation
mean and variance). The normal p-values are always reported beside the chosen engine's.

References
----------
Rosenbaum, P. R. (2002). Covariance adjustment in randomized experiments and observational
studies. Statistical Science 17:286-327.
Phipson, B. & Smyth, G. K. (2010). Permutation p-values should never be zero. Statistical
Applications in Genetics and Molecular Biology 9(1), article 39.
Wu, J. & Ding, P. (2021). Randomization tests for weak null hypotheses in randomized
experiments. Journal of the American Statistical Association 116:1898-1913.
Chung, E. & Romano, J. P. (2013). Exact and asymptotically robust permutation tests. Annals of
Statistics 41:484-507.
Mantel, N. & Haenszel, W. (1959). JNCI 22:719-748.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from ._engines import exact as _exact
from ._engines import normal as _normal
from ._checks import (MAX_RESAMPLES, _check_batch, _check_choice, _check_estimand,
                      _check_resamples, _clean, _codes)
from .draws import SharedDraws, mc_batches, shared_draws
from .statistic import STATISTICS, TIE_RTOL, Statistic, studentized_columns, tie_tolerance
from ..errors import InputError
from .._base.layout import StratumLayout, layout_for
from .._base.rng import check_seed

__all__ = ["PermutationResult", "residualize", "null_exposed_sums", "null_statistics",
           "normal_moments", "stratified_test", "shared_draws", "SharedDraws", "STATISTICS",
           "ENGINES", "ALTERNATIVES", "MAX_RESAMPLES", "TIE_RTOL"]

ENGINES = ("auto", "exact", "monte_carlo", "normal")
ALTERNATIVES = ("two-sided", "greater", "less")
SHARP_NULL = "sharp null: no effect for any unit"
WEAK_NULL = "weak null: zero average effect (asymptotic)"
#: Why the normal engine is never chosen automatically (reported on every result).
NORMAL_NOTE = ("normal engine not chosen automatically: deciding that it cannot change the "
               "conclusion at alpha needs a Berry-Esseen-type bound for sums sampled without "
               "replacement with a stated constant, and none is cited here with confidence; "
               "its p-value is reported beside the chosen engine's (normal_p_value)")

def residualize(y, X, labels) -> np.ndarray:
    """Residuals of ``y`` on ``X`` with stratum fixed effects (never uses the exposure).

    Least squares on within-stratum demeaned ``y`` and ``X`` (the fixed-effects / within
    estimator, identical to OLS with one dummy per stratum); ``numpy.linalg.lstsq`` so a
    rank-deficient ``X`` is fine (minimum-norm coefficients, same residuals).

    Parameters
    ----------
    y : (n,) float array
    X : (n, p) float array, no intercept column (p may be 0)
    labels : (n,) int array of stratum labels; rows with -1 are ignored

    Returns
    -------
    r : (n,) float array; NaN in rows with label -1.

    References
    ----------
    Rosenbaum (2002), Statistical Science 17:286, section 2 (permuting covariance-adjusted
    residuals keeps the test exact for the sharp null, since they do not depend on the labels).
    """
    y = np.asarray(y, dtype=float)
    labels = np.asarray(labels)
    X = np.asarray(X, dtype=float).reshape(y.size, -1)
    if labels.shape != y.shape:
        raise InputError(f"`labels` must have shape {y.shape} like `y`, got {labels.shape}")
    keep = labels >= 0
    _, codes = _codes(labels[keep])
    n_s = np.bincount(codes)

    def demean(a):
        means = np.stack([np.bincount(codes, weights=col) for col in a.T], axis=1) / n_s[:, None]
        return a - means[codes]

    yk = demean(y[keep, None])[:, 0]  # within-stratum demeaning = stratum fixed effects
    r = np.full(y.size, np.nan)
    if X.shape[1]:
        Xk = demean(X[keep])
        beta = np.linalg.lstsq(Xk, yk, rcond=None)[0]
        yk = yk - Xk @ beta
    r[keep] = yk
    return r


def null_exposed_sums(values, t, labels, resamples, seed, batch_size=None, progress=None,
                      workers=None) -> np.ndarray:
    """Per-stratum exposed sums of each value column under within-stratum shuffles.

    Returns an array ``(k, S, B)``: ``out[j, s, b]`` is the sum of ``values[:, j]`` over the
    units of stratum ``s`` that resample ``b`` labels exposed (strata in the order of their
    sorted labels; rows with label -1 ignored). Identical for every ``batch_size`` and
    ``workers``; memory: see :mod:`stratagap.inference._engines.monte_carlo`.
    """
    v, tk, codes, n_strata, keep = _clean(values, t, labels)
    resamples = _check_resamples(resamples)
    layout = StratumLayout.from_codes(codes, tk, "ate", n_strata=n_strata)  # sizes only
    out = np.empty((v.shape[1], n_strata, resamples))
    for lo, hi, sums in mc_batches(v, tk, layout, resamples, check_seed(seed),
                                 _check_batch(batch_size), progress, workers, (t, labels, keep),
                                 None):
        out[:, :, lo:hi] = sums
    return out


def _layout(layout, codes, n_strata, tk, estimand):
    """The given layout of the analysed rows (checked), or one built from their codes."""
    if layout is None:
        return StratumLayout.from_codes(codes, tk, estimand, n_strata=n_strata)
    return layout_for(layout, codes, tk, estimand, n_strata=n_strata)


def _prepare(values, t, labels, estimand, statistic, layout=None):
    v, tk, codes, n_strata, keep = _clean(values, t, labels, columns_ok=False)
    layout = _layout(layout, codes, n_strata, tk, _check_estimand(estimand))
    if statistic == "studentized":
        if np.any(layout.n1 < 2) or np.any(layout.n0 < 2):
            raise InputError("`statistic` 'studentized' needs at least 2 exposed and 2 "
                             "reference units in every stratum; use 'mean_difference' or "
                             "merge strata")
        v = studentized_columns(v[:, 0], layout)
    return v, tk, layout, Statistic.of(statistic, layout, v), keep


def normal_moments(values, t, labels, estimand, statistic="mean_difference"):
    """Mean and variance of the statistic under the within-strata permutation null.

    For ``"mean_difference"`` and ``"sum"`` these are exact (linear statistics:
    ``E S_s = n1_s R_s / n_s``, ``Var S_s = n1_s n0_s / (n_s (n_s - 1)) sum_i (v_i - vbar_s)^2``);
    for ``"studentized"`` the asymptotic N(0, 1) moments ``(0, 1)``. See
    :mod:`stratagap.inference.statistic`.
    """
    _check_choice(statistic, STATISTICS, "statistic")
    v, _, _, stat, _ = _prepare(values, t, labels, estimand, statistic)
    return stat.null_moments(v)


def _tail_p(null, observed, weights=None):
    """P(T* >= T_obs), P(T* <= T_obs) with a relative tie tolerance (scipy does the same)."""
    gamma = tie_tolerance(observed, null)
    ge, le = null >= observed - gamma, null <= observed + gamma
    if weights is None:
        return int(ge.sum()), int(le.sum())
    return float(weights[ge].sum()), float(weights[le].sum())


def _two_sided(pg, pl):
    return min(1.0, 2.0 * min(pg, pl))


def _summary(null, weights):
    """Quantiles (and mean, sd) of a null distribution for JSON (the array itself is not kept)."""
    if null is None or null.size == 0:
        return None
    qs = (0.001, 0.01, 0.025, 0.05, 0.25, 0.5, 0.75, 0.95, 0.975, 0.99, 0.999)
    finite = np.isfinite(null)
    x = null[finite]
    if weights is None:
        w = np.ones(x.size) / max(x.size, 1)
    else:
        w = weights[finite] / weights[finite].sum()
    order = np.argsort(x, kind="stable")
    cw = np.cumsum(w[order])
    quant = {f"q{q:g}": float(x[order][min(np.searchsorted(cw, q - 1e-12), x.size - 1)])
             for q in qs}
    mean = float(np.sum(w * x))
    return {"n": int(null.size), "mean": mean, "sd": float(np.sqrt(np.sum(w * (x - mean) ** 2))),
            "quantiles": quant}


def _num(x):
    if x is None:
        return None
    x = float(x)
    return x if np.isfinite(x) else None


@dataclass(frozen=True)
class PermutationResult:
    """Result of :func:`stratified_test`.

    ``null_distribution`` holds the resampled (or enumerated) statistics; with
    ``null_weights`` (exact convolution) it is the support and the weights its probabilities.
    ``to_dict()`` gives only a summary of it.
    """

    statistic: float
    p_value: float
    p_greater: float
    p_less: float
    mc_se: float | None
    engine: str
    resamples: int
    seed: int
    null: str
    n_assignments: float | None
    log10_assignments: float
    normal_p_value: float
    normal_p_greater: float
    normal_p_less: float
    normal_mean: float
    normal_variance: float
    statistic_name: str
    alternative: str
    estimand: str
    batch_size: int | None
    exact: bool
    engine_reason: str
    null_distribution: np.ndarray = field(repr=False)
    null_weights: np.ndarray | None = field(default=None, repr=False)
    engine_note: str = ""

    def to_dict(self) -> dict:
        d = {}
        for name in ("statistic", "p_value", "p_greater", "p_less", "mc_se", "n_assignments",
                     "log10_assignments", "normal_p_value", "normal_p_greater", "normal_p_less",
                     "normal_mean", "normal_variance"):
            d[name] = _num(getattr(self, name))
        for name in ("engine", "null", "statistic_name", "alternative", "estimand",
                     "engine_reason", "engine_note"):
            d[name] = str(getattr(self, name))
        d["resamples"] = int(self.resamples)
        d["seed"] = int(self.seed)
        d["batch_size"] = None if self.batch_size is None else int(self.batch_size)
        d["exact"] = bool(self.exact)
        d["null_summary"] = _summary(self.null_distribution, self.null_weights)
        return d


def _pick(alternative, pg, pl):
    if alternative == "greater":
        return pg
    if alternative == "less":
        return pl
    return _two_sided(pg, pl)


def stratified_test(values, t, labels, *, estimand, statistic="mean_difference",
                    alternative="two-sided", engine="auto", resamples=10000, seed=0,
                    batch_size=None, progress=None, workers=None, draws=None,
                    layout=None) -> PermutationResult:
    """Stratified permutation test of the labels' association with ``values``.

    Parameters
    ----------
    values : (n,) float array (e.g. covariance-adjusted residuals from :func:`residualize`)
    t : (n,) 0/1 exposure labels
    labels : (n,) int stratum labels; -1 rows are ignored
    estimand : "ate" or "att" (stratum weights of the mean differences)
    statistic : "mean_difference" (default), "studentized" or "sum"
    alternative : "two-sided" (default; ``min(1, 2 min(p_greater, p_less))``), "greater", "less"
    engine : "auto" (exact when the binary sum's convolution applies or there are at most
        ``resamples`` assignments, else Monte Carlo), "exact", "monte_carlo" or "normal"
    resamples : int, 1 to 10,000,000 (Monte Carlo resamples)
    seed : non-negative int
    batch_size : resamples per batch (None: a 32 MiB budget for the sums); results do not
        depend on it
    progress : optional callable ``progress(n_done, n_total)`` called after each batch
    workers : threads drawing blocks of resamples (None: 1; at most the CPU count); results
        do not depend on it
    draws : :class:`SharedDraws` or None
        Monte Carlo null sums shared with other calls (:func:`shared_draws`); results are
        bit-identical to a call without it
    layout : :class:`stratagap._base.layout.StratumLayout` or None
        The stratum layout of the analysed rows (labels >= 0) for ``estimand``, when the caller
        has built it already; None builds it here

    Returns
    -------
    PermutationResult

    Notes
    -----
    Monte Carlo p-values are ``(b + 1) / (B + 1)`` with ``b`` the resamples at least as extreme
    (Phipson & Smyth 2010), with standard error ``sqrt(p (1 - p) / B)``. Ties with the observed
    statistic are counted within a relative tolerance of 1e-13.

    References
    ----------
    See the module docstring.
    """
    _check_choice(statistic, STATISTICS, "statistic")
    _check_choice(alternative, ALTERNATIVES, "alternative")
    _check_choice(engine, ENGINES, "engine")
    resamples = _check_resamples(resamples)
    seed = check_seed(seed)
    batch_size = _check_batch(batch_size)
    v, tk, layout, stat, keep = _prepare(values, t, labels, estimand, statistic, layout)
    codes, n_strata = layout.codes, layout.n_strata
    observed = float(stat(layout.exposed_sums(v, tk)[:, :, None])[0])
    mean, var = stat.null_moments(v)
    npg, npl = _normal.normal_p(observed, mean, var, statistic)
    log_a = _exact.log_assignments(layout.n, layout.n1)
    n_assign = _exact.n_assignments(layout.n, layout.n1)
    binary_sum = statistic == "sum" and bool(np.all((v == 0) | (v == 1)))
    small = n_assign is not None and n_assign <= _exact.MAX_ASSIGNMENTS
    if engine == "auto":
        if binary_sum:
            engine, reason = "exact", "binary outcome with the sum statistic: exact convolution"
        elif small and n_assign <= resamples:
            engine, reason = "exact", f"{n_assign} assignments <= {resamples} resamples"
        else:
            engine, reason = "monte_carlo", "more assignments than resamples"
    elif engine == "exact" and not (binary_sum or small):
        raise InputError(f"`engine` 'exact' needs at most {_exact.MAX_ASSIGNMENTS:,} "
                         f"within-strata assignments (here about 10^{log_a / np.log(10):.1f}); "
                         "use engine 'monte_carlo' or 'auto'")
    else:
        reason = "requested"
    weights, mc_se, exact = None, None, engine == "exact"
    if engine == "normal":
        null = np.empty(0)
        pg, pl = npg, npl
    elif engine == "exact" and binary_sum:
        null, weights = _exact.hypergeometric_sum_pmf(layout.n, stat.totals[0], layout.n1)
        null = null.astype(float)
        pg, pl = _tail_p(null, observed, weights)
    elif engine == "exact":
        null = stat(_exact.enumerate_exposed_sums(v, tk, codes, n_strata))
        ge, le = _tail_p(null, observed)
        pg, pl = ge / null.size, le / null.size
    else:
        null = np.empty(resamples)
        for lo, hi, sums in mc_batches(v, tk, layout, resamples, seed, batch_size,
                                     progress, workers, (t, labels, keep), draws):
            null[lo:hi] = stat(sums)
        ge, le = _tail_p(null, observed)
        pg, pl = (ge + 1) / (resamples + 1), (le + 1) / (resamples + 1)  # Phipson & Smyth 2010
    p = _pick(alternative, pg, pl)
    if engine == "monte_carlo":
        mc_se = float(np.sqrt(p * (1 - p) / resamples))  # binomial MC standard error
    return PermutationResult(
        statistic=observed, p_value=float(p), p_greater=float(pg), p_less=float(pl),
        mc_se=mc_se, engine=engine, resamples=resamples, seed=seed,
        null=WEAK_NULL if statistic == "studentized" else SHARP_NULL,
        n_assignments=None if n_assign is None else float(n_assign),
        log10_assignments=log_a / np.log(10), normal_p_value=_pick(alternative, npg, npl),
        normal_p_greater=npg, normal_p_less=npl, normal_mean=mean, normal_variance=var,
        statistic_name=statistic, alternative=alternative, estimand=estimand,
        batch_size=batch_size, exact=exact, engine_reason=reason,
        null_distribution=null, null_weights=weights,
        engine_note="normal engine requested" if engine == "normal" else NORMAL_NOTE)


def null_statistics(values, t, labels, *, estimand, resamples, seed, batch_size=None,
                    progress=None, workers=None, draws=None, layout=None):
    """Mean-difference statistics of several value columns under the SAME shuffles.

    Returns ``(observed (k,), null (k, B))``. Used by the constant-effect inversion: with
    columns ``r_y`` and ``r_t``, ``T(tau0) = T_y - tau0 T_t`` for every shuffle. Column 0's
    null equals :func:`stratified_test`'s Monte Carlo null for the same seed when column 0 has
    no ties within strata (rows are sorted by column 0, then the others). ``draws`` and
    ``layout`` as for :func:`stratified_test`.
    """
    v, tk, codes, n_strata, keep = _clean(values, t, labels)
    resamples = _check_resamples(resamples)
    layout = _layout(layout, codes, n_strata, tk, _check_estimand(estimand))
    totals = layout.totals(v)
    stats = [Statistic("mean_difference", layout, totals[j:j + 1]) for j in range(v.shape[1])]
    obs_sums = layout.exposed_sums(v, tk)
    observed = np.array([st(obs_sums[j:j + 1, :, None])[0] for j, st in enumerate(stats)])
    null = np.empty((v.shape[1], resamples))
    for lo, hi, sums in mc_batches(v, tk, layout, resamples, check_seed(seed),
                                 _check_batch(batch_size), progress, workers, (t, labels, keep),
                                 draws):
        for j, st in enumerate(stats):
            null[j, lo:hi] = st(sums[j:j + 1])
    return observed, null
