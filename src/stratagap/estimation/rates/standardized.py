"""The headline rate difference: group-specific Poisson models within strata, standardized.

Within each score stratum ``s`` and group ``g``, a Poisson model ``log E y = log PT + a + x'b``
is fitted to the group's units (statsmodels GLM, HC0 robust covariance, so overdispersed
counts do not shrink the interval). Its predicted rates ``r_g(x_j) = exp(a + x_j'b)`` are
averaged over the stratum's target units (ATE: every unit of the stratum; ATT: its exposed
units), **weighted by their person-time**:

    m_gs = sum_j PT_j r_g(x_j) / sum_j PT_j,     tau_s = m_1s - m_0s,

the expected events per unit of person-time had the target units' follow-up been spent
exposed (reference). The strata are combined with the target's person-time shares
``v_s = PT_target,s / PT_target`` (ATE: all units, ATT: the exposed), so the estimand is the
standardized rate difference of the target population's person-time, the quantity the crude
rates, the Mantel-Haenszel weights, the IP-weighted rates and the Poisson model's
standardization also speak of. It assumes the exposure does not change the follow-up time
itself (as every person-time analysis does). Note that these stratum weights are the
person-time shares, not the people shares ``w_s`` of the stratum layout used by the test.

Model rule (events per column, common practice after Peduzzi et al. 1995): a group's model uses
all covariate columns when its events in the stratum are at least ``EVENTS_PER_COLUMN`` times
their number, else the linear design (one column per covariate) under the same rule, else no
covariates (the group's crude rate ``E_gs / PT_gs`` in the stratum). A fit that fails or does
not converge, whose robust covariance is not positive, or whose predictions for the target
units exceed ``EXTRAPOLATION_LIMIT`` times the largest rate it fits to its own units, drops to
the next rung; each stratum records its rungs and why.

Variance (delta method): ``Var m_gs = g' V g`` with ``g = sum_j PT_j r_g(x_j) z_j / PT_T`` and
``V`` the model's HC0 covariance (the crude rung: ``E_gs / PT_gs^2``); the two groups' models
are fitted to disjoint units, so independent; plus the sampling variance of the person-time
average over the target units, ``sum_j PT_j^2 (d_j - tau_s)^2 / PT_T^2`` with
``d_j = r_1(x_j) - r_0(x_j)`` (the ratio-estimator linearisation, Cochran 1977 ch. 6). Across
strata ``Var = sum_s v_s^2 Var tau_s``; the CI is ``estimate +- z SE``.

References
----------
Peduzzi, P. et al. (1995). Importance of events per independent variable in proportional
hazards regression analysis. Journal of Clinical Epidemiology 48:1503-1510.
Cochran, W. G. (1977). Sampling Techniques, 3rd ed., Wiley, ch. 6 (ratio estimators).
Greenland, S. (2004). Model-based estimation of relative risks and other epidemiologic
measures in studies of common outcomes and in case-control studies. American Journal of
Epidemiology 160:301-305 (standardization of model predictions, from memory).
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import statsmodels.api as sm
from scipy import stats
from statsmodels.tools.sm_exceptions import ConvergenceWarning, PerfectSeparationWarning

from ..._base.linalg import ordered_independent_columns
from .._estimate import StratifiedEstimate

__all__ = ["standardized_rate_difference", "EVENTS_PER_COLUMN", "EXTRAPOLATION_LIMIT"]

#: A group's Poisson model in a stratum uses k covariate columns only with >= 10 k events.
EVENTS_PER_COLUMN = 10
#: A group's model may not predict, for a target unit, more than this multiple of the largest
#: rate it fits to its own units (our rule, against spline extrapolation into the other group's
#: covariate range; the rung below is used instead and the reason recorded).
EXTRAPOLATION_LIMIT = 3.0


def _fit(y, pt, Z):
    """Poisson GLM with offset; returns (params, HC0 cov) or None when it fails."""
    with warnings.catch_warnings():
        # a perfect-separation or convergence warning sends the group to the next rung
        for category in (ConvergenceWarning, PerfectSeparationWarning, RuntimeWarning):
            warnings.simplefilter("error", category)
        try:
            res = sm.GLM(y, Z, family=sm.families.Poisson(), offset=np.log(pt)).fit(
                cov_type="HC0", maxiter=100, tol=1e-10)
        except Exception:  # noqa: BLE001 - any failure moves to the next rung (recorded)
            return None
    if not res.converged or not np.all(np.isfinite(res.params)) \
            or not np.all(np.isfinite(res.cov_params())):
        return None
    return res.params, res.cov_params()


def _group_mean(y, pt, Xg, Xtarget, pt_target, n_linear):
    """Standardized rate of one group in one stratum: (m, var_model, per-target rates, rung)."""
    events = float(y.sum())
    rungs = []
    p_all = Xg.shape[1]
    for name, cols in (("all covariate columns", np.arange(p_all)),
                       ("linear design", np.arange(min(n_linear, p_all)))):
        if cols.size == 0 or events < EVENTS_PER_COLUMN * cols.size:
            rungs.append(f"{name}: {events:g} events < {EVENTS_PER_COLUMN} x {cols.size} columns"
                         if cols.size else f"{name}: no columns")
            continue
        Z = np.column_stack([np.ones(y.size), Xg[:, cols]])
        keep = ordered_independent_columns(Z)
        fit = _fit(y, pt, Z[:, keep])
        if fit is None:
            rungs.append(f"{name}: the Poisson fit failed or did not converge")
            continue
        params, cov = fit
        Zt = np.column_stack([np.ones(Xtarget.shape[0]), Xtarget[:, cols]])[:, keep]
        rate = np.exp(Zt @ params)
        own = np.exp(Z[:, keep] @ params)
        total = pt_target.sum()
        m = float(np.sum(pt_target * rate) / total)
        grad = (pt_target * rate) @ Zt / total  # delta method: d m / d params
        var = float(grad @ cov @ grad)
        if not np.isfinite(var) or var < 0:  # a near-singular design: the sandwich broke down
            rungs.append(f"{name}: the robust covariance is not positive (near-dependent "
                         "columns)")
            continue
        if rate.max() > EXTRAPOLATION_LIMIT * own.max():
            rungs.append(f"{name}: predictions for the target units reach "
                         f"{rate.max() / own.max():.3g} times the largest fitted rate of the "
                         f"group (limit {EXTRAPOLATION_LIMIT:g}): extrapolation")
            continue
        return m, var, rate, f"Poisson model on {name}", rungs
    m = events / float(pt.sum())  # crude rung: the group's rate in the stratum
    return (m, events / float(pt.sum()) ** 2, np.full(Xtarget.shape[0], m),
            "crude rate (no covariates)", rungs)


def standardized_rate_difference(y, t, person_time, X, labels, *, estimand, alpha=0.05,
                                 population="", n_linear=None) -> StratifiedEstimate:
    """Adjusted rate difference (exposed minus reference) within strata, standardized.

    Parameters
    ----------
    y : (n,) event counts
    t : (n,) 0/1 exposure
    person_time : (n,) positive person-time
    X : (n, p) covariate matrix (no intercept)
    labels : (n,) strata 0..S-1, each holding both groups
    estimand : {"ate", "att"}
        Target units: every unit (ATE) or the exposed (ATT).
    alpha : float, default 0.05
    population : str
        Label of the analysed population.
    n_linear : int, optional
        The first ``n_linear`` columns of X are the linear design (default: all).

    Returns
    -------
    StratifiedEstimate
        ``measure="rate difference"`` per unit of person-time; ``risk_exposed`` and
        ``risk_reference`` hold the standardized rates; ``per_stratum`` one dict per stratum.

    References
    ----------
    See :mod:`stratagap.estimation.rates.standardized`.
    """
    y = np.asarray(y, dtype=float)
    t = np.asarray(t)
    pt = np.asarray(person_time, dtype=float)
    X = np.asarray(X, dtype=float).reshape(y.size, -1)
    n_linear = X.shape[1] if n_linear is None else int(n_linear)
    ids = np.unique(labels)
    z = float(stats.norm.isf(alpha / 2))
    taus, variances, pt_target, rows, choices = [], [], [], [], []
    m1s, m0s = [], []
    for s in ids:
        ins = labels == s
        target = ins & (t == 1) if estimand == "att" else ins
        parts = {}
        for g in (1, 0):
            grp = ins & (t == g)
            parts[g] = _group_mean(y[grp], pt[grp], X[grp], X[target], pt[target], n_linear)
        (m1, v1, r1, how1, rungs1), (m0, v0, r0, how0, rungs0) = parts[1], parts[0]
        total = pt[target].sum()
        d = r1 - r0
        tau = m1 - m0
        v_avg = float(np.sum(pt[target] ** 2 * (d - tau) ** 2) / total ** 2)  # Cochran 1977 ch. 6
        var = v1 + v0 + v_avg
        taus.append(tau)
        variances.append(var)
        pt_target.append(total)
        m1s.append(m1)
        m0s.append(m0)
        se = math.sqrt(var)
        rows.append({"stratum": int(s), "n_exposed": int(np.sum(ins & (t == 1))),
                     "n_reference": int(np.sum(ins & (t == 0))),
                     "events_exposed": float(y[ins & (t == 1)].sum()),
                     "events_reference": float(y[ins & (t == 0)].sum()),
                     "person_time_exposed": float(pt[ins & (t == 1)].sum()),
                     "person_time_reference": float(pt[ins & (t == 0)].sum()),
                     "estimate": tau, "se": se, "ci_low": tau - z * se, "ci_high": tau + z * se,
                     "rate_exposed": m1, "rate_reference": m0,
                     "model": f"exposed: {how1}; reference: {how0}",
                     "reason": "; ".join(rungs1 + rungs0)})
        for grp_name, rungs in (("exposed", rungs1), ("reference", rungs0)):
            if rungs:
                choices.append(f"stratum {int(s)}, {grp_name}: " + "; ".join(rungs))
    v = np.asarray(pt_target) / np.sum(pt_target)  # person-time shares of the target
    for row, w in zip(rows, v):
        row["weight"] = float(w)
    est = float(np.sum(v * np.asarray(taus)))
    se = float(math.sqrt(np.sum(v ** 2 * np.asarray(variances))))
    choices.append("variance: delta method on each group's Poisson model (HC0) plus the "
                   "person-time average over the target units; strata combined with "
                   "the target's person-time shares")
    label = ("ATT" if estimand == "att" else "ATE")
    return StratifiedEstimate(
        estimate=est, se=se, ci_low=est - z * se, ci_high=est + z * se,
        measure="rate difference", estimand=label, population=population,
        method="group-specific Poisson models with log person-time offset within strata, "
               "predictions averaged over the target units weighted by person-time",
        alpha=alpha, per_stratum=rows, choices=choices,
        risk_exposed=float(np.sum(v * np.asarray(m1s))),
        risk_reference=float(np.sum(v * np.asarray(m0s))),
        variance_method="delta method (HC0 model covariance) + person-time averaging term",
        settings={"events_per_column": EVENTS_PER_COLUMN, "stratum_weights": "person-time",
                  "average_over": "target units, weighted by person-time"})
