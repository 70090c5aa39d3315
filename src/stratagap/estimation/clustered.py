"""Cluster-robust uncertainty for the headline and the plain stratified difference.

When the rows are patients of clusters (hospitals, clinics, regions), outcomes within a cluster
are correlated and the per-stratum HC2 variances of the headline understate its uncertainty.
:func:`clustered_estimate` refits the headline's own within-stratum models (the model and the
covariate columns each stratum used, the same centring) as one least-squares fit with
stratum-specific coefficients, so the estimate is unchanged to rounding, and replaces the
variance by the CR2 cluster-robust variance of the estimand-weighted contrast, with the
Bell-McCaffrey small-sample degrees of freedom and a t interval (see
:mod:`stratagap.estimation._cluster_robust`). Clusters may span strata.

Ratio measures (binary outcomes): the log risk or odds ratio is linearized in the standardized
risks ``p1 = sum_s w_s (a_s + tau_s)`` and ``p0 = sum_s w_s a_s`` (delta method), itself a
contrast of the coefficients, which gets its own CR2 variance and df; the interval is
``exp(log estimate +- t_df se)``.

References
----------
Bell & McCaffrey (2002), Survey Methodology 28:169-181; Pustejovsky & Tipton (2018), JBES
36:672-683 (from memory); Lin (2013), Annals of Applied Statistics 7:295-318.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass

import numpy as np
from scipy import stats

from .._base.jsonable import fields_dict
from ._cluster_robust import cluster_sandwich

__all__ = ["ClusterRobust", "clustered_estimate", "stratum_design", "ipw_cluster_sandwich"]


@dataclass(frozen=True)
class ClusterRobust:
    """A cluster-robust interval for one estimate (a row of the ``clusters`` block)."""

    name: str
    estimate: float
    se: float  # on the scale named by `scale`
    df: float
    ci_low: float
    ci_high: float
    scale: str
    variance: str  # "CR2 (Bell & McCaffrey 2002), t interval with Bell-McCaffrey df"
    n_clusters: int
    se_unclustered: float

    def to_dict(self) -> dict:
        return fields_dict(self)


def stratum_design(y, t, X, labels, per_stratum, names, estimand):
    """The headline's within-stratum models as one block-diagonal design.

    Returns ``(D, rows, a_cols, t_cols, ids)``: ``D`` (m, K) over the analysed rows ``rows``
    (labels >= 0), the column of each stratum's intercept and exposure coefficient, and the
    stratum labels in order. Each stratum's block is ``[1, t, Xc, t Xc]``, ``[1, t, Xc]`` or
    ``[1, t]`` as the headline chose (``per_stratum[i]["model"]``), with the columns it kept,
    centred as the headline centres them (ATE: stratum mean; ATT: stratum exposed mean), so
    the intercept and the exposure coefficient are the headline's ``a_s`` and ``tau_s``.
    """
    index = {name: j for j, name in enumerate(names)}
    rows = np.flatnonzero(labels >= 0)
    lab = labels[rows]
    blocks, a_cols, t_cols, ids, width = [], [], [], [], 0
    for entry in per_stratum:
        s = entry["stratum"]
        m = lab == s
        Xs, ts = X[rows[m]], t[rows[m]].astype(float)
        cols = [index[c] for c in entry["covariates"]] if entry["model"] != "difference of means" else []
        Z = Xs[:, cols]
        Z = Z - (Z.mean(axis=0) if estimand == "ate" else Z[ts == 1].mean(axis=0))
        parts = [np.ones(m.sum()), ts, Z]
        inter = [cols.index(index[c]) for c in entry.get("interacted", [])]
        if inter:  # "interactions" or "partial interactions" (the per-stratum record)
            parts.append(ts[:, None] * Z[:, inter])
        block = np.column_stack(parts)
        blocks.append((m, block, width))
        a_cols.append(width)
        t_cols.append(width + 1)
        ids.append(s)
        width += block.shape[1]
    D = np.zeros((rows.size, width))
    for m, block, offset in blocks:
        D[np.ix_(np.flatnonzero(m), np.arange(offset, offset + block.shape[1]))] = block
    return D, rows, np.array(a_cols), np.array(t_cols), ids


def clustered_estimate(estimate, y, t, X, labels, clusters, *, weights, names, estimand,
                       alpha, name="headline"):
    """The estimate with its CR2 variance, Bell-McCaffrey df and t interval.

    Parameters
    ----------
    estimate : StratifiedEstimate or Estimate
        The headline (or a ratio-measure headline), whose ``per_stratum`` models are refitted,
        or the plain stratified difference (a difference of means per stratum).
    y, t, X, labels : arrays of the analysed rows (labels >= 0)
    clusters : (m,) cluster codes of the same rows
    weights : (S,) stratum weights in the order of ``per_stratum``
    names : column names of ``X``
    estimand, alpha

    Returns
    -------
    (StratifiedEstimate, ClusterRobust)
        The estimate with ``se``, ``ci_low``, ``ci_high``, ``method`` and ``variance_method``
        replaced, and the row for the ``clusters`` block.
    """
    per = getattr(estimate, "per_stratum", None) or [  # the plain difference: [1, t] per stratum
        {"stratum": int(s), "model": "difference of means", "covariates": []}
        for s in np.unique(labels[labels >= 0])]
    D, rows, a_cols, t_cols, _ = stratum_design(y, t, X, labels, per, names, estimand)
    K = D.shape[1]
    c_p0, c_tau = np.zeros(K), np.zeros(K)
    c_p0[a_cols] = weights
    c_tau[t_cols] = weights
    ratio = estimate.scale == "log"
    if ratio:
        p1, p0 = estimate.risk_exposed, estimate.risk_reference
        if estimate.measure == "risk ratio":
            d1, d0 = 1 / p1, 1 / p0
        else:
            d1, d0 = 1 / (p1 * (1 - p1)), 1 / (p0 * (1 - p0))
        contrast = d1 * (c_p0 + c_tau) - d0 * c_p0  # delta method: linearized log ratio
    else:
        contrast = c_tau
    fit = cluster_sandwich(D, y[rows], clusters, contrast[:, None], kind="CR2")
    se = math.sqrt(max(float(fit.cov[0, 0]), 0.0))
    df = float(fit.df[0])
    q = float(stats.t.ppf(1 - alpha / 2, df)) if np.isfinite(df) else math.nan
    if ratio:
        centre = math.log(estimate.estimate)
        lo, hi = math.exp(centre - q * se), math.exp(centre + q * se)
    else:
        lo, hi = estimate.estimate - q * se, estimate.estimate + q * se
    text = ("CR2 cluster-robust variance (Bell & McCaffrey 2002) of the estimand-weighted "
            f"contrast over {fit.n_clusters} clusters, t interval with Bell-McCaffrey df "
            f"{df:.1f} (Pustejovsky & Tipton 2018)")
    row = ClusterRobust(name=name, estimate=float(estimate.estimate), se=se, df=df, ci_low=lo,
                        ci_high=hi, scale=estimate.scale, variance=text,
                        n_clusters=fit.n_clusters, se_unclustered=float(estimate.se))
    changes = dict(se=se, ci_low=lo, ci_high=hi,
                   method=estimate.method.replace("; HC2)", "; CR2 by cluster)")
                   + f"; {text}" * ("HC2" not in estimate.method))
    if hasattr(estimate, "variance_method"):
        changes["variance_method"] = text
        changes["choices"] = [c for c in estimate.choices
                              if not c.startswith("variance:")] + [f"variance: {text}"]
    return dataclasses.replace(estimate, **changes), row


def ipw_cluster_sandwich(y, t, score, clusters, *, estimand, alpha):
    """Hajek IPW difference with statsmodels' CR1 cluster sandwich (weights treated as known).

    Weighted least squares of ``y`` on ``[1, t]`` with ATE weights ``t/e + (1-t)/(1-e)`` or ATT
    weights ``t + (1-t) e/(1-e)`` (Hernan & Robins 2020, ch. 12); the exposure coefficient is
    the Hajek IPW estimate. ``statsmodels`` ``WLS(...).fit(cov_type="cluster")`` gives the CR1
    sandwich; ignoring the estimation of the score is usually conservative for the ATE
    (Lunceford & Davidian 2004), not guaranteed for the ATT.
    """
    import statsmodels.api as sm

    e = np.clip(np.asarray(score, dtype=float), 1e-6, 1 - 1e-6)
    t = np.asarray(t, dtype=float)
    w = t / e + (1 - t) / (1 - e) if estimand == "ate" else t + (1 - t) * e / (1 - e)
    D = np.column_stack([np.ones(t.size), t])
    fit = sm.WLS(np.asarray(y, dtype=float), D, weights=w).fit(
        cov_type="cluster", cov_kwds={"groups": np.asarray(clusters)})
    G = int(np.unique(clusters).size)
    est, se = float(fit.params[1]), float(fit.bse[1])
    q = float(stats.t.ppf(1 - alpha / 2, G - 1))  # G - 1 df, the usual rule for CR1
    return ClusterRobust(name="IPW (Hajek), pipeline score", estimate=est, se=se, df=float(G - 1),
                         ci_low=est - q * se, ci_high=est + q * se, scale="identity",
                         variance="CR1 cluster sandwich (statsmodels WLS cov_type='cluster'), "
                                  "weights treated as known, t interval with G - 1 df",
                         n_clusters=G, se_unclustered=float("nan"))
