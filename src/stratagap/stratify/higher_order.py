"""Balance beyond the means: squares and pairwise products of the covariates.

A score model can balance every covariate's mean and still leave its square, or the product of
two covariates, imbalanced; an outcome that depends on them is then confounded (Austin 2009
recommends checking higher moments and interactions). The terms checked:

* the square of each continuous covariate and the pairwise products of the balance terms
  (covariates and dummy levels; not the reference level, nor two levels of one categorical),
  each computed from values centred at their pooled means (uncentred squares and products
  repeat the imbalance of the means);
* products only among the ``MAX_FOR_PRODUCTS`` terms with the largest |SMD| before adjustment
  (the terms most associated with exposure); squares of all.

The SMD of each term uses Austin's (2009, eq. 1) continuous denominator before adjustment, and
after adjustment the stratum-weighted group means with the same denominator (as the balance
table). With many terms some exceed 0.1 by chance: an SMD's sampling SD is about
``sqrt(1/n1 + 1/n0)``. So a term is flagged only when its |SMD| after adjustment exceeds 0.1
*and* the largest |SMD| after adjustment exceeds the 95th percentile of that maximum over
``PERMUTATIONS`` within-strata shuffles of the exposure (group sizes kept in each stratum,
denominators held at the observed values).

Cost: one ``(K, n) @ (n, B)`` product per batch of ``B`` shuffles for ``K`` terms, and a sort of
``B x n_s`` random keys per stratum; the shuffled weights take ``8 n B`` bytes, with ``B = 50``
up to n = 167,772 and smaller beyond (at most 64 MiB).

References
----------
Austin, P. C. (2009). Balance diagnostics for comparing the distribution of baseline
covariates between treatment groups in propensity-score matched samples. Statistics in
Medicine 28, 3083-3107.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .._base.rng import substream

__all__ = ["HigherOrderBalance", "higher_order_balance", "MAX_FOR_PRODUCTS", "PERMUTATIONS"]

#: Products are formed among at most this many terms (issue 11's cap).
MAX_FOR_PRODUCTS = 30
#: Within-strata shuffles of the exposure that calibrate the maximum |SMD|.
PERMUTATIONS = 200
#: |SMD| threshold (common practice; Austin 2009).
THRESHOLD = 0.1
_BATCH = 50
#: At most this many floats of shuffled weights at once (64 MiB), so large n takes smaller batches.
_BATCH_FLOATS = 2 ** 23
_WORST = 5


@dataclass(frozen=True)
class HigherOrderBalance:
    """Squares and products: the largest |SMD|, the worst terms and the permutation flag."""

    n_terms: int
    max_abs_smd_before: float | None
    max_abs_smd_after: float | None
    worst: list = field(default_factory=list)  # up to 5 dicts: term, smd_before, smd_after
    permutation_p95: float | None = None
    permutations: int = PERMUTATIONS
    seed: int | None = None
    flagged: bool = False
    products_among: int = 0

    def to_dict(self) -> dict:
        return {"n_terms": self.n_terms, "max_abs_smd_before": self.max_abs_smd_before,
                "max_abs_smd_after": self.max_abs_smd_after,
                "worst": [dict(w) for w in self.worst],
                "permutation_p95": self.permutation_p95, "permutations": self.permutations,
                "seed": self.seed, "flagged": self.flagged, "products_among": self.products_among,
                "threshold": THRESHOLD}


def _terms(balance_terms, t, n):
    """(name, covariate, centred values, kind, |SMD before| of the term) of usable base terms."""
    out = []
    g1 = t == 1
    for tm in balance_terms:
        if tm.values is None or (tm.column is None and tm.level is not None):
            continue  # a categorical's reference level: the other levels carry it
        v = np.asarray(tm.values, dtype=float)
        if v.shape != (n,) or not np.all(np.isfinite(v)) or np.ptp(v) == 0:
            continue
        out.append((tm.name, tm.covariate, v - v.mean(), tm.kind, abs(_smd(v, g1))))
    return out


def _smd(v, g1):
    d = np.sqrt((v[g1].var(ddof=1) + v[~g1].var(ddof=1)) / 2.0)  # Austin 2009, eq. 1
    return (v[g1].mean() - v[~g1].mean()) / d if d > 0 else 0.0


def _candidates(base):
    names, cols = [], []
    for name, _, v, kind, _ in base:
        if kind == "continuous":
            names.append(f"{name} squared")
            cols.append(v * v)
    top = sorted(range(len(base)), key=lambda i: -base[i][4])[:MAX_FOR_PRODUCTS]
    top.sort()
    for a_i, i in enumerate(top):
        for j in top[a_i + 1:]:
            if base[i][1] == base[j][1]:
                continue  # two levels of one categorical (or a covariate and its indicator)
            names.append(f"{base[i][0]} x {base[j][0]}")
            cols.append(base[i][2] * base[j][2])
    return names, cols, len(top)


def _signed_weights(t, labels, layout_w, n1, n0):
    """Per unit: +w_s / n1_s if exposed, -w_s / n0_s if not (the weighted mean difference)."""
    return np.where(t == 1, layout_w[labels] / n1[labels], -layout_w[labels] / n0[labels])


def higher_order_balance(balance_terms, t, labels, *, estimand: str, seed: int) -> HigherOrderBalance:
    """Check squares and pairwise products of the covariates before and after stratification.

    Parameters
    ----------
    balance_terms : list of BalanceTerm
        The balance rows (with ``values``) of the analysed rows.
    t : (n,) int8
    labels : (n,) int64
        Stratum codes ``0..S-1`` of the analysed rows (every stratum holds both groups).
    estimand : {"ate", "att"}
        Sets the stratum weights (ATE ``n_s / n``, ATT ``n1_s / n1``).
    seed : int
        The run's seed; the shuffles use its "higher-order balance" substream.

    Returns
    -------
    HigherOrderBalance
    """
    t = np.asarray(t)
    labels = np.asarray(labels, dtype=np.int64)
    n = t.size
    base = _terms(balance_terms, t, n)
    names, cols, among = _candidates(base)
    keep = [j for j, c in enumerate(cols) if np.ptp(c) > 0]
    names, cols = [names[j] for j in keep], [cols[j] for j in keep]
    if not cols:
        return HigherOrderBalance(0, None, None, seed=seed, products_among=among)
    V = np.column_stack(cols)
    V -= V.mean(axis=0)
    g1 = t == 1
    denom = np.sqrt((V[g1].var(axis=0, ddof=1) + V[~g1].var(axis=0, ddof=1)) / 2.0)
    denom = np.where(denom > 0, denom, np.inf)
    before = (V[g1].mean(axis=0) - V[~g1].mean(axis=0)) / denom
    S = int(labels.max()) + 1
    n_s = np.bincount(labels, minlength=S).astype(float)
    n1 = np.bincount(labels, weights=g1.astype(float), minlength=S)
    n0 = n_s - n1
    w = n_s / n if estimand == "ate" else n1 / n1.sum()
    after = (V.T @ _signed_weights(t, labels, w, n1, n0)) / denom
    rng = substream(seed, "higher-order balance")
    blocks = [np.flatnonzero(labels == s_) for s_ in range(S)]
    maxima = []
    batch = max(1, min(_BATCH, _BATCH_FLOATS // n))  # depends on n only: same data, same draws
    for start in range(0, PERMUTATIONS, batch):
        B = min(batch, PERMUTATIONS - start)
        A = np.empty((n, B))
        for s_, idx in enumerate(blocks):  # shuffle within each stratum: its group sizes are kept
            keys = rng.random((B, idx.size))
            exposed = np.argsort(np.argsort(keys, axis=1), axis=1) < n1[s_]
            A[idx] = np.where(exposed.T, w[s_] / n1[s_], -w[s_] / n0[s_])
        maxima.append(np.max(np.abs(V.T @ A) / denom[:, None], axis=0))
    p95 = float(np.quantile(np.concatenate(maxima), 0.95))
    worst_idx = np.argsort(-np.abs(after), kind="stable")[:_WORST]
    worst = [{"term": names[j], "smd_before": float(before[j]), "smd_after": float(after[j])}
             for j in worst_idx]
    max_after = float(np.max(np.abs(after)))
    flagged = bool(max_after > THRESHOLD and max_after > p95)
    return HigherOrderBalance(len(names), float(np.max(np.abs(before))), max_after, worst,
                              p95, PERMUTATIONS, seed, flagged, among)
