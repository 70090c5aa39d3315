"""The worst allocation of hidden bias over cut allocations, for a few large strata.

For the stratified statistic T = sum_s c_s S_s (+ a constant), c_s > 0, the sensitivity model
allows in stratum s any u in [0, 1]^n_s; we search the *cut* allocations (u = 1 on the j
largest values of the stratum, j = 0..n_s), where a stratum's worst case lies on its own
(Rosenbaum & Krieger 1990, JASA 85:493-498; fewer distinct cuts with ties). Using cuts for the
combined normal approximation is our choice. For a combination j = (j_s) write
a_s(j) = c_s mu_s(j), b_s(j) = c_s^2 sigma2_s(j), M = sum a_s, V = sum b_s; its normal tail is
1 - Phi((T - M) / sqrt(V)).

* **Best attained** (quoted): start from the separable choice (Gastwirth, Krieger & Rosenbaum
  2000), iterate kappa <- (T - M) / (2 V) and re-maximize a_s + kappa b_s in every stratum (stop
  at a repeat or after ``MAX_KAPPA_STEPS``), then change one stratum at a time, the change that
  raises the tail most, until none does. The value is the tail of a real allocation, so it is a
  lower end of the worst case.
* **Provable end** (beside it): for any real kappa let H(kappa) = sum_s max_j [a_s(j) + kappa
  b_s(j)]. Every combination has M + kappa V <= H(kappa), so
  (T - M) / sqrt(V) >= min over V in [V_lo, V_hi] of (T - H(kappa) + kappa V) / sqrt(V), with
  V_lo, V_hi the sums of the per-stratum extremes of b_s: each kappa gives an upper end of the
  worst-case tail; we take the smallest over a search of kappa. At a combination where the
  iteration has a fixed point kappa* = (T - M*) / (2 V*) and V* lies inside [V_lo, V_hi] the
  two ends meet, and the result is exact over cut allocations.

Rosenbaum (2018, Annals of Applied Statistics 12:2312-2334) treats this case with a one-step
Taylor approximation from the separable solution; the iteration above is ours.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import optimize, stats

from ._nchyper import _cut_moments

__all__ = ["CutSearch", "search_cuts", "MAX_KAPPA_STEPS", "EXACT_TOL"]

MAX_KAPPA_STEPS = 50
#: Largest number of single-stratum improvement steps.
MAX_SINGLE_STEPS = 5000
#: The two ends "agree" (the value is called exact) within this absolute difference of p.
EXACT_TOL = 1e-12


@dataclass(frozen=True)
class CutSearch:
    """The search at one Gamma: the best attained tail, the provable end, and the allocation."""

    p_attained: float
    p_provable: float
    p_separable: float  # the tail at the separable start (GKR 2000)
    cuts: list  # per group of equal-size strata: (G,) number of units with u = 1
    exact: bool  # the two ends agree within EXACT_TOL
    moments_exact: bool
    kappa_steps: int
    single_steps: int


def _tables(form, gamma, cache):
    """Per group: a = c mu, b = c^2 sigma2 at every cut, (G, n + 1) each; moments exact?"""
    out, exact = [], True
    for (n, n1, V), c in zip(form.groups, form.coef):
        mu, var, _hi, _lo, ex = _cut_moments(n, n1, V, gamma, cache)
        exact &= ex
        out.append((c[:, None] * mu, (c * c)[:, None] * var))
    return out, exact


def _tail(diff, var):
    return 1.0 if var <= 0.0 else float(stats.norm.sf(diff / math.sqrt(var)))


def _z(diff, var):
    return math.inf if var <= 0.0 else diff / math.sqrt(var)


def _choose(tables, kappa):
    """Per group, the cut maximizing a + kappa b (ties: the larger b, then the larger j)."""
    cuts = []
    for a, b in tables:
        score = a + kappa * b
        best = score.max(axis=1, keepdims=True)
        tol = 1e-12 * np.maximum(np.abs(score).max(axis=1, keepdims=True), 1.0)
        cuts.append(np.argmax(np.where(score >= best - tol, b, -np.inf), axis=1))
    return cuts


def _totals(tables, cuts):
    M = sum(float(np.take_along_axis(a, j[:, None], axis=1).sum()) for (a, _b), j in zip(tables, cuts))
    V = sum(float(np.take_along_axis(b, j[:, None], axis=1).sum()) for (_a, b), j in zip(tables, cuts))
    return M, V


def _separable(tables):
    """The separable choice: the largest mean, ties by the larger variance (GKR 2000)."""
    return _choose(tables, 0.0)


def _single_steps(tables, cuts, T):
    """Change one stratum's cut at a time (the best change overall) while the tail rises."""
    cuts = [j.copy() for j in cuts]
    M, V = _totals(tables, cuts)
    steps = 0
    while steps < MAX_SINGLE_STEPS:
        z_now = _z(T - M, V)
        best = (z_now, None)
        for gi, ((a, b), j) in enumerate(zip(tables, cuts)):
            a_now = np.take_along_axis(a, j[:, None], axis=1)
            b_now = np.take_along_axis(b, j[:, None], axis=1)
            M2, V2 = M - a_now + a, V - b_now + b  # (G, n + 1): every single change in the group
            with np.errstate(divide="ignore", invalid="ignore"):
                z = np.where(V2 > 0, (T - M2) / np.sqrt(np.maximum(V2, 1e-300)), np.inf)
            k = int(np.argmin(z))
            if z.flat[k] < best[0] - 1e-13 * max(1.0, abs(best[0])):
                best = (float(z.flat[k]), (gi, *np.unravel_index(k, z.shape)))
        if best[1] is None:
            break
        gi, s, new = best[1]
        a, b = tables[gi]
        M += a[s, new] - a[s, cuts[gi][s]]
        V += b[s, new] - b[s, cuts[gi][s]]
        cuts[gi][s] = new
        steps += 1
    return cuts, steps


def _provable_z(tables, T, kappa, v_lo, v_hi):
    """min over V in [v_lo, v_hi] of (T - H(kappa) + kappa V) / sqrt(V)."""
    H = sum(float((a + kappa * b).max(axis=1).sum()) for a, b in tables)
    A = T - H
    if v_hi <= 0.0:
        return math.inf if A > 0 else -math.inf
    lo = max(v_lo, 1e-300)
    candidates = [lo, v_hi]
    if kappa != 0.0 and lo < A / kappa < v_hi:
        candidates.append(A / kappa)
    return min((A + kappa * v) / math.sqrt(v) for v in candidates)


def _provable_end(tables, T, kappas) -> float:
    v_lo = sum(float(b.min(axis=1).sum()) for _a, b in tables)
    v_hi = sum(float(b.max(axis=1).sum()) for _a, b in tables)
    f = lambda k: _provable_z(tables, T, k, v_lo, v_hi)  # noqa: E731
    z_best, k_best = max((f(k), k) for k in kappas)
    # any kappa gives a valid end: refine around the best one found
    scale = max(abs(k_best), 1e-12)
    lo, hi = k_best - scale, k_best + scale
    res = optimize.minimize_scalar(lambda k: -f(k), bounds=(lo, hi), method="bounded",
                                   options={"xatol": 1e-12 * scale})
    z_best = max(z_best, -float(res.fun))
    return 1.0 if z_best == -math.inf else float(stats.norm.sf(z_best))


def search_cuts(form, gamma, cache=None) -> CutSearch:
    """Best attained and provable normal tails over cut allocations at one Gamma."""
    tables, moments_exact = _tables(form, gamma, cache)
    T = form.observed - form.const
    cuts = _separable(tables)
    M_sep, V_sep = _totals(tables, cuts)
    p_sep = _tail(T - M_sep, V_sep)
    seen, kappas = set(), [0.0]
    steps = 0
    while steps < MAX_KAPPA_STEPS:
        key = tuple(np.concatenate(cuts).tolist())
        if key in seen:
            break
        seen.add(key)
        M, V = _totals(tables, cuts)
        if V <= 0.0:
            break
        kappa = (T - M) / (2.0 * V)
        kappas.append(kappa)
        new = _choose(tables, kappa)
        M_new, V_new = _totals(tables, new)
        if _z(T - M_new, V_new) > _z(T - M, V):
            break  # the re-maximized choice is worse: keep the current one
        cuts = new
        steps += 1
    cuts, singles = _single_steps(tables, cuts, T)
    M, V = _totals(tables, cuts)
    p_att = _tail(T - M, V)
    if V > 0.0:
        kappas.append((T - M) / (2.0 * V))
    k_star = kappas[-1]
    grid = [k_star * f for f in np.exp(np.linspace(-4, 4, 41))] + [-abs(k_star), 0.0]
    p_prov = max(_provable_end(tables, T, kappas + grid), p_att)
    return CutSearch(p_attained=p_att, p_provable=p_prov, p_separable=p_sep, cuts=cuts,
                     exact=p_prov - p_att <= EXACT_TOL, moments_exact=moments_exact,
                     kappa_steps=steps, single_steps=singles)
