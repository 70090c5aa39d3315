"""Covariate balance before and after subclassification.

For each balance term (a numeric covariate, a dummy level, a formula term): the standardized
mean difference, the variance ratio (continuous terms only: a dummy's variance is fixed by its
mean) and the two-sample Kolmogorov-Smirnov distance, before adjustment and after it (groups
weighted by the stratum weights, so the weighted group means are the stratum-weighted means).
After adjustment the SMD keeps the *before* denominator, so that a change in the SMD is a change
in the mean difference and not in the yardstick. Rubin's B and R summarise the linearized score.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field

import numpy as np

from ..errors import BalanceWarning, InputError

__all__ = ["BalanceResult", "balance_table", "smd_threshold", "CSV_COLUMNS", "TABLE_COLUMNS"]

#: |SMD| above this is flagged (common practice, e.g. Austin 2009).
smd_threshold = 0.1
#: Columns of ``balance.csv`` (and of :meth:`BalanceResult.to_frame`).
CSV_COLUMNS = ["covariate", "level", "smd_before", "smd_after", "var_ratio_before",
               "var_ratio_after", "ks_before", "ks_after", "flagged"]
#: Leading columns of the notebook table ``result.tables.balance``: the CSV's, with the term's
#: ``kind`` after its level (the CSV leaves ``kind`` out to keep its documented columns).
TABLE_COLUMNS = CSV_COLUMNS[:2] + ["kind"] + CSV_COLUMNS[2:]


@dataclass(frozen=True)
class BalanceResult:
    """Balance diagnostics.

    Attributes
    ----------
    rows : list of dict
        One per term: ``name, covariate, level, kind, smd_before, smd_after, var_ratio_before,
        var_ratio_after, ks_before, ks_after, flagged`` (None where undefined or infinite).
    max_abs_smd_before, max_abs_smd_after : float or None
        Largest |SMD| (``inf`` when a term is perfectly separated; None when undefined).
    rubin : dict
        ``B_before, R_before, B_after, R_after`` of the linearized score, plus ``B_ok_*`` (B <
        0.5) and ``R_rating_*`` ("good" in [4/5, 5/4], "acceptable" in [1/2, 2], else
        "too extreme"); empty without a logit.
    threshold : float
        The |SMD| flag threshold (0.1).
    flagged : list of str
        Names of flagged terms.
    adjusted : bool
        Whether after-adjustment weights were given.
    higher_order : HigherOrderBalance or None
        Squares and pairwise products (:mod:`stratagap.stratify.higher_order`), when checked.
    """

    rows: list
    max_abs_smd_before: float | None
    max_abs_smd_after: float | None
    rubin: dict
    threshold: float = smd_threshold
    flagged: list = field(default_factory=list)
    adjusted: bool = False
    higher_order: object = None

    def to_dict(self) -> dict:
        """JSON-ready builtins (non-finite numbers become None)."""
        return {
            "rows": [dict(r) for r in self.rows],
            "max_abs_smd_before": _num(self.max_abs_smd_before),
            "max_abs_smd_after": _num(self.max_abs_smd_after),
            "rubin": {k: (_num(v) if isinstance(v, float) else v) for k, v in self.rubin.items()},
            "threshold": float(self.threshold),
            "flagged": list(self.flagged),
            "adjusted": bool(self.adjusted),
            "higher_order": None if self.higher_order is None else self.higher_order.to_dict(),
        }

    def to_frame(self):
        """The ``balance.csv`` table as a pandas DataFrame (one row per term)."""
        import pandas as pd
        return pd.DataFrame([{c: r.get(c) for c in CSV_COLUMNS} for r in self.rows],
                            columns=CSV_COLUMNS)


def _num(v):
    if v is None:
        return None
    v = float(v)
    return v if np.isfinite(v) else None


def balance_table(X, t, terms, *, weights_after=None, logit=None) -> BalanceResult:
    """Standardized differences, variance ratios and KS distances, before and after.

    Parameters
    ----------
    X : array_like (n, p)
        Design matrix (used for terms that give a ``column``).
    t : array_like (n,)
        Exposure, 1 = exposed, 0 = reference.
    terms : sequence
        Objects with attributes ``name, covariate, level, kind`` ("binary"/"continuous") and
        ``values`` (float array, used when not None) or ``column`` (index into ``X``).
    weights_after : array_like (n,) or None
        Unit weights after adjustment (``strata.unit_weights``); None gives before-only.
    logit : array_like (n,) or None
        Linearized propensity score, for Rubin's B and R.

    Returns
    -------
    BalanceResult

    Notes
    -----
    Continuous SMD ``(m1 - m0) / sqrt((s1^2 + s0^2) / 2)``; binary SMD
    ``(p1 - p0) / sqrt((p1 (1 - p1) + p0 (1 - p0)) / 2)`` (Austin 2009, eqs. 1-2), sample
    variances with ``ddof=1``. After adjustment: weighted means over the same before-adjustment
    denominator (Stuart 2010). Weighted variances use the unbiased reliability-weights form
    ``sum w (x - m)^2 / (V1 - V2 / V1)``, ``V1 = sum w``, ``V2 = sum w^2``, which equals the
    ``ddof=1`` sample variance for equal weights. KS after adjustment compares weighted
    empirical distribution functions. Rubin's B is the absolute standardized difference of the
    mean logits, with the before-adjustment denominator also after adjustment (as for the SMD);
    R is the ratio of the logit variances, exposed over reference (Rubin 2001).

    References
    ----------
    Austin PC (2009). Balance diagnostics for comparing the distribution of baseline covariates
    between treatment groups in propensity-score matched samples. Statistics in Medicine
    28:3083-3107.
    Stuart EA (2010). Matching methods for causal inference: a review and a look forward.
    Statistical Science 25:1-21.
    Rubin DB (2001). Using propensity scores to help design observational studies: application
    to the tobacco litigation. Health Services & Outcomes Research Methodology 2:169-188.
    """
    X = np.asarray(X, dtype=np.float64)
    if X.ndim == 1:
        X = X[:, None]
    t = np.asarray(t)
    n = t.size
    if t.ndim != 1 or X.shape[0] != n:
        raise InputError(f"`X` must be (n, p) and `t` (n,), got {X.shape} and {t.shape}")
    if not np.all(np.isin(t, (0, 1))) or t.sum() == 0 or t.sum() == n:
        raise InputError("`t` must hold 0 (reference) and 1 (exposed) units of both groups")
    g1 = t == 1
    w = None
    if weights_after is not None:
        w = np.asarray(weights_after, dtype=np.float64)
        if w.shape != (n,) or not np.all(np.isfinite(w)) or np.any(w < 0):
            raise InputError("`weights_after` must be n finite non-negative weights; pass "
                             "strata.unit_weights(labels, t, estimand)")
        if w[g1].sum() <= 0 or w[~g1].sum() <= 0:
            raise InputError("`weights_after` gives a group zero total weight; every group "
                             "needs weighted units")
    rows, flagged = [], []
    max_before, max_after = None, None
    for term in terms:
        x = _term_values(term, X, n)
        kind = term.kind
        if kind not in ("binary", "continuous"):
            raise InputError(f"balance term {term.name!r} has kind {kind!r}; "
                             "use 'binary' or 'continuous'")
        x1, x0 = x[g1], x[~g1]
        m1, m0 = x1.mean(), x0.mean()
        if kind == "binary":
            denom = np.sqrt((m1 * (1 - m1) + m0 * (1 - m0)) / 2.0)  # Austin 2009, eq. 2
            vr_before = None
        else:
            v1 = x1.var(ddof=1) if x1.size > 1 else np.nan
            v0 = x0.var(ddof=1) if x0.size > 1 else np.nan
            denom = np.sqrt((v1 + v0) / 2.0)  # Austin 2009, eq. 1
            vr_before = _ratio(v1, v0)
        smd_before = _ratio(m1 - m0, denom)
        ks_before = _ks(x1, x0, None, None)
        smd_after = vr_after = ks_after = None
        if w is not None:
            a1, a0 = w[g1] > 0, w[~g1] > 0
            y1, y0, u1, u0 = x1[a1], x0[a0], w[g1][a1], w[~g1][a0]
            mw1, mw0 = np.average(y1, weights=u1), np.average(y0, weights=u0)
            smd_after = _ratio(mw1 - mw0, denom)  # Stuart 2010: before-adjustment denominator
            if kind == "continuous":
                vr_after = _ratio(_wvar(y1, u1, mw1), _wvar(y0, u0, mw0))
            ks_after = _ks(y1, y0, u1, u0)
        judged = smd_after if w is not None else smd_before
        is_flagged = bool(judged is not None and not np.isnan(judged)
                          and abs(judged) > smd_threshold)
        if is_flagged:
            flagged.append(str(term.name))
        max_before = _max_abs(max_before, smd_before)
        max_after = _max_abs(max_after, smd_after)
        rows.append({
            "name": str(term.name), "covariate": str(term.covariate),
            "level": None if term.level is None else str(term.level), "kind": kind,
            "smd_before": _num(smd_before), "smd_after": _num(smd_after),
            "var_ratio_before": _num(vr_before), "var_ratio_after": _num(vr_after),
            "ks_before": _num(ks_before), "ks_after": _num(ks_after), "flagged": bool(is_flagged),
        })
    rubin = {} if logit is None else _rubin(logit, g1, w, n)
    if flagged and w is not None:
        warnings.warn(f"{len(flagged)} term(s) remain imbalanced after stratification "
                      f"(|SMD| > {smd_threshold}): {', '.join(flagged)}; consider more strata, "
                      "squares or interactions of these in the score formula, or check overlap",
                      BalanceWarning, stacklevel=2)
    return BalanceResult(rows=rows, max_abs_smd_before=max_before, max_abs_smd_after=max_after,
                         rubin=rubin, flagged=flagged, adjusted=w is not None)


def _term_values(term, X, n):
    values = getattr(term, "values", None)
    if values is not None:
        x = np.asarray(values, dtype=np.float64)
    else:
        column = getattr(term, "column", None)
        if column is None or not 0 <= int(column) < X.shape[1]:
            raise InputError(f"balance term {term.name!r} has neither values nor a valid column")
        x = X[:, int(column)]
    if x.shape != (n,) or not np.all(np.isfinite(x)):
        raise InputError(f"balance term {term.name!r} needs {n} finite values")
    return x


def _ratio(a, b):
    """a / b with 0/0 -> 0 and a/0 -> +-inf; NaN stays NaN."""
    if np.isnan(a) or np.isnan(b):
        return np.nan
    if b == 0:
        return 0.0 if a == 0 else float(np.sign(a) * np.inf)
    return float(a / b)


def _max_abs(current, value):
    if value is None or np.isnan(value):
        return current
    return abs(value) if current is None else max(current, abs(value))


def _wvar(x, w, m):
    """Unbiased weighted variance with reliability weights (equals ddof=1 for equal weights)."""
    v1, v2 = w.sum(), np.sum(w * w)
    denom = v1 - v2 / v1
    if denom <= 0:
        return np.nan
    return float(np.sum(w * (x - m) ** 2) / denom)


def _ecdf(x, w, grid):
    order = np.argsort(x, kind="stable")
    xs = x[order]
    if w is None:
        cum = np.arange(1, x.size + 1, dtype=np.float64) / x.size
    else:
        cum = np.cumsum(w[order]) / w.sum()
    k = np.searchsorted(xs, grid, side="right")  # units at or below each grid point
    return np.where(k > 0, cum[np.maximum(k - 1, 0)], 0.0)


def _ks(x1, x0, w1, w0):
    """Two-sample Kolmogorov-Smirnov distance sup |F1 - F0| (weighted ECDFs when weights given)."""
    grid = np.unique(np.concatenate([x1, x0]))
    return float(np.max(np.abs(_ecdf(x1, w1, grid) - _ecdf(x0, w0, grid))))


def _rubin(logit, g1, w, n):
    l = np.asarray(logit, dtype=np.float64)
    if l.shape != (n,) or not np.all(np.isfinite(l)):
        raise InputError(f"`logit` must hold {n} finite values (the score model's logit)")
    l1, l0 = l[g1], l[~g1]
    v1, v0 = l1.var(ddof=1), l0.var(ddof=1)
    denom = np.sqrt((v1 + v0) / 2.0)
    out = {"B_before": abs(_ratio(l1.mean() - l0.mean(), denom)),  # Rubin 2001, B
           "R_before": _ratio(v1, v0)}  # Rubin 2001, R
    if w is not None:
        a1, a0 = w[g1] > 0, w[~g1] > 0
        u1, u0, k1, k0 = w[g1][a1], w[~g1][a0], l1[a1], l0[a0]
        m1, m0 = np.average(k1, weights=u1), np.average(k0, weights=u0)
        out["B_after"] = abs(_ratio(m1 - m0, denom))
        out["R_after"] = _ratio(_wvar(k1, u1, m1), _wvar(k0, u0, m0))
    else:
        out["B_after"] = out["R_after"] = None
    for when in ("before", "after"):
        B, R = out[f"B_{when}"], out[f"R_{when}"]
        out[f"B_ok_{when}"] = None if B is None or np.isnan(B) else bool(B < 0.5)
        out[f"R_rating_{when}"] = _rating(R)
    out["B_denominator"] = "before-adjustment pooled SD of the logit"
    return out


def _rating(R):
    if R is None or np.isnan(R):
        return None
    if 0.8 <= R <= 1.25:
        return "good"
    if 0.5 <= R <= 2.0:
        return "acceptable"
    return "too extreme"
