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

from .. import inference as _inference
from ..errors import InputError, ModelWarning
from .._base.jsonable import jsonable
from .._base.layout import layout_for
from .._base.rng import check_seed
from ..inference import Statistic, tie_tolerance

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
                    engine="auto", batch_size=None, population=None, draws=None,
                    layout=None) -> ConstantEffect:
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
    draws : :class:`stratagap.inference.SharedDraws`, optional
        Monte Carlo null draws shared with the core test (results are bit-identical without).
    layout : :class:`stratagap._base.layout.StratumLayout`, optional
        The layout of the analysed rows (labels >= 0), when the caller has built it.

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
    r_y = np.asarray(_inference.residualize(y, X, labels), dtype=float)  # Rosenbaum 2002
    r_t = np.asarray(_inference.residualize(tf, X, labels), dtype=float)
    layout = layout_for(layout, labels, tf, estimand)
    values = np.column_stack([r_y, r_t])
    totals = layout.totals(values)
    exposed = layout.exposed_sums(values, tf)
    # one mean-difference statistic per column: T(tau0) = T(r_y) - tau0 T(r_t)
    stat_y = Statistic("mean_difference", layout, totals[0:1])
    stat_t = Statistic("mean_difference", layout, totals[1:2])
    A = float(stat_y(exposed[0:1]))
    C = float(stat_t(exposed[1:2]))
    V = stat_y.null_covariance(values)
    label = population if population else estimand.upper()
    pop = f"{int(layout.n.sum())} units in {layout.n_strata} strata"
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
    used_engine, p_of, B = _engine_pvalues(values, tf, labels, layout, (stat_y, stat_t),
                                           engine, resamples, seed, batch_size, A, C, V, draws)
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


def _engine_pvalues(values, tf, labels, layout, stats, engine, resamples, seed, batch_size,
                    A, C, V, draws):
    """Resolve the engine as the core test does; return (engine, p_of(tau), B)."""
    resamples = _inference.check_resamples(resamples)
    count = _inference.n_assignments(layout.n, layout.n1)
    limit = _inference.MAX_ASSIGNMENTS
    if engine == "auto":
        engine = ("exact" if count is not None and count <= min(resamples, limit)
                  else "monte_carlo")
    if engine == "exact" and (count is None or count > limit):
        raise InputError(f"`engine` 'exact' would enumerate {count or 'over 1e300'} assignments "
                         f"(limit {limit:,}); use engine 'monte_carlo'")
    if engine == "normal":
        return "normal", lambda tau: _p_normal(A, C, V, tau), 0
    if engine == "exact":
        sums = _inference.enumerate_exposed_sums(values, tf.astype(np.int64), layout.codes,
                                                 layout.n_strata)
        a_null, c_null = stats[0](sums[0:1]), stats[1](sums[1:2])
        return ("exact",
                lambda tau: _p_two_sided_exact(A, C, a_null, c_null, tau, tie_tolerance),
                int(a_null.size))
    # the core engine's shuffles, shared by both columns (rows sorted by r_y first, so the
    # shuffles of r_y are those of the core test with the same seed)
    _, null = _inference.null_statistics(values, tf.astype(np.int8), labels,
                                         estimand=layout.estimand, resamples=resamples,
                                         seed=seed, batch_size=batch_size, draws=draws,
                                         layout=layout)
    a_null, c_null = null[0], null[1]
    return ("monte_carlo", lambda tau: _p_two_sided(A, C, a_null, c_null, tau, tie_tolerance),
            int(resamples))
