"""Stratified permutation test: shuffle the exposure labels within strata, keeping group sizes.

Every statistic here is a function of the per-stratum sums ``S_s`` of the value columns over
the exposed units (the sufficient statistics of a within-stratum shuffle), so one engine core
(:func:`null_exposed_sums`) serves them all:

* ``"mean_difference"``: ``T = sum_s w_s (S_s (1/n1_s + 1/n0_s) - R_s / n0_s)``, the
  estimand-weighted difference of exposed and reference means (``R_s`` the stratum total;
  ATE ``w_s = n_s/n``, ATT ``w_s = n1_s/n1``). Linear in the labels; tests the sharp null.
* ``"studentized"``: the same difference divided by ``sqrt(sum_s w_s^2 (s1_s^2/n1_s +
  s0_s^2/n0_s))``; asymptotically valid for the weak null of zero average effect (Wu & Ding
  2021; Chung & Romano 2013). Needs at least 2 units of each group per stratum.
* ``"sum"``: ``T = sum_s S_s``; for a binary outcome the Mantel--Haenszel (CMH) statistic.

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

import contextvars
import hashlib
from dataclasses import dataclass, field

import numpy as np

from ._engines import exact as _exact
from ._engines import monte_carlo as _mc
from ._engines import normal as _normal
from ._checks import (MAX_RESAMPLES, _check_batch, _check_choice, _check_resamples,
                             _clean, _codes, _weights)
from ..errors import InputError
from .._base.rng import check_seed

__all__ = ["PermutationResult", "residualize", "null_exposed_sums", "null_statistics",
           "normal_moments", "stratified_test", "shared_draws", "STATISTICS", "ENGINES",
           "ALTERNATIVES", "MAX_RESAMPLES"]

STATISTICS = ("mean_difference", "studentized", "sum")
ENGINES = ("auto", "exact", "monte_carlo", "normal")
ALTERNATIVES = ("two-sided", "greater", "less")
SHARP_NULL = "sharp null: no effect for any unit"
WEAK_NULL = "weak null: zero average effect (asymptotic)"
#: Relative tolerance for ties between a resampled and the observed statistic (as scipy does).
TIE_RTOL = 1e-13
#: Why the normal engine is never chosen automatically (reported on every result).
NORMAL_NOTE = ("normal engine not chosen automatically: deciding that it cannot change the "
               "conclusion at alpha needs a Berry-Esseen-type bound for sums sampled without "
               "replacement with a stated constant, and none is cited here with confidence; "
               "its p-value is reported beside the chosen engine's (normal_p_value)")
#: Largest array of null sums (bytes) that :func:`shared_draws` keeps; beyond it, no sharing.
SHARED_BYTES = 256 * 2**20

_SHARED = contextvars.ContextVar("stratagap_shared_draws", default=None)


class shared_draws:  # noqa: N801 - used like a function: ``with shared_draws(...):``
    """Within this block, Monte Carlo null sums are computed once per value column and reused.

    The draws of the Monte Carlo engine depend only on the stratum sizes, the exposed counts,
    the seed and the number of resamples; a column's exposed sums depend, besides, only on the
    column's values in the engine's row order (sorted within strata). So a column's null sums
    are keyed by exactly those, and a later call (any statistic, any function of this module)
    that needs the same column gets the same numbers it would have computed: results are
    bit-identical to running the calls separately. ``columns`` (raw rows of ``t``/``labels``)
    and the centred values and squares of ``studentized`` columns (what the studentized
    statistic draws) are drawn together with the first Monte Carlo call on the same ``t`` and
    ``labels``, so one pass over the permutations serves several tests (e.g. the default test,
    its studentized companion and the constant-effect inversion). Arrays above
    ``SHARED_BYTES`` are not kept (the calls then run as usual).

    The object can be entered again later (e.g. around a second stage): its cache lives as
    long as the object.
    """

    def __init__(self, t=None, labels=None, columns=(), studentized=()):
        extra = None
        if t is not None:
            extra = (np.asarray(t), np.asarray(labels),
                     [np.asarray(c, dtype=float) for c in columns],
                     [np.asarray(c, dtype=float) for c in studentized])
        self._state = {"cache": {}, "extra": extra}
        self._tokens = []

    def __enter__(self):
        self._tokens.append(_SHARED.set(self._state))
        return self

    def __exit__(self, *exc):
        _SHARED.reset(self._tokens.pop())
        return False


def _centred(col, codes, n_strata):
    """Centred values and squares of one column within strata (the studentized statistic)."""
    n = np.bincount(codes, minlength=n_strata).astype(float)
    mean_s = np.bincount(codes, weights=col, minlength=n_strata) / n
    c = col - mean_s[codes]  # centring within strata avoids cancellation in s^2
    return np.column_stack([c, c**2])


def _column_keys(plan, v, seed, resamples):
    tail = (plan.n.tobytes() + plan.n1.tobytes()
            + f"|{seed}|{resamples}|{plan.binary}".encode())
    return [hashlib.blake2b(np.ascontiguousarray(v[plan.order, j]).tobytes() + tail,
                            digest_size=20).digest() for j in range(v.shape[1])]


def _batches(v, tk, codes, n_strata, resamples, seed, batch_size, progress, workers, raw):
    """Monte Carlo batches ``(lo, hi, sums (k, S, hi - lo))``; reused under shared_draws."""
    state = _SHARED.get()
    k = v.shape[1]
    if state is None or 8 * (k + 4) * n_strata * resamples > SHARED_BYTES:
        plan = _mc.make_plan(v, tk, codes, n_strata)
        yield from _mc.iter_batches(plan, resamples, seed, batch_size, progress, workers)
        return
    plan = _mc.make_plan(v, tk, codes, n_strata)
    keys = _column_keys(plan, v, seed, resamples)
    cache = state["cache"]
    if not all(key in cache for key in keys):
        extra, full = state["extra"], v
        if (extra is not None and not plan.binary and np.array_equal(extra[0], raw[0])
                and np.array_equal(extra[1], raw[1])):
            keep = raw[2]
            more = [c[keep][:, None] for c in extra[2]]
            more += [_centred(c[keep], codes, n_strata) for c in extra[3]]
            more = np.column_stack([v[:, :0]] + more)
            # a column the request draws anyway is not drawn twice
            more = more[:, [j for j in range(more.shape[1])
                            if not any(np.array_equal(more[:, j], v[:, i])
                                       for i in range(k))]]
            full = np.column_stack([v, more])
            plan = _mc.make_plan(full, tk, codes, n_strata)  # rows sorted by v first: same
        sums = np.empty((full.shape[1], n_strata, resamples))
        for lo, hi, part in _mc.iter_batches(plan, resamples, seed, batch_size, progress,
                                             workers):
            sums[:, :, lo:hi] = part
        for key, j in zip(_column_keys(plan, full, seed, resamples), range(full.shape[1])):
            cache.setdefault(key, sums[j])
    elif progress is not None:
        progress(resamples, resamples)
    yield 0, resamples, np.stack([cache[key] for key in keys])


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
    out = np.empty((v.shape[1], n_strata, resamples))
    for lo, hi, sums in _batches(v, tk, codes, n_strata, resamples, check_seed(seed),
                                 _check_batch(batch_size), progress, workers, (t, labels, keep)):
        out[:, :, lo:hi] = sums
    return out


def _prepare(values, t, labels, estimand, statistic):
    v, tk, codes, n_strata, keep = _clean(values, t, labels, columns_ok=False)
    n = np.bincount(codes, minlength=n_strata).astype(float)
    n1 = np.bincount(codes, weights=tk, minlength=n_strata)
    w = _weights(n, n1, estimand)
    if statistic == "studentized":
        if np.any(n1 < 2) or np.any(n - n1 < 2):
            raise InputError("`statistic` 'studentized' needs at least 2 exposed and 2 "
                             "reference units in every stratum; use 'mean_difference' or "
                             "merge strata")
        v = _centred(v[:, 0], codes, n_strata)
    totals = np.stack([np.bincount(codes, weights=v[:, j], minlength=n_strata)
                       for j in range(v.shape[1])])
    return v, tk, codes, n_strata, _normal.Design(n, n1, w, totals, statistic), keep


def _exposed_sums(v, tk, codes, n_strata):
    return np.stack([np.bincount(codes, weights=v[:, j] * tk, minlength=n_strata)
                     for j in range(v.shape[1])])


def normal_moments(values, t, labels, estimand, statistic="mean_difference"):
    """Mean and variance of the statistic under the within-strata permutation null.

    For ``"mean_difference"`` and ``"sum"`` these are exact (linear statistics:
    ``E S_s = n1_s R_s / n_s``, ``Var S_s = n1_s n0_s / (n_s (n_s - 1)) sum_i (v_i - vbar_s)^2``);
    for ``"studentized"`` the asymptotic N(0, 1) moments ``(0, 1)``.
    """
    _check_choice(statistic, STATISTICS, "statistic")
    v, _, codes, n_strata, design, _ = _prepare(values, t, labels, estimand, statistic)
    return _normal.moments(v, codes, n_strata, design)


def _tail_p(null, observed, weights=None):
    """P(T* >= T_obs), P(T* <= T_obs) with a relative tie tolerance (scipy does the same)."""
    finite = np.isfinite(null)
    scale = max(abs(observed) if np.isfinite(observed) else 0.0,
                float(np.max(np.abs(null[finite]))) if finite.any() else 0.0)
    gamma = TIE_RTOL * scale
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
                    batch_size=None, progress=None, workers=None) -> PermutationResult:
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
    _check_choice(alternative, ALTERNATIVES, "--alternative")
    _check_choice(engine, ENGINES, "engine")
    resamples = _check_resamples(resamples)
    seed = check_seed(seed)
    batch_size = _check_batch(batch_size)
    v, tk, codes, n_strata, design, keep = _prepare(values, t, labels, estimand, statistic)
    observed = float(design.stat(_exposed_sums(v, tk, codes, n_strata)[:, :, None])[0])
    mean, var = _normal.moments(v, codes, n_strata, design)
    npg, npl = _normal.normal_p(observed, mean, var, statistic)
    log_a = _exact.log_assignments(design.n, design.n1)
    n_assign = _exact.n_assignments(design.n, design.n1)
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
        null, weights = _exact.hypergeometric_sum_pmf(design.n, design.totals[0], design.n1)
        null = null.astype(float)
        pg, pl = _tail_p(null, observed, weights)
    elif engine == "exact":
        null = design.stat(_exact.enumerate_exposed_sums(v, tk, codes, n_strata))
        ge, le = _tail_p(null, observed)
        pg, pl = ge / null.size, le / null.size
    else:
        null = np.empty(resamples)
        for lo, hi, sums in _batches(v, tk, codes, n_strata, resamples, seed, batch_size,
                                     progress, workers, (t, labels, keep)):
            null[lo:hi] = design.stat(sums)
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
                    progress=None, workers=None):
    """Mean-difference statistics of several value columns under the SAME shuffles.

    Returns ``(observed (k,), null (k, B))``. Used by the constant-effect inversion: with
    columns ``r_y`` and ``r_t``, ``T(tau0) = T_y - tau0 T_t`` for every shuffle. Column 0's
    null equals :func:`stratified_test`'s Monte Carlo null for the same seed when column 0 has
    no ties within strata (rows are sorted by column 0, then the others).
    """
    v, tk, codes, n_strata, keep = _clean(values, t, labels)
    resamples = _check_resamples(resamples)
    n = np.bincount(codes, minlength=n_strata).astype(float)
    n1 = np.bincount(codes, weights=tk, minlength=n_strata)
    w = _weights(n, n1, estimand)
    totals = np.stack([np.bincount(codes, weights=v[:, j], minlength=n_strata)
                       for j in range(v.shape[1])])
    designs = [_normal.Design(n, n1, w, totals[j:j + 1], "mean_difference")
               for j in range(v.shape[1])]
    obs_sums = _exposed_sums(v, tk, codes, n_strata)
    observed = np.array([d.stat(obs_sums[j:j + 1, :, None])[0] for j, d in enumerate(designs)])
    null = np.empty((v.shape[1], resamples))
    for lo, hi, sums in _batches(v, tk, codes, n_strata, resamples, check_seed(seed),
                                 _check_batch(batch_size), progress, workers, (t, labels, keep)):
        for j, d in enumerate(designs):
            null[j, lo:hi] = d.stat(sums[j:j + 1])
    return observed, null
