"""Exact Gamma bounds for binary outcomes with the sum-of-exposed-events statistic.

Per stratum the worst case is u = outcome, so the exposed event count is Fisher's noncentral
hypergeometric with odds Gamma; strata are combined by exact convolution (matched pairs reduce
to Binomial(D, Gamma / (1 + Gamma)) over discordant pairs), or by the normal approximation from
the per-stratum bounding moments when the convolution is too large (Rosenbaum 2002, ch. 4).
"""

from __future__ import annotations

import math

import numpy as np
from scipy import stats

from ._nchyper import _nch_log_pmf, _nch_moments, _normal_sf


def _binary_setup(values, t, layout, sign):
    """Per-stratum (n, n1, events) from the stratum layout, and the observed exposed count."""
    y = values if sign > 0 else 1.0 - values            # "less": count exposed non-events
    n = layout.n.astype(np.int64)
    n1 = layout.n1.astype(np.int64)
    m = layout.totals(y[:, None])[0].astype(np.int64)
    count = float(np.sum(y * t))
    return list(zip(n.tolist(), n1.tolist(), m.tolist())), count


def _stratum_pmf(n, n1, m, gamma):
    """Exposed events in one stratum under u = outcome: Fisher NCH(M=n, K=m, N=n1, odds Gamma)."""
    x, logp = _nch_log_pmf(n, [m], n1, gamma)
    lo, hi = max(0, n1 - (n - m)), min(m, n1)
    return lo, np.exp(logp[0, lo:hi + 1])


def _convolution_cost(raw):
    counts = {}
    for key in raw:
        counts[key] = counts.get(key, 0) + 1
    total_len, cost = 1, 0.0
    for (n, n1, m), k in counts.items():
        span = min(m, n1) - max(0, n1 - (n - m))
        if span == 1:
            cost += total_len * (k + 1)
        elif span > 1 and k == 1:
            cost += total_len * span
        elif span > 1:
            cost += (k * span) ** 2 + total_len * k * span  # repeated squaring, then one convolution
        total_len += k * span
    return cost


def _power(pmf, k):
    out, base = np.ones(1), pmf
    while k:
        if k & 1:
            out = np.convolve(out, base)
        k >>= 1
        if k:
            base = np.convolve(base, base)
    return out


def _binary_exact_p(raw, count, gamma):
    counts = {}
    for key in raw:
        counts[key] = counts.get(key, 0) + 1
    offset, pmf = 0, np.ones(1)
    for (n, n1, m), k in sorted(counts.items()):
        lo, p = _stratum_pmf(n, n1, m, gamma)
        offset += k * lo
        if p.size == 1:
            continue
        if p.size == 2:  # identical Bernoulli strata (discordant matched pairs): Binomial(k, p)
            part = stats.binom.pmf(np.arange(k + 1), k, p[1] / p.sum())
        else:
            part = _power(p, k)
        pmf = np.convolve(pmf, part)
    idx = int(math.ceil(count - offset - 1e-9))
    if idx <= 0:
        return 1.0
    return float(min(1.0, np.sum(pmf[idx:])))


def _binary_normal_p(raw, count, gamma, cache=None):
    mu = var = 0.0
    exact = True
    for n, n1, m in raw:
        if min(m, n1) == max(0, n1 - (n - m)):
            mu += min(m, n1)
            continue
        e, v, ex = _nch_moments(n, np.array([m]), n1, gamma, cache)
        mu += float(e[0]); var += float(v[0]); exact &= ex
    return _normal_sf(count - mu, var), exact


# ----------------------------------------------------------------------------- public
