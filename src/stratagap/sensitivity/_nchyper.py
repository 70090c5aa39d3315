"""Fisher's noncentral hypergeometric distribution: pmfs and moments for the Gamma bounds.

Used by :mod:`stratagap.sensitivity._gamma_bounds`: the count of exposed units among the K units with u = 1 in
a stratum of M units with N exposed follows Fisher's noncentral hypergeometric law with odds
Gamma (Rosenbaum 2002, Observational Studies, sec. 4.4).
"""

from __future__ import annotations

import math

import numpy as np
from scipy import special, stats

from ..inference.statistic import exposed_sum_moments

#: Largest number of (K, x) cells for which moments are computed exactly; beyond it the
#: large-stratum approximation is used (recorded as ``moments`` on the result).
EXACT_MOMENT_CELLS = 500_000

# ----------------------------------------------------------------------------- Fisher NCH
def _log_comb(a, b):
    return special.gammaln(a + 1.0) - special.gammaln(b + 1.0) - special.gammaln(a - b + 1.0)


def _nch_log_pmf(M, K, N, gamma, cache=None):
    """Log pmf rows of Fisher's noncentral hypergeometric count X of drawn units among K.

    P(X = x) is proportional to C(K, x) C(M - K, N - x) Gamma**x (Fisher's NCH; Rosenbaum
    2002, sec. 4.4). Returns (x, logp) with logp of shape (len(K), N + 1), -inf off support.
    The Gamma-free part is kept in `cache` (a dict) so a Gamma grid or a root search reuses it.
    """
    K = np.atleast_1d(np.asarray(K, dtype=float))
    key = (M, N, K.tobytes())
    base = None if cache is None else cache.get(key)
    x = np.arange(N + 1, dtype=float)
    if base is None:
        Kc = K[:, None]
        valid = (x[None, :] <= Kc) & (N - x[None, :] <= M - Kc)
        with np.errstate(invalid="ignore"):
            base = _log_comb(Kc, x[None, :]) + _log_comb(M - Kc, N - x[None, :])
        base = np.where(valid, base, -np.inf)
        if cache is not None:
            cache[key] = base
    logw = base + x[None, :] * math.log(gamma)
    logw -= logw.max(axis=1, keepdims=True)
    logw -= np.log(np.exp(logw).sum(axis=1, keepdims=True))
    return x, logw


def _nch_moments(M, K, N, gamma, cache=None):
    """Mean and variance of Fisher's NCH for each class size in K (exact or large-stratum).

    Exact by summation over the support when the table is small enough; otherwise the
    large-stratum approximation: the mean solves mu (M - K - N + mu) = Gamma (K - mu)(N - mu)
    and the variance is M/(M-1) / (1/mu + 1/(K-mu) + 1/(N-mu) + 1/(M-K-N+mu)) (Breslow & Day
    1980, sec. 4.4, from memory; both exact at Gamma = 1). Returns (mean, var, exact_flag).
    """
    K = np.asarray(K, dtype=float)
    # work with the smaller of the drawn and undrawn sets: X = K - (undrawn among K), odds 1/Gamma
    flip = N > M - N
    N2, g2 = (M - N, 1.0 / gamma) if flip else (N, gamma)
    if K.size * (N2 + 1) <= EXACT_MOMENT_CELLS:
        x, logp = _nch_log_pmf(M, K, N2, g2, cache)
        p = np.exp(logp)
        mean = p @ x
        var = np.maximum(p @ (x * x) - mean * mean, 0.0)
        # recompute the variance about the mean where cancellation could bite (mean^2 >> var)
        bad = var < 1e-8 * mean * mean
        if bad.any():
            var[bad] = np.einsum("kx,kx->k", p[bad], (x[None, :] - mean[bad, None]) ** 2)
        exact = True
    else:
        mean, var = _nch_moments_large(M, K, N2, g2)
        exact = False
    if flip:
        mean = K - mean
    return mean, np.maximum(var, 0.0), exact


def _nch_moments_large(M, K, N, gamma):
    lo, hi = np.maximum(0.0, N - (M - K)), np.minimum(K, N)
    if gamma == 1.0:
        mean = K * N / M
    else:
        # root of (1 - G) mu^2 + (M - K - N + G (K + N)) mu - G K N = 0 inside [lo, hi] (Breslow & Day 1980)
        a = 1.0 - gamma
        b = M - K - N + gamma * (K + N)
        c = -gamma * K * N
        disc = np.sqrt(np.maximum(b * b - 4 * a * c, 0.0))
        mean = np.where(b > 0, (2 * c) / (-b - disc), (-b + disc) / (2 * a))
        mean = np.clip(mean, lo, hi)
    with np.errstate(divide="ignore", invalid="ignore"):
        inv = 1 / mean + 1 / (K - mean) + 1 / (N - mean) + 1 / (M - K - N + mean)
        var = np.where(hi > lo, M / (M - 1) / inv, 0.0)
    return mean, np.nan_to_num(var)


# ----------------------------------------------------------------------------- normal bracket
def _cut_moments(n, n1, V, gamma, cache=None):
    """Mean and variance of S_s for every cut vertex (top K sorted values have u = 1).

    Given the number X of exposed among the K units with u = 1 (Fisher NCH with odds Gamma),
    the exposed units within each u-class are a simple random sample, so
    E S = E X a1 + E(n1 - X) a0 and
    Var S = E[X(K-X)] SS1 / (K(K-1)) + E[Y(K'-Y)] SS0 / (K'(K'-1)) + (a1 - a0)^2 Var X,
    Y = n1 - X, K' = n - K (laws of total expectation and variance).
    Also returns the per-K variance upper and lower bounds valid for every vertex with K ones.
    """
    K = np.arange(n + 1, dtype=float)
    Kc = n - K
    EX, VX, exact = _nch_moments(n, K, n1, gamma, cache)
    EY = n1 - EX
    c1 = np.concatenate((np.zeros((V.shape[0], 1)), np.cumsum(V, axis=1)), axis=1)       # bottom-K sums
    c2 = np.concatenate((np.zeros((V.shape[0], 1)), np.cumsum(V * V, axis=1)), axis=1)
    tot1, tot2 = c1[:, -1:], c2[:, -1:]
    top1, top2 = tot1 - c1[:, ::-1], tot2 - c2[:, ::-1]                                  # top-K sums, K = 0..n
    with np.errstate(divide="ignore", invalid="ignore"):
        a1 = np.where(K > 0, top1 / K, 0.0)
        a0 = np.where(Kc > 0, (tot1 - top1) / Kc, 0.0)
        ss1 = np.where(K > 0, top2 - top1 * a1, 0.0)
        ss0 = np.where(Kc > 0, (tot2 - top2) - (tot1 - top1) * a0, 0.0)
        q1 = np.where(K > 1, (K * EX - VX - EX ** 2) / (K * (K - 1)), 0.0)
        q0 = np.where(Kc > 1, (Kc * EY - VX - EY ** 2) / (Kc * (Kc - 1)), 0.0)
        b1 = np.where(K > 0, c1[:, :] / K, 0.0)                                          # bottom-K mean
        b0 = np.where(Kc > 0, (tot1 - c1) / Kc, 0.0)
    q1, q0 = np.maximum(q1, 0.0), np.maximum(q0, 0.0)
    # a class of size <= 1 has SS = 0, so its multiplier is irrelevant: let it not loosen the bounds
    q1, q0 = np.where(K > 1, q1, np.where(Kc > 1, q0, 0.0)), np.where(Kc > 1, q0, np.where(K > 1, q1, 0.0))
    D = a1 - a0
    mu = EX * a1 + EY * a0
    var = q1 * np.maximum(ss1, 0.0) + q0 * np.maximum(ss0, 0.0) + VX * D * D
    # any vertex with K ones: SS1 + SS0 = SS_tot - (K K'/n) D^2 and D^2 <= the larger cut D^2
    ss_tot = np.maximum(tot2[:, 0] - tot1[:, 0] ** 2 / n, 0.0)[:, None]
    d2max = np.maximum(D * D, (b1 - b0) ** 2)
    qmax, qmin = np.maximum(q1, q0), np.minimum(q1, q0)
    kk = K * Kc / n
    var_hi = qmax * ss_tot + np.maximum(VX - qmax * kk, 0.0) * d2max
    # a class of one unit: D = (n/(n-1)) (v_i - vbar) for that unit i, so D^2 has a positive floor
    dev2 = ((V - V.mean(axis=1, keepdims=True)) ** 2).min(axis=1, keepdims=True) * (n / (n - 1.0)) ** 2
    d2min = np.where((K == 1) | (Kc == 1), np.minimum(dev2, d2max), 0.0)
    var_lo = np.minimum(qmin * ss_tot + (VX - qmin * kk) * d2min, qmin * ss_tot + (VX - qmin * kk) * d2max)
    return mu, var, var_hi, np.maximum(var_lo, 0.0), exact


def _perm_moments(n, n1, V):
    """Randomization mean and variance of S_s (Gamma = 1) for a group of equal-size strata.

    The closed form is :func:`stratagap.inference.statistic.exposed_sum_moments`; only the
    totals and squared deviations are summed here, along the rows of the grouped values ``V``
    (G, n) (a different summation order from the engine's per-stratum bincount, kept so the
    bounds stay bit-identical).
    """
    R = V.sum(axis=1)
    ss = ((V - V.mean(axis=1, keepdims=True)) ** 2).sum(axis=1)
    return exposed_sum_moments(n, n1, R, ss)


def _normal_sf(diff, var):
    if var <= 0.0:
        return 1.0  # no spread left to bound: report the uninformative bound, as the normal engine does
    return float(stats.norm.sf(diff / math.sqrt(var)))
