"""The stratum layout of one analysed row set: codes, sizes, exposed counts, estimand weights.

Every stage that combines strata (the strata table and the balance weights, the permutation
test and its moments, the effect estimators, the test inversion, the Gamma bounds) reads these
numbers from one :class:`StratumLayout`, so they are computed by one piece of arithmetic and
agree to the bit. The negative control analyses a subset of the rows and builds its own.

Estimand weights (Imbens & Rubin 2015, ch. 17): ATE ``w_s = n_s / n`` (the stratum's share of
units), ATT ``w_s = n1_s / n1`` (its share of exposed units). Unit weights ``w_s / n1_s`` for an
exposed and ``w_s / n0_s`` for a reference unit make the weighted group means the
stratum-weighted means (Rosenbaum & Rubin 1984).

References
----------
Imbens, G. W. & Rubin, D. B. (2015). Causal Inference for Statistics, Social, and Biomedical
Sciences. Cambridge University Press, ch. 17.
Rosenbaum, P. R. & Rubin, D. B. (1984). Reducing bias in observational studies using
subclassification on the propensity score. JASA 79:516-524.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import InputError

__all__ = ["StratumLayout", "stratum_codes", "layout_for", "ESTIMANDS"]

ESTIMANDS = ("ate", "att")


def stratum_codes(labels):
    """Sorted distinct labels and each row's position among them (``np.unique`` semantics).

    Uses a bincount lookup when the labels are small non-negative integers (the usual case:
    strata 0..S-1), which is faster than sorting and gives the same codes.
    """
    labels = np.asarray(labels)
    if labels.size and 0 <= labels.min() and labels.max() < 4 * labels.size + 1024:
        present = np.bincount(labels) > 0
        uniq = np.flatnonzero(present)
        lookup = np.cumsum(present) - 1
        return uniq, lookup[labels]
    return np.unique(labels, return_inverse=True)


@dataclass(frozen=True, eq=False)
class StratumLayout:
    """Strata of one analysed row set and the estimand's weights.

    Attributes
    ----------
    ids : ndarray (S,)
        Stratum label of each code, sorted (code ``s`` is label ``ids[s]``).
    codes : ndarray of int64 (m,)
        Stratum code of each analysed row, ``0..S-1``.
    n, n1, n0 : ndarray of float (S,)
        Units, exposed units and reference units per stratum (float: every use divides).
    estimand : {"ate", "att"}
    weights : ndarray of float (S,)
        Estimand weights ``w_s`` (sum to 1): ATE ``n_s / n``, ATT ``n1_s / n1``.

    Build it with :meth:`build` (from labels) or :meth:`from_codes` (codes already 0..S-1).
    Strata lacking a group are described, not refused: each caller checks what it needs with
    its own message (the mean difference needs both groups, the exposed-events sum does not).
    """

    ids: np.ndarray
    codes: np.ndarray
    n: np.ndarray
    n1: np.ndarray
    n0: np.ndarray
    estimand: str
    weights: np.ndarray

    @classmethod
    def build(cls, labels, t, estimand) -> "StratumLayout":
        """Layout of rows with stratum ``labels`` (all >= 0) and 0/1 exposure ``t``.

        Rows set aside (label -1) are not part of an analysed row set: drop them first.
        ``estimand`` must be "ate" or "att" (callers check it with their own message).
        """
        ids, codes = stratum_codes(labels)
        return cls.from_codes(codes, t, estimand, ids=ids)

    @classmethod
    def from_codes(cls, codes, t, estimand, *, n_strata=None, ids=None) -> "StratumLayout":
        """Layout from stratum codes ``0..S-1`` (``ids`` default: the codes themselves)."""
        codes = np.asarray(codes, dtype=np.int64)
        S = int(codes.max()) + 1 if n_strata is None else int(n_strata)
        n = np.bincount(codes, minlength=S).astype(float)
        n1 = np.bincount(codes, weights=t, minlength=S)
        n0 = n - n1
        if estimand == "ate":
            weights = n / n.sum()  # ATE: stratum share of units
        elif estimand == "att":
            with np.errstate(divide="ignore", invalid="ignore"):  # no exposed unit: unused
                weights = n1 / n1.sum()  # ATT: stratum share of exposed units
        else:
            raise ValueError(f"estimand must be one of {ESTIMANDS}, got {estimand!r}")
        return cls(ids=np.arange(S) if ids is None else np.asarray(ids), codes=codes, n=n,
                   n1=n1, n0=n0, estimand=estimand, weights=weights)

    @property
    def n_strata(self) -> int:
        return int(self.n.size)

    @property
    def n_rows(self) -> int:
        return int(self.codes.size)

    def has_both_groups(self) -> np.ndarray:
        """(S,) bool: the stratum holds exposed and reference units."""
        return (self.n1 > 0) & (self.n0 > 0)

    def unit_weights(self, t) -> np.ndarray:
        """Per-row weights ``w_s / n1_s`` (exposed) or ``w_s / n0_s`` (reference).

        The weights of each group sum to 1; every stratum must hold both groups.
        """
        s, w = self.codes, self.weights
        return np.where(np.asarray(t) == 1, w[s] / self.n1[s], w[s] / self.n0[s])

    def totals(self, values) -> np.ndarray:
        """(k, S) per-stratum sums of the columns of ``values`` (m, k)."""
        return np.stack([np.bincount(self.codes, weights=values[:, j], minlength=self.n_strata)
                         for j in range(values.shape[1])])

    def exposed_sums(self, values, t) -> np.ndarray:
        """(k, S) per-stratum sums of the columns of ``values`` over the exposed rows."""
        return np.stack([np.bincount(self.codes, weights=values[:, j] * t,
                                     minlength=self.n_strata)
                         for j in range(values.shape[1])])


def layout_for(layout, labels, t, estimand, *, n_strata=None) -> StratumLayout:
    """``layout`` when it fits the analysed rows (``labels`` >= 0, exposure ``t``), else a new one.

    A stage given the caller's layout trusts it after a cheap check (row count, exposed count,
    estimand and, when given, ``n_strata``) that catches a layout of other rows;
    ``layout=None`` builds it here.
    """
    if layout is None:
        return StratumLayout.build(labels, t, estimand)
    if (not isinstance(layout, StratumLayout) or layout.n_rows != len(labels)
            or layout.estimand != estimand or layout.n1.sum() != np.sum(t)
            or (n_strata is not None and layout.n_strata != n_strata)):
        raise InputError("`layout` must be the StratumLayout of the analysed rows (labels >= 0) "
                         f"for estimand {estimand!r}; build it with StratumLayout.build(labels, "
                         "t, estimand) or leave it out")
    return layout
