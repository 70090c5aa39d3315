"""Estimates beside the headline: RMST difference, hazard ratios, the crude risk difference.

* Restricted mean survival time up to the horizon, per stratum-group from the Kaplan-Meier
  curve, its variance from Klein & Moeschberger (2003, sec. 4.5); the difference combined with
  the estimand weights, ``Var = sum_s w_s^2 (V_1s + V_0s)`` (Royston & Parmar 2013).
* The hazard ratio of exposure from a Cox model stratified by the score strata (statsmodels
  ``PHReg`` with ``strata``, Breslow ties, covariates as in the test's model), with the robust
  (Lin & Wei 1989) interval: a *secondary* measure, not collapsible (Hernan 2010), so it is not
  the average of anything the headline reports.
* Stratum-specific hazard ratios: a Cox model of exposure alone within each stratum.
* The crude risk difference at the horizon: unadjusted Kaplan-Meier of each group on all
  complete-case rows, Greenwood variance, Wald interval.

References
----------
Klein, J. P. & Moeschberger, M. L. (2003). Survival Analysis, 2nd ed. Springer, sec. 4.5.
Royston, P. & Parmar, M. K. B. (2013). Restricted mean survival time: an alternative to the
hazard ratio for the design and analysis of randomized trials with a time-to-event outcome.
BMC Medical Research Methodology 13:152.
Lin, D. Y. & Wei, L. J. (1989). The robust inference for the Cox proportional hazards model.
JASA 84:1074-1078.
Hernan, M. A. (2010). The hazards of hazard ratios. Epidemiology 21:13-15.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass

import numpy as np
from scipy import stats

from ..._base.jsonable import jsonable
from ._curves import kaplan_meier, restricted_mean

__all__ = ["plain_risk_difference", "RestrictedMean", "HazardRatio", "rmst_difference", "hazard_ratio",
           "stratum_hazard_ratios", "crude_risk_difference"]


@dataclass(frozen=True)
class RestrictedMean:
    estimate: float
    se: float
    ci_low: float
    ci_high: float
    mean_exposed: float
    mean_reference: float
    horizon: float
    alpha: float
    method: str

    def to_dict(self) -> dict:
        return jsonable(self.__dict__)


def rmst_difference(time, event, t, codes, weights, horizon, *, alpha=0.05) -> RestrictedMean:
    """Estimand-weighted difference in restricted mean survival time up to ``horizon``."""
    mu = np.zeros((len(weights), 2))
    var = np.zeros((len(weights), 2))
    for s in range(len(weights)):
        for j, g in enumerate((1, 0)):
            rows = (codes == s) & (t == g)
            mu[s, j], var[s, j] = restricted_mean(kaplan_meier(time[rows], event[rows]), horizon)
    m1, m0 = float(weights @ mu[:, 0]), float(weights @ mu[:, 1])
    se = math.sqrt(float(np.sum(weights**2 * (var[:, 0] + var[:, 1]))))
    z = float(stats.norm.isf(alpha / 2))
    return RestrictedMean(estimate=m1 - m0, se=se, ci_low=m1 - m0 - z * se,
                          ci_high=m1 - m0 + z * se, mean_exposed=m1, mean_reference=m0,
                          horizon=float(horizon), alpha=alpha,
                          method="Kaplan-Meier area to the horizon within stratum-groups (not "
                                 "covariate-adjusted within strata), "
                                 "estimand weights; variance Klein & Moeschberger 2003 sec. 4.5")


@dataclass(frozen=True)
class HazardRatio:
    estimate: float | None
    se_log: float | None
    ci_low: float | None
    ci_high: float | None
    alpha: float
    method: str
    label: str = "secondary measure; hazard ratios are not collapsible"
    reason: str = ""

    def to_dict(self) -> dict:
        return jsonable(self.__dict__)


def _not_estimable(reason, alpha, method):
    return HazardRatio(None, None, None, None, alpha, method, reason=reason)


def hazard_ratio(time, event, t, X, codes, *, alpha=0.05) -> HazardRatio:
    """Hazard ratio of exposure, Cox model with baselines stratified by ``codes``, robust CI.

    ``X``: covariates of the model (may have 0 columns). Not estimable (reason given) when a
    group has no events.
    """
    from statsmodels.duration.hazard_regression import PHReg

    method = ("Cox model stratified by the score strata (statsmodels PHReg, Breslow ties), "
              "exposure and covariates, robust sandwich interval (Lin & Wei 1989)")
    for g, name in ((1, "exposed"), (0, "reference")):
        if event[t == g].sum() == 0:
            return _not_estimable(f"no events in the {name} group", alpha, method)
    design = np.column_stack([t.astype(float), np.asarray(X, float).reshape(t.size, -1)])
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        model = PHReg(time, design, status=event, strata=codes, ties="breslow")
        fit = model.fit()
    b = float(fit.params[0])
    se = _robust_se(model, fit)
    if not (math.isfinite(b) and math.isfinite(se)) or any(
            "converge" in str(w.message).lower() for w in caught):
        return _not_estimable("the stratified Cox model did not converge", alpha, method)
    z = float(stats.norm.isf(alpha / 2))
    return HazardRatio(math.exp(b), se, math.exp(b - z * se), math.exp(b + z * se), alpha,
                       method)


def _robust_se(model, fit) -> float:
    """Lin & Wei sandwich SE of the exposure coefficient, each unit its own cluster.

    statsmodels' own robust covariance (``fit(groups=...)``) gives NaN as soon as one unit was
    never at risk at an event time of its stratum (censored before the stratum's first event):
    its score residual is NaN there, where it is 0 (it enters no risk set). So the sandwich is
    formed here from the score residuals with those zeros, and the model-based inverse
    information: ``V = I^-1 (sum_i r_i r_i') I^-1``.
    """
    resid = np.nan_to_num(model.score_residuals(fit.params), nan=0.0)
    naive = np.asarray(fit.cov_params(), float)
    robust = naive @ (resid.T @ resid) @ naive
    return float(math.sqrt(robust[0, 0])) if robust[0, 0] >= 0 else float("nan")


def stratum_hazard_ratios(time, event, t, codes, *, alpha=0.05) -> list:
    """One Cox model of exposure alone per stratum (model-based SE); not estimable without events."""
    from statsmodels.duration.hazard_regression import PHReg

    z = float(stats.norm.isf(alpha / 2))
    out = []
    for s in range(int(codes.max()) + 1):
        rows = codes == s
        e1, e0 = float(event[rows & (t == 1)].sum()), float(event[rows & (t == 0)].sum())
        row = {"stratum": s + 1, "events_exposed": int(e1), "events_reference": int(e0),
               "estimate": None, "ci_low": None, "ci_high": None, "reason": ""}
        if e1 == 0 or e0 == 0:
            row["reason"] = "no events in the " + ("exposed" if e1 == 0 else "reference") + " group"
        else:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                fit = PHReg(time[rows], t[rows].astype(float)[:, None], status=event[rows],
                            ties="breslow").fit()
            b, se = float(fit.params[0]), float(fit.bse[0])
            if math.isfinite(b) and math.isfinite(se):
                row.update(estimate=math.exp(b), ci_low=math.exp(b - z * se),
                           ci_high=math.exp(b + z * se))
            else:
                row["reason"] = "the Cox model did not converge"
        out.append(row)
    return out


def crude_risk_difference(time, event, t, horizon, *, alpha=0.05) -> dict:
    """Unadjusted Kaplan-Meier risk difference at ``horizon`` with Greenwood's variance."""
    parts = {}
    for g, name in ((1, "exposed"), (0, "reference")):
        s, v = kaplan_meier(time[t == g], event[t == g]).at(horizon)
        parts[name] = (1.0 - float(s), float(v))
    est = parts["exposed"][0] - parts["reference"][0]
    se = math.sqrt(parts["exposed"][1] + parts["reference"][1])
    z = float(stats.norm.isf(alpha / 2))
    return {"estimate": est, "se": se, "ci_low": est - z * se, "ci_high": est + z * se,
            "risk_exposed": parts["exposed"][0], "risk_reference": parts["reference"][0]}


def plain_risk_difference(time, event, t, codes, weights, horizon, *, alpha=0.05) -> dict:
    """Estimand-weighted stratum Kaplan-Meier risk difference (unadjusted within strata).

    ``Var = sum_s w_s^2 (Greenwood_1s + Greenwood_0s)``; it carries the confounding left within
    the strata of the score and is reported beside the headline, never as it.
    """
    est, var = 0.0, 0.0
    for s in range(len(weights)):
        for g, sign in ((1, 1.0), (0, -1.0)):
            rows = (codes == s) & (t == g)
            sv, vv = kaplan_meier(time[rows], event[rows]).at(horizon)
            est += sign * weights[s] * (1.0 - float(sv))
            var += weights[s] ** 2 * float(vv)
    se = math.sqrt(var)
    z = float(stats.norm.isf(alpha / 2))
    return {"estimate": est, "se": se, "ci_low": est - z * se, "ci_high": est + z * se}
