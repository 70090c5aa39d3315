"""Monte Carlo p-value at the allocation of hidden bias that the bound selects.

Where the two normal ends of the Gamma bracket fall on either side of the level, the normal
approximation cannot say whether the test survives. This draws the test statistic under the
sensitivity model at one allocation: in each stratum u = 1 on the K largest values, K the cut
the search over cut allocations chose (:mod:`._gamma_search`; the separable one of Gastwirth,
Krieger & Rosenbaum 2000 by default). In a stratum of n units with
n1 exposed, the number X of exposed units among the K with u = 1 follows Fisher's noncentral
hypergeometric law with odds Gamma (Rosenbaum 2002, sec. 4.4); given X, the exposed units within
each u-class are a simple random sample.

Draws: one uniform per stratum and resample gives X by the inverse CDF, and one random priority
order per stratum and resample picks the exposed units within each class (the first X of the
u = 1 class, the first n1 - X of the u = 0 class). The same uniforms serve every Gamma, so at a
fixed cut a resample's statistic does not decrease as Gamma grows (X is nondecreasing in Gamma
at a fixed uniform, and each extra u = 1 unit replaces a u = 0 unit with a value no larger).

What the number means: for matched pairs the selected allocation is the worst case, so this is
an unbiased estimate of the bound; for larger strata it is the p-value at one allocation,
hence a lower estimate of the worst case. It is shown beside the normal bracket, never instead
of the bound.
"""

from __future__ import annotations

import math

import numpy as np

from .._base.rng import substream
from ._nchyper import _cut_moments, _nch_log_pmf

__all__ = ["selected_cuts", "nch_inverse_cdf", "monte_carlo_at_allocation", "disagreeing", "LABEL"]

LABEL = "Monte Carlo at the selected allocation"
#: Resamples per Gamma.
RESAMPLES = 2000
#: Resamples drawn together (memory: batch x stratum size per group of strata).
BATCH = 250


def selected_cuts(form, gamma, cache=None) -> list:
    """Per group of strata, the number K of units with u = 1 at the separable vertex (G,)."""
    out = []
    for n, n1, V in form.groups:
        mu, var, _hi, _lo, _ex = _cut_moments(n, n1, V, gamma, cache)
        best = mu.max(axis=1, keepdims=True)
        tol = 1e-12 * np.maximum(np.abs(mu).max(axis=1, keepdims=True), 1.0)
        score = np.where(mu >= best - tol, var, -np.inf)  # ties -> larger variance (GKR 2000)
        out.append(np.argmax(score, axis=1))
    return out


def nch_inverse_cdf(u, n, K, n1, gamma, cache=None) -> np.ndarray:
    """X = smallest x with P(X <= x) >= u, Fisher NCH(n units, K with u = 1, n1 drawn, Gamma).

    ``u`` (b, G) uniforms, ``K`` (G,) class sizes; returns (b, G) integers.
    """
    _x, logp = _nch_log_pmf(n, K, n1, gamma, cache)
    cdf = np.cumsum(np.exp(logp), axis=1)
    cdf[:, -1] = 1.0  # rounding: the last cell closes the distribution
    return (u[:, :, None] > cdf[None, :, :]).sum(axis=2)


def monte_carlo_at_allocation(form, gammas, *, seed: int, resamples: int = RESAMPLES,
                              cache=None, cuts=None) -> dict:
    """One-sided p-values P(T >= T_obs) at the selected allocation for each Gamma.

    ``form`` is the bound's prepared linear form of the statistic (sorted values per group of equal-size strata
    and the statistic's linear form). ``cuts``: per Gamma, the allocation (per group, the
    number of units with u = 1); None takes the separable one (:func:`selected_cuts`). Returns ``{"p": [...], "mc_se": [...], "resamples": B}``;
    p = (1 + count) / (1 + B) (Phipson & Smyth 2010), mc_se = sqrt(p (1 - p) / B).
    """
    gammas = [float(g) for g in gammas]
    if cuts is None:
        cuts = [selected_cuts(form, g, cache) for g in gammas]
    target = form.observed - form.const
    tie = 1e-13 * max(abs(target), 1.0)
    rng = substream(seed, "gamma monte carlo")
    counts = np.zeros(len(gammas), dtype=np.int64)
    done = 0
    while done < resamples:
        b = min(BATCH, resamples - done)
        total = np.zeros((len(gammas), b))
        for gi, ((n, n1, V), c) in enumerate(zip(form.groups, form.coef)):
            G = V.shape[0]
            u = rng.random((b, G))
            priority = rng.random((b, G, n))
            position = np.arange(n)
            for k, g in enumerate(gammas):
                K = cuts[k][gi]
                top = position[None, :] >= (n - K)[:, None]               # (G, n): u = 1
                order = np.argsort(priority + np.where(top, 0.0, 2.0)[None], axis=2)
                vals = np.take_along_axis(np.broadcast_to(V, (b, G, n)), order, axis=2)
                cs = np.concatenate((np.zeros((b, G, 1)), np.cumsum(vals, axis=2)), axis=2)
                x = nch_inverse_cdf(u, n, K, n1, g, cache)                 # (b, G)
                Kb = np.broadcast_to(K, (b, G))
                take = lambda j: np.take_along_axis(cs, j[:, :, None], axis=2)[:, :, 0]  # noqa: E731
                S = take(x) + take(Kb + n1 - x) - take(Kb)
                total[k] += S @ c
        counts += np.sum(total >= target - tie, axis=1)
        done += b
    p = (counts + 1.0) / (resamples + 1.0)
    return {"p": p.tolist(), "mc_se": np.sqrt(p * (1 - p) / resamples).tolist(),
            "resamples": int(resamples)}


def disagreeing(gammas, p_upper, p_separable, level) -> list:
    """The Gammas > 1 at which the bracket's ends fall on either side of ``level``."""
    return [g for g, up, sep in zip(gammas, p_upper, p_separable)
            if g > 1.0 and sep <= level < up and math.isfinite(up)]
