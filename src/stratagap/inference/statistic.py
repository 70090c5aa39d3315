"""The test statistics as functions of per-stratum exposed sums, their permutation moments, ties.

Every statistic of the stratified test is a function of the sums ``S_s`` of the value columns
over the exposed units of each stratum (with ``R_s`` the stratum totals and the weights of a
:class:`stratagap._base.layout.StratumLayout`):

* ``"mean_difference"``: ``T = sum_s w_s (S_s (1/n1_s + 1/n0_s) - R_s / n0_s)``, the
  estimand-weighted difference of exposed and reference means, linear in ``S_s``;
* ``"studentized"``: that difference over ``sqrt(sum_s w_s^2 (s1_s^2/n1_s + s0_s^2/n0_s))``,
  with the within-group variances from the exposed sums of centred values and their squares
  (Wu & Ding 2021);
* ``"sum"``: ``T = sum_s S_s`` (Mantel & Haenszel 1959: exposed events summed over strata).

Permutation moments. Under within-stratum shuffles the exposed set of stratum ``s`` is a
simple random sample of ``n1_s`` of its ``n_s`` units, so ``E S_s = n1_s R_s / n_s`` and
``Var S_s = n1_s n0_s / (n_s (n_s - 1)) sum_i (v_i - vbar_s)^2`` (sampling without
replacement), strata independent. A linear statistic ``T = sum_s (a_s S_s + b_s)`` then has
mean ``sum_s (a_s E S_s + b_s)`` and variance ``sum_s a_s^2 Var S_s``.

Ties: a resampled statistic equal to the observed one within a relative tolerance
``TIE_RTOL`` of the larger magnitude counts as at least as extreme, on both sides (scipy's
``permutation_test`` does the same), so that rounding never decides a p-value.

Every user (the engines, the test inversion, the Gamma bounds) takes these from here.

References
----------
Cochran, W. G. (1977). Sampling Techniques, 3rd ed., Wiley, thm. 2.2 (variance of a sample
total without replacement).
Wu, J. & Ding, P. (2021). Randomization tests for weak null hypotheses in randomized
experiments. JASA 116:1898-1913 (studentized stratified difference).
Mantel, N. & Haenszel, W. (1959). JNCI 22:719-748 (exposed-events sum, its null moments).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .._base.layout import StratumLayout

__all__ = ["Statistic", "STATISTICS", "TIE_RTOL", "exposed_sum_moments", "tie_tolerance",
           "studentized_columns"]

STATISTICS = ("mean_difference", "studentized", "sum")
#: Relative tolerance for ties between a resampled and the observed statistic (as scipy does).
TIE_RTOL = 1e-13


def exposed_sum_moments(n, n1, total, ss):
    """Permutation mean and variance of a stratum's exposed sum (closed form).

    ``n``, ``n1``: units and exposed units; ``total``: the stratum total ``R``; ``ss``: the sum
    of squared deviations from the stratum mean. Returns ``(n1 R / n, n1 n0 / (n (n-1)) ss)``
    (Cochran 1977, thm. 2.2); the variance is 0 for a stratum of one unit.
    """
    mean = n1 * total / n  # E S_s = n1_s R_s / n_s
    with np.errstate(divide="ignore", invalid="ignore"):
        var = n1 * (n - n1) / (n * (n - 1)) * ss  # Cochran 1977, thm. 2.2
    return mean, np.where(n > 1, var, 0.0)


def studentized_columns(col, layout: StratumLayout):
    """Centred values and their squares within strata: what the studentized statistic sums."""
    mean_s = np.bincount(layout.codes, weights=col, minlength=layout.n_strata) / layout.n
    c = col - mean_s[layout.codes]  # centring within strata avoids cancellation in s^2
    return np.column_stack([c, c**2])


def tie_tolerance(observed, null):
    """``TIE_RTOL x max(|T|, max |T*|)`` over finite values (non-finite ones are ignored).

    ``null`` 1-D: ``observed`` a scalar, returns a float. ``null`` (r, B): ``observed`` has r
    values (one per row), returns an (r, 1) array.
    """
    null = np.asarray(null, dtype=float)
    a = np.abs(null)
    big = np.max(a, axis=-1, initial=0.0, where=np.isfinite(a))
    obs = np.abs(np.asarray(observed, dtype=float))
    obs = np.where(np.isfinite(obs), obs, 0.0)
    if null.ndim == 1:
        return TIE_RTOL * max(float(obs), float(big))
    return TIE_RTOL * np.maximum(obs.reshape(-1, 1), big[:, None])


@dataclass(frozen=True, eq=False)
class Statistic:
    """One statistic on one layout: ``name``, the layout, and the column totals ``(k, S)``.

    For ``"studentized"`` the columns are :func:`studentized_columns` of the values (centred
    values, their squares); otherwise one column of values (or, for :meth:`__call__` alone,
    any number: only column 0 enters).
    """

    name: str
    layout: StratumLayout
    totals: np.ndarray

    @classmethod
    def of(cls, name, layout, values):
        """The statistic ``name`` of the value columns ``values`` (m, k) on ``layout``."""
        return cls(name, layout, layout.totals(values))

    def __call__(self, sums):
        """The statistic from exposed sums ``(k, S, ...)`` -> shape ``(...)``."""
        shape = (-1,) + (1,) * (sums.ndim - 2)
        lay = self.layout
        n1, n0, w = (a.reshape(shape) for a in (lay.n1, lay.n0, lay.weights))
        S, R = sums[0], self.totals[0].reshape(shape)
        if self.name == "sum":
            return S.sum(axis=0)  # Mantel & Haenszel 1959: exposed events summed over strata
        # difference of exposed and reference means, linear in S_s
        diff = S * (1 / n1 + 1 / n0) - R / n0
        if self.name == "mean_difference":
            return (w * diff).sum(axis=0)
        # studentized (values centred within strata; column 1 holds their squares)
        Q, QR = sums[1], self.totals[1].reshape(shape)
        s1 = (Q - S**2 / n1) / (n1 - 1)  # exposed sample variance
        s0 = ((QR - Q) - (R - S) ** 2 / n0) / (n0 - 1)  # reference sample variance
        num = (w * diff).sum(axis=0)
        den = (w**2 * (np.maximum(s1, 0) / n1 + np.maximum(s0, 0) / n0)).sum(axis=0)
        with np.errstate(divide="ignore", invalid="ignore"):
            z = num / np.sqrt(den)  # Wu & Ding 2021, eq. for the studentized difference
        return np.where(den > 0, z, np.where(num == 0, 0.0, np.sign(num) * np.inf))

    def linear_form(self):
        """``(a, b)`` per stratum with ``T = sum_s (a_s S_s + b_s)`` (not for studentized)."""
        lay = self.layout
        if self.name == "sum":
            return np.ones_like(lay.n), np.zeros_like(lay.n)
        if self.name != "mean_difference":
            raise ValueError(f"{self.name!r} is not linear in the exposed sums")
        with np.errstate(divide="ignore", invalid="ignore"):  # a one-group stratum: unused
            return lay.weights * (1 / lay.n1 + 1 / lay.n0), -lay.weights * self.totals[0] / lay.n0

    def null_moments(self, values):
        """Exact permutation mean and variance of the statistic of ``values[:, 0]``.

        Linear statistics: ``sum_s (a_s E S_s + b_s)`` and ``sum_s a_s^2 Var S_s`` with the
        moments of :func:`exposed_sum_moments`; studentized: the asymptotic ``(0, 1)``.
        """
        if self.name == "studentized":
            return 0.0, 1.0
        lay = self.layout
        R = self.totals[0]
        ss = np.bincount(lay.codes, weights=(values[:, 0] - (R / lay.n)[lay.codes]) ** 2,
                         minlength=lay.n_strata)
        mean_s, var_s = exposed_sum_moments(lay.n, lay.n1, R, ss)
        a, b = self.linear_form()
        return float(np.sum(a * mean_s + b)), float(np.sum(a**2 * var_s))

    def null_covariance(self, values):
        """Permutation covariance matrix of the mean-difference statistics of several columns.

        Per stratum the exposed minus reference mean of a random ``n1_s``-subset has covariance
        ``n_s / (n1_s n0_s) C_s`` with ``C_s`` the sample covariance (divisor ``n_s - 1``) of
        the stratum's values: the covariance form of :func:`exposed_sum_moments` (the same
        closed form, Cochran 1977, thm. 2.2). Used by the test inversion. Its rounding differs
        from :meth:`null_moments` (a per-stratum ``np.cov``), so the diagonal agrees with it to
        rounding only; kept as it was so results stay bit-identical.
        """
        lay = self.layout
        k = values.shape[1]
        V = np.zeros((k, k))
        n, n1, n0, w = lay.n, lay.n1, lay.n0, lay.weights
        for s in range(lay.n_strata):
            if n[s] < 2:
                continue
            c = np.atleast_2d(np.cov(values[lay.codes == s], rowvar=False, ddof=1))
            V += w[s] ** 2 * n[s] / (n1[s] * n0[s]) * c
        return V
