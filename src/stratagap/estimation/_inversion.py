"""The constant additive effect by inverting the covariance-adjusted stratified permutation test.

Private helper behind :func:`stratagap.estimation.effects.constant_effect`.

Under the hypothesis ``H(tau0): y_i(1) - y_i(0) = tau0`` for every unit, ``y - tau0 t`` is the
outcome every unit would show without exposure, fixed under within-stratum shuffles. The test
statistic is the estimand-weighted stratified difference of mean residuals of ``y - tau0 t``
on the covariates with stratum fixed effects (Rosenbaum 2002). Residualizing is linear, so the
residuals are ``r_y - tau0 r_t`` with ``r_y = residualize(y)`` and ``r_t = residualize(t)``,
and the statistic of any assignment ``z`` is linear in ``tau0``:

    T_z(tau0) = T_z(r_y) - tau0 T_z(r_t).

One set of shuffles (the sums of both residual columns over the shuffled exposed units, from the
engine of :mod:`stratagap.inference.permutation`) therefore serves every ``tau0``. The p-value is two-sided,
``min(1, 2 min(P(T* >= T), P(T* <= T)))`` with Monte Carlo p-values ``(b + 1)/(B + 1)``
(Phipson & Smyth 2010), as in the core test, so ``p(0)`` is the core test's p-value.

Point estimate: the ``tau0`` at which the observed statistic equals the centre of its
permutation null (0 for a difference of means), ``T(r_y) / T(r_t)`` (Hodges & Lehmann 1963
type). Confidence set: ``{tau0 : p(tau0) > alpha}``; the p-value function need not be monotone,
so the set is reported by its convex hull and ``is_interval`` says whether the accepted grid
points were contiguous. Its ends are found on a grid and refined by bisection.

Normal engine: the permutation mean of ``T(tau0)`` is 0 and its permutation variance is the
quadratic ``V_yy - 2 tau0 V_yt + tau0^2 V_tt`` in ``tau0`` (the exact permutation moments of a
linear statistic), so the accepted set solves ``T(tau0)^2 < z^2 V(tau0)``: a quadratic
inequality, solved in closed form.

References
----------
Rosenbaum, P. R. (2002). Covariance adjustment in randomized experiments and observational
studies. Statistical Science 17, 286-327.
Hodges, J. L. & Lehmann, E. L. (1963). Estimates of location based on rank tests. Annals of
Mathematical Statistics 34, 598-611.
Phipson, B. & Smyth, G. K. (2010). Permutation p-values should never be zero. Statistical
Applications in Genetics and Molecular Biology 9, article 39.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import asdict, dataclass, field

import numpy as np
from scipy import stats

from ..errors import InputError, ModelWarning
from .._base.rng import check_seed
from .._base.jsonable import jsonable

#: Grid points used to locate the accepted set before bisection.
GRID = 801
#: Points of the p-value function returned for a figure.
CURVE = 201


@dataclass(frozen=True)
class ConstantEffect:
    """Constant additive effect from the inverted covariance-adjusted permutation test.

    ``se`` is approximate: the permutation SD of the statistic at the estimate divided by
    ``|T(r_t)|``. ``ci_low``/``ci_high`` are the convex hull of ``{tau0 : p(tau0) > alpha}``
    (+-inf when unbounded); ``is_interval`` is False when that set is not an interval.
    ``curve_tau``/``curve_p``: the p-value function for a figure. ``p_value_at_zero`` equals the
    core test's two-sided p-value with the same seed and engine.
    """

    estimate: float
    se: float
    ci_low: float
    ci_high: float
    is_interval: bool
    measure: str
    estimand: str
    population: str
    method: str
    alpha: float
    engine: str
    resamples: int
    seed: int
    p_value_at_zero: float
    statistic_outcome: float
    statistic_exposure: float
    curve_tau: list = field(default_factory=list)
    curve_p: list = field(default_factory=list)

    def to_dict(self) -> dict:
        return jsonable(asdict(self))


# --------------------------------------------------------------------------- statistic
def _layout(t, labels, estimand):
    ids, codes = np.unique(labels, return_inverse=True)
    S = len(ids)
    n = np.bincount(codes, minlength=S).astype(float)
    n1 = np.bincount(codes, weights=t, minlength=S)
    n0 = n - n1
    w = n / n.sum() if estimand == "ate" else n1 / n1.sum()  # estimand stratum weights
    return codes, n, n1, n0, w


def _stat_from_sums(E, totals, n1, n0, w):
    """Stratified difference of means from exposed sums ``E`` (S, ...) and totals (S,)."""
    shape = (-1,) + (1,) * (E.ndim - 1)
    n1, n0, w, R = (a.reshape(shape) for a in (n1, n0, w, totals))
    # same arithmetic as the core test (mean1 - mean0 = E (1/n1 + 1/n0) - R/n0), so p(0) matches
    return (w * (E * (1 / n1 + 1 / n0) - R / n0)).sum(axis=0)


def _perm_moments(v, codes, n, n1, n0, w):
    """Permutation variance/covariance matrix of the statistic for the columns of ``v``.

    Per stratum, the exposed mean minus the reference mean under a random ``n1``-subset has
    covariance ``n_s / (n1_s n0_s) S_s(j, l)`` with ``S_s`` the sample covariance (divisor
    ``n_s - 1``) of the stratum's values (sampling without replacement).
    """
    k = v.shape[1]
    V = np.zeros((k, k))
    for s in range(len(n)):
        vs = v[codes == s]
        if n[s] < 2:
            continue
        c = np.atleast_2d(np.cov(vs, rowvar=False, ddof=1))
        V += w[s] ** 2 * n[s] / (n1[s] * n0[s]) * c
    return V


# --------------------------------------------------------------------------- p-value function
def _p_two_sided(A, C, a_null, c_null, tau, tie):
    """Two-sided MC p-values at each ``tau`` (array) from null intercepts/slopes."""
    tau = np.atleast_1d(np.asarray(tau, dtype=float))
    B = a_null.size
    out = np.empty(tau.size)
    chunk = max(1, 2_000_000 // max(B, 1))
    for lo in range(0, tau.size, chunk):
        tt = tau[lo:lo + chunk, None]
        obs = A - tt * C
        null = a_null[None, :] - tt * c_null[None, :]
        gamma = tie(obs, null)
        ge = np.sum(null >= obs - gamma, axis=1)
        le = np.sum(null <= obs + gamma, axis=1)
        p_ge, p_le = (ge + 1) / (B + 1), (le + 1) / (B + 1)  # Phipson & Smyth 2010
        out[lo:lo + chunk] = np.minimum(1.0, 2 * np.minimum(p_ge, p_le))
    return out


def _p_two_sided_exact(A, C, a_null, c_null, tau, tie):
    """Two-sided exact p-values over all ``m`` equally likely enumerated assignments.

    Counts are divided once (``count / m``), so a p-value equal to alpha is not pushed across
    it by summing ``m`` rounded probabilities.
    """
    tau = np.atleast_1d(np.asarray(tau, dtype=float))
    m = a_null.size
    out = np.empty(tau.size)
    for i, tt in enumerate(tau):
        obs = A - tt * C
        null = a_null - tt * c_null
        gamma = tie(np.atleast_1d(obs), null[None, :])[0, 0]
        p_ge = np.count_nonzero(null >= obs - gamma) / m
        p_le = np.count_nonzero(null <= obs + gamma) / m
        out[i] = min(1.0, 2 * min(p_ge, p_le))
    return out


def _p_normal(A, C, V, tau):
    tau = np.atleast_1d(np.asarray(tau, dtype=float))
    var = V[0, 0] - 2 * tau * V[0, 1] + tau ** 2 * V[1, 1]
    with np.errstate(divide="ignore", invalid="ignore"):
        z = (A - tau * C) / np.sqrt(var)
    return np.where(var > 0, 2 * stats.norm.sf(np.abs(z)), np.where(A - tau * C == 0, 1.0, 0.0))


def _normal_set(A, C, V, alpha):
    """Closed-form accepted set of the normal engine: (lo, hi, is_interval)."""
    z2 = stats.norm.ppf(1 - alpha / 2) ** 2
    a2 = C * C - z2 * V[1, 1]
    a1 = -2 * (A * C - z2 * V[0, 1])
    a0 = A * A - z2 * V[0, 0]
    disc = a1 * a1 - 4 * a2 * a0
    if a2 > 0:
        if disc <= 0:  # cannot happen: tau0 = A/C is always accepted
            return A / C, A / C, True
        r = math.sqrt(disc)
        q = -0.5 * (a1 + math.copysign(r, a1))  # numerically stable roots
        roots = sorted([q / a2, a0 / q])
        return roots[0], roots[1], True
    # a2 <= 0: the accepted set is unbounded (the whole line or two half-lines)
    return -math.inf, math.inf, bool(disc <= 0)


def _refine(p_of, inside, outside, alpha, iters=80):
    """Bisection for the edge between an accepted point and a rejected one."""
    for _ in range(iters):
        mid = 0.5 * (inside + outside)
        if mid == inside or mid == outside:
            break
        if p_of(mid) > alpha:
            inside = mid
        else:
            outside = mid
    return inside


def invert(A, C, p_of, alpha, centre, scale):
    """Hull of ``{tau : p_of(tau) > alpha}`` by a grid around ``centre`` plus bisection."""
    half = 4.0 * scale if scale > 0 and math.isfinite(scale) else max(1.0, abs(centre))
    for _ in range(12):
        grid = np.linspace(centre - half, centre + half, GRID)
        p = p_of(grid)
        acc = p > alpha
        if not acc.any():
            half /= 4.0
            continue
        if acc[0] or acc[-1]:
            half *= 4.0
            continue
        idx = np.flatnonzero(acc)
        lo = _refine(p_of, grid[idx[0]], grid[idx[0] - 1], alpha)
        hi = _refine(p_of, grid[idx[-1]], grid[idx[-1] + 1], alpha)
        contiguous = bool(np.all(np.diff(idx) == 1))
        return lo, hi, contiguous
    warnings.warn("constant-effect confidence set appears unbounded (the test does not reject "
                  "far from the estimate)", ModelWarning, stacklevel=3)
    return -math.inf, math.inf, False


# --------------------------------------------------------------------------- public entry
def constant_effect(y, t, X, labels, *, estimand, alpha=0.05, resamples=10000, seed=0,
                    engine="auto", batch_size=None, population=None) -> ConstantEffect:
    """Constant additive effect and its CI by inverting the covariance-adjusted test.

    Parameters
    ----------
    y : array (n,)
        Continuous outcome.
    t : array (n,)
        0/1 exposure.
    X : array (n, p)
        Covariates of the covariance adjustment (no intercept column).
    labels : int array (n,)
        Stratum labels; ``-1`` rows are ignored.
    estimand : {"ate", "att"}
        Stratum weights of the statistic (as in the core test).
    alpha : float, default 0.05
        The confidence set holds the ``tau0`` with two-sided ``p(tau0) > alpha``.
    resamples : int, default 10000
        Monte Carlo shuffles (shared by every ``tau0``).
    seed : int, default 0
        Same seed and engine as the core test give ``p_value_at_zero == test.p_value``.
    engine : {"auto", "monte_carlo", "exact", "normal"}, default "auto"
        As in :func:`stratagap.inference.permutation.stratified_test`; ``"normal"`` solves a quadratic
        inequality in closed form.
    batch_size : int, optional
        Resamples per batch (results do not depend on it).
    population : str, optional
        Estimand label to show instead of "ATE"/"ATT".

    Returns
    -------
    ConstantEffect

    Notes
    -----
    See the module docstring of :mod:`stratagap.estimation._inversion`. The constant-effect model is a
    working hypothesis: with heterogeneous effects the estimate is a weighted average effect
    whose weights come from the covariance adjustment, and the CI is for the constant effect.

    References
    ----------
    Rosenbaum (2002), Statistical Science 17, 286-327.
    """
    from . import _estimate as _est  # input checks shared with the other estimators
    from ..inference import permutation as _perm

    alpha = _est._check_alpha(alpha)
    estimand = _est._check_estimand(estimand)
    y, t = _est._check_yt(y, t)
    X = _est._check_X(X, len(y))
    labels = _est._check_labels(labels, len(y))
    seed = check_seed(seed)
    if engine not in ("auto", "monte_carlo", "exact", "normal"):
        raise InputError(f"`engine` must be one of auto, monte_carlo, exact, normal; got "
                         f"{engine!r}")
    if np.all(np.isin(y, (0.0, 1.0))):
        raise InputError("the constant-effect inversion is for continuous outcomes; a 0/1 "
                         "outcome has no constant additive effect: use the risk difference")
    keep = labels >= 0
    y, t, X, labels = y[keep], t[keep], X[keep], labels[keep]
    _est._strata(t, labels)  # every stratum holds both groups
    tf = t.astype(float)
    r_y = np.asarray(_perm.residualize(y, X, labels), dtype=float)  # Rosenbaum 2002
    r_t = np.asarray(_perm.residualize(tf, X, labels), dtype=float)
    codes, n, n1, n0, w = _layout(tf, labels, estimand)
    values = np.column_stack([r_y, r_t])
    totals = np.stack([np.bincount(codes, weights=values[:, j], minlength=len(n))
                       for j in range(2)])
    exposed = np.stack([np.bincount(codes, weights=values[:, j] * tf, minlength=len(n))
                        for j in range(2)])
    A = float(_stat_from_sums(exposed[0], totals[0], n1, n0, w))
    C = float(_stat_from_sums(exposed[1], totals[1], n1, n0, w))
    V = _perm_moments(values, codes, n, n1, n0, w)
    label = population if population else estimand.upper()
    pop = f"{int(n.sum())} units in {len(n)} strata"
    if not abs(C) > 1e-12 * max(1.0, float(np.sqrt(V[1, 1]))):
        warnings.warn("constant-effect inversion: the residualized exposure shows no "
                      "within-strata difference (covariates determine the exposure)",
                      ModelWarning, stacklevel=2)
        return ConstantEffect(math.nan, math.nan, math.nan, math.nan, False, "mean difference",
                              label, pop, "not estimable", alpha, engine, int(resamples), seed,
                              math.nan, A, C)
    est = A / C  # statistic equals its null centre (0)
    var_at = V[0, 0] - 2 * est * V[0, 1] + est ** 2 * V[1, 1]
    se = math.sqrt(max(var_at, 0.0)) / abs(C)
    used_engine, p_of, tie, B = _engine_pvalues(_perm, values, tf, labels, estimand, engine,
                                                resamples, seed, batch_size, A, C, V,
                                                codes, n, n1, n0, w)
    if used_engine == "normal":
        lo, hi, is_interval = _normal_set(A, C, V, alpha)
    else:
        lo, hi, is_interval = invert(A, C, p_of, alpha, est, se)
    span = (hi - lo) if math.isfinite(hi - lo) and hi > lo else 8 * max(se, 1e-12)
    curve_tau = np.linspace(min(lo, est) - 0.75 * span if math.isfinite(lo) else est - span,
                            max(hi, est) + 0.75 * span if math.isfinite(hi) else est + span,
                            CURVE)
    curve_p = p_of(curve_tau)
    p0 = float(p_of(np.array([0.0]))[0])
    method = ("inversion of the covariance-adjusted stratified permutation test of "
              f"H(tau0): constant additive effect (Rosenbaum 2002); engine {used_engine}; "
              "CI = convex hull of {tau0 : two-sided p > alpha}")
    return ConstantEffect(float(est), float(se), float(lo), float(hi), bool(is_interval),
                          "mean difference", label, pop, method, alpha, used_engine, int(B),
                          seed, p0, A, C, curve_tau.tolist(), curve_p.tolist())


def _tie(obs, null):
    """The core test's tie tolerance, per row: TIE_RTOL x max(|T|, max |T*|)."""
    from ..inference.permutation import TIE_RTOL
    obs = np.asarray(obs, dtype=float).reshape(-1, 1)
    scale = np.maximum(np.abs(obs), np.max(np.abs(null), axis=1, keepdims=True))
    return TIE_RTOL * scale


def _engine_pvalues(perm, values, tf, labels, estimand, engine, resamples, seed, batch_size,
                    A, C, V, codes, n, n1, n0, w):
    """Resolve the engine as the core test does; return (engine, p_of(tau), tie, B)."""
    from ..inference._engines import exact

    resamples = perm._check_resamples(resamples)
    count = exact.n_assignments(n, n1)
    if engine == "auto":
        engine = ("exact" if count is not None and count <= min(resamples, exact.MAX_ASSIGNMENTS)
                  else "monte_carlo")
    if engine == "exact" and (count is None or count > exact.MAX_ASSIGNMENTS):
        raise InputError(f"`engine` 'exact' would enumerate {count or 'over 1e300'} assignments "
                         f"(limit {exact.MAX_ASSIGNMENTS:,}); use engine 'monte_carlo'")
    if engine == "normal":
        return "normal", lambda tau: _p_normal(A, C, V, tau), None, 0
    if engine == "exact":
        totals = np.stack([np.bincount(codes, weights=values[:, j], minlength=len(n))
                           for j in range(2)])
        sums = exact.enumerate_exposed_sums(values, tf.astype(np.int64), codes, len(n))
        a_null = _stat_from_sums(sums[0], totals[0], n1, n0, w)
        c_null = _stat_from_sums(sums[1], totals[1], n1, n0, w)
        return ("exact", lambda tau: _p_two_sided_exact(A, C, a_null, c_null, tau, _tie),
                _tie, int(a_null.size))
    # the core engine's shuffles, shared by both columns (rows sorted by r_y first, so the
    # shuffles of r_y are those of the core test with the same seed)
    _, null = perm.null_statistics(values, tf.astype(np.int8), labels, estimand=estimand,
                                   resamples=resamples, seed=seed, batch_size=batch_size)
    a_null, c_null = null[0], null[1]
    return ("monte_carlo", lambda tau: _p_two_sided(A, C, a_null, c_null, tau, _tie), _tie,
            int(resamples))
