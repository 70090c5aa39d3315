"""The exact Gamma bound for matched pairs.

In a matched pair the sensitivity model lets the hidden u tilt the odds of which unit is the
exposed one by at most Gamma, so each pair independently puts probability at most
p = Gamma / (1 + Gamma) on the unit with the larger value. The statistic is linear in the
exposed values with positive coefficients, T = const + sum_s c_s S_s, so with
a_s = c_s (v_hi,s - v_lo,s) >= 0,

    T = base + sum_s a_s B_s,   B_s independent Bernoulli(q_s), q_s <= p,

and the sum with q_s = p in every pair stochastically dominates every other allocation, for any
fixed values (the covariance-adjusted residuals included; Rosenbaum 2002, ch. 4). The bound is
the upper tail of that one distribution:

* exact, by convolving the pairs' two-point laws (pairs with equal a_s merged into one
  binomial), while the support stays within :data:`EXACT_SUPPORT` points; this covers up to 20
  non-zero differences of any sizes, and any number of pairs whose differences take few values
  (a binary outcome with equal pair weights: Binomial(D, p) over the D discordant pairs);
* otherwise by Monte Carlo draws from the worst-case allocation itself, an unbiased estimate of
  the bound with its standard error, beside the normal approximation with the exact moments
  (mean base + p sum a_s, variance p (1 - p) sum a_s^2);
* with so many pairs that the draws would cost more than :data:`MONTE_CARLO_BUDGET`
  Bernoulli draws per Gamma, by that normal approximation alone (a sum of many bounded
  independent terms; the quoted bound is then approximate, and says so).

References
----------
Rosenbaum PR (2002). Observational Studies, 2nd ed., ch. 4 (sensitivity analysis for matched
pairs: the sign test and the signed rank test). Springer.
Phipson B, Smyth GK (2010). Permutation p-values should never be zero. Statistical
Applications in Genetics and Molecular Biology 9(1):39.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import stats

from .._base.rng import substream
from ..inference.statistic import TIE_RTOL
from ._nchyper import _normal_sf

__all__ = ["PairsBound", "is_pairs", "EXACT_SUPPORT", "RESAMPLES"]

#: Largest support of the exact convolution (2**20 + 1: up to 20 differences of any sizes).
EXACT_SUPPORT = 2 ** 20 + 1
#: Monte Carlo draws from the worst-case allocation when the support is larger.
RESAMPLES = 10_000
#: Largest pairs x resamples drawn per Gamma; beyond it the normal approximation is quoted.
MONTE_CARLO_BUDGET = 2e8
#: Draws per batch (memory: batch x pairs floats).
BATCH = 50


def is_pairs(form) -> bool:
    """Every stratum with both groups is a pair (and at least one pair)."""
    return bool(form.groups) and all(n == 2 for n, _n1, _V in form.groups)


class PairsBound:
    """The worst-case tail P(T >= T_obs) at each Gamma, prepared once for a design of pairs.

    ``form`` is the Gamma bounder's prepared linear form of the statistic (per group of equal-size strata the sorted
    values, sign applied for the direction, and the statistic's coefficients).
    """

    def __init__(self, form, seed: int = 0, resamples: int = RESAMPLES):
        lo = np.concatenate([V[:, 0] for _n, _n1, V in form.groups])
        hi = np.concatenate([V[:, 1] for _n, _n1, V in form.groups])
        c = np.concatenate(form.coef)
        a = c * (hi - lo)
        base = form.const + float(np.sum(c * lo))
        self.target = form.observed - base            # sum a_s B_s must reach this
        self.tie = TIE_RTOL * max(abs(form.observed), abs(base), 1e-300)
        a = a[a > 0]
        self.values, self.counts = np.unique(a, return_counts=True)
        self.n_nonzero = int(a.size)
        support = 1.0
        for k in self.counts:
            support *= float(k) + 1.0
        self.exact = support <= EXACT_SUPPORT
        self.resamples = int(resamples)
        if self.exact:
            self.method = "pairs_exact"
        elif self.n_nonzero * self.resamples <= MONTE_CARLO_BUDGET:
            self.method = "pairs_monte_carlo"
        else:
            self.method = "pairs_normal"
        self.sum_a, self.sum_a2 = float(a.sum()), float(np.sum(a * a))
        self._seed = seed
        self._p_star = None
        self.mc_se = {}

    def normal(self, gamma: float) -> float:
        """Normal approximation with the exact moments of the worst-case allocation."""
        p = gamma / (1.0 + gamma)
        return _normal_sf(self.target - p * self.sum_a, p * (1.0 - p) * self.sum_a2)

    def __call__(self, gamma: float) -> float:
        if self.n_nonzero == 0 or self.target <= self.tie:  # nothing to reach: every draw does
            return 1.0 if self.target <= self.tie else 0.0
        if self.method == "pairs_normal":
            return self.normal(gamma)
        return self._exact(gamma) if self.exact else self._monte_carlo(gamma)

    def _exact(self, gamma):
        p = gamma / (1.0 + gamma)
        support, mass = np.zeros(1), np.ones(1)
        for value, k in zip(self.values, self.counts):
            j = np.arange(k + 1)
            part = stats.binom.pmf(j, k, p)               # pairs sharing one difference
            support = (support[:, None] + value * j[None, :]).ravel()
            mass = (mass[:, None] * part[None, :]).ravel()
        return float(min(1.0, mass[support >= self.target - self.tie].sum()))

    def _monte_carlo(self, gamma):
        """(1 + #{T_b >= T_obs}) / (1 + B), T_b = sum_s a_s [U_bs < p].

        With a_s >= 0, T_b reaches the target exactly when p exceeds p*_b, the uniform at
        which the running sum of a over the pairs in increasing U_b first reaches it. The p*_b
        are found once (one sort per draw), so each Gamma (a grid, a root search) costs one
        search, and the same draws serve every Gamma: the estimate does not decrease in Gamma.
        """
        if self._p_star is None:
            a = np.repeat(self.values, self.counts)
            rng = substream(self._seed, "gamma pairs")
            stars, done = [], 0
            while done < self.resamples:
                b = min(BATCH, self.resamples - done)
                u = rng.random((b, a.size))
                order = np.argsort(u, axis=1)
                reach = np.cumsum(a[order], axis=1) >= self.target - self.tie
                first = np.argmax(reach, axis=1)
                star = np.take_along_axis(u, order, axis=1)[np.arange(b), first]
                stars.append(np.where(reach.any(axis=1), star, np.inf))
                done += b
            self._p_star = np.sort(np.concatenate(stars))
        p = gamma / (1.0 + gamma)
        hits = int(np.searchsorted(self._p_star, p, side="left"))   # p*_b < p
        est = (hits + 1.0) / (self.resamples + 1.0)
        self.mc_se[float(gamma)] = math.sqrt(est * (1.0 - est) / self.resamples)
        return est
