"""Statistics as functions of the per-stratum exposed sums, and the normal engine.

The normal engine uses the exact permutation mean and variance of a linear statistic
``T = sum_s (a_s S_s + b_s)``: under within-stratum shuffles ``E S_s = n1_s R_s / n_s`` and
``Var S_s = n1_s n0_s / (n_s (n_s - 1)) sum_i (v_i - vbar_s)^2`` (sampling without
replacement), strata independent. The studentized statistic is referred to N(0, 1).

References
----------
Cochran, W. G. (1977). Sampling Techniques, 3rd ed., Wiley, thm. 2.2 (variance of a sample
total without replacement).
Wu, J. & Ding, P. (2021). JASA 116:1898-1913 (studentized stratified difference).
Mantel, N. & Haenszel, W. (1959). JNCI 22:719-748 (exposed-events sum, its null moments).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats


@dataclass(frozen=True)
class Design:
    """Per-stratum constants of a statistic: sizes, weights and totals."""

    n: np.ndarray
    n1: np.ndarray
    w: np.ndarray
    totals: np.ndarray  # (k, S)
    statistic: str

    def stat(self, sums: np.ndarray) -> np.ndarray:
        """Statistic from exposed sums (k, S, B) -> (B,)."""
        n, n1 = self.n[:, None], self.n1[:, None]
        n0 = n - n1
        w = self.w[:, None]
        S, R = sums[0], self.totals[0][:, None]
        if self.statistic == "sum":
            return S.sum(axis=0)  # Mantel & Haenszel 1959: exposed events summed over strata
        # difference of exposed and reference means, linear in S_s
        diff = S * (1 / n1 + 1 / n0) - R / n0
        if self.statistic == "mean_difference":
            return (w * diff).sum(axis=0)
        # studentized (values centred within strata; column 1 holds their squares)
        Q, QR = sums[1], self.totals[1][:, None]
        s1 = (Q - S**2 / n1) / (n1 - 1)  # exposed sample variance
        s0 = ((QR - Q) - (R - S) ** 2 / n0) / (n0 - 1)  # reference sample variance
        num = (w * diff).sum(axis=0)
        den = (w**2 * (np.maximum(s1, 0) / n1 + np.maximum(s0, 0) / n0)).sum(axis=0)
        with np.errstate(divide="ignore", invalid="ignore"):
            z = num / np.sqrt(den)  # Wu & Ding 2021, eq. for the studentized difference
        return np.where(den > 0, z, np.where(num == 0, 0.0, np.sign(num) * np.inf))


def moments(v, codes, n_strata, design: Design):
    """Exact permutation mean and variance of a linear statistic."""
    if design.statistic == "studentized":
        return 0.0, 1.0
    n, n1, w = design.n, design.n1, design.w
    n0 = n - n1
    R = design.totals[0]
    ss = np.bincount(codes, weights=(v[:, 0] - (R / n)[codes]) ** 2, minlength=n_strata)
    mean_s = n1 * R / n  # E S_s = n1_s R_s / n_s
    var_s = n1 * n0 / (n * (n - 1)) * ss  # Var S_s, sampling without replacement
    var_s = np.where(n > 1, var_s, 0.0)
    if design.statistic == "sum":
        a, b = np.ones_like(n), np.zeros_like(n)
    else:
        a, b = w * (1 / n1 + 1 / n0), -w * R / n0
    return float(np.sum(a * mean_s + b)), float(np.sum(a**2 * var_s))


def normal_p(observed, mean, var, statistic):
    if statistic != "studentized" and var <= 0:
        return 1.0, 1.0
    z = (observed - mean) / np.sqrt(var)
    return float(stats.norm.sf(z)), float(stats.norm.cdf(z))
