"""Exact engines: full enumeration of within-strata assignments, and the convolution of
per-stratum hypergeometric distributions for a binary value column with the sum statistic.

References
----------
Mantel, N. & Haenszel, W. (1959). Statistical aspects of the analysis of data from
retrospective studies of disease. JNCI 22:719-748 (the exposed-events sum and its
hypergeometric null).
"""

from __future__ import annotations

import itertools
import math

import numpy as np
from scipy import signal, stats

#: Hard cap on the number of enumerated assignments.
MAX_ASSIGNMENTS = 200_000


def log_assignments(n: np.ndarray, n1: np.ndarray) -> float:
    """Natural log of the number of distinct within-strata assignments, prod_s C(n_s, n1_s)."""
    n = np.asarray(n, dtype=float)
    n1 = np.asarray(n1, dtype=float)
    return float(np.sum([math.lgamma(a + 1) - math.lgamma(b + 1) - math.lgamma(a - b + 1)
                         for a, b in zip(n, n1)]))


def n_assignments(n: np.ndarray, n1: np.ndarray) -> int | None:
    """prod_s C(n_s, n1_s) as an int, or None when it exceeds 10**300."""
    if log_assignments(n, n1) > 690:
        return None
    total = 1
    for a, b in zip(n, n1):
        total *= math.comb(int(a), int(b))
    return total


def enumerate_exposed_sums(values: np.ndarray, t: np.ndarray, codes: np.ndarray,
                           n_strata: int) -> np.ndarray:
    """Exposed sums (k, S, A) for every one of the A within-strata assignments.

    Per stratum every subset of the smaller group's size is listed (itertools.combinations);
    the assignments of the whole design are the Cartesian product over strata.
    """
    k = values.shape[1]
    per = []
    for s in range(n_strata):
        rows = np.flatnonzero(codes == s)
        vals = values[rows].T  # (k, n_s)
        n_s, n1_s = rows.size, int(t[rows].sum())
        m_s = min(n1_s, n_s - n1_s)
        idx = np.array(list(itertools.combinations(range(n_s), m_s)), dtype=np.int64)
        idx = idx.reshape(-1, m_s)
        sums = vals[:, idx].sum(axis=2)  # (k, C_s)
        if m_s != n1_s:  # drew the reference group: exposed = total - drawn
            sums = vals.sum(axis=1, keepdims=True) - sums
        per.append(sums)
    sizes = [p.shape[1] for p in per]
    total = int(np.prod(sizes, dtype=np.int64))
    grid = np.indices(sizes).reshape(n_strata, total)
    out = np.empty((k, n_strata, total))
    for s in range(n_strata):
        out[:, s, :] = per[s][:, grid[s]]
    return out


def _convolve(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Convolution of two pmfs: direct when small (exact to rounding), else FFT (clipped)."""
    if a.size * b.size <= 20_000_000:
        return np.convolve(a, b)
    out = signal.fftconvolve(a, b)
    return np.clip(out, 0.0, None)


def hypergeometric_sum_pmf(n: np.ndarray, events: np.ndarray, n1: np.ndarray):
    """Exact null pmf of sum_s S_s, S_s ~ Hypergeometric(n_s, events_s, n1_s) independent.

    Returns ``(support, pmf)``: integer support values and their probabilities. Each stratum's
    pmf is cut where it underflows to 0 in double precision.

    References
    ----------
    Mantel & Haenszel (1959); the convolution of independent per-stratum hypergeometrics is
    the exact conditional null of the stratified 2x2 tables (common practice since then).
    """
    offset = 0
    pmf = np.ones(1)
    for n_s, e_s, n1_s in zip(n, events, n1):
        n_s, e_s, n1_s = int(n_s), int(e_s), int(n1_s)
        lo, hi = max(0, n1_s - (n_s - e_s)), min(n1_s, e_s)
        x = np.arange(lo, hi + 1)
        p = stats.hypergeom.pmf(x, n_s, e_s, n1_s)
        nz = np.flatnonzero(p > 0)
        x, p = x[nz[0]:nz[-1] + 1], p[nz[0]:nz[-1] + 1]
        pmf = _convolve(pmf, p)
        offset += int(x[0])
    pmf = pmf / pmf.sum()
    return offset + np.arange(pmf.size), pmf
