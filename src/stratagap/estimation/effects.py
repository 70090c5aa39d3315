"""Effect estimates: crude, the stratified regression headline, and the secondary measures.

* :func:`crude`: the unadjusted difference, on all complete-case rows before any trimming.
* :func:`stratified_regression`: the headline. Subclassification on the propensity score with
  regression adjustment inside each stratum (Imbens & Rubin 2015, ch. 17), Lin's (2013)
  interacted, centred least squares per stratum with HC2 errors, combined with the estimand's
  stratum weights. Binary outcomes give a risk difference, or the ratio of the standardized
  (marginal) risks with ``measure="rr"|"or"``.
* :func:`plain_stratified_difference`: the stratum-weighted difference of means.
* :func:`mantel_haenszel`: conditional common-effect measures for binary outcomes.
* :func:`constant_effect`: the constant additive effect by inverting the covariance-adjusted
  stratified permutation test (Rosenbaum 2002); see :mod:`stratagap.estimation._inversion`.

Stratum weights follow the estimand: ATE ``n_s / n``, ATT ``n1_s / n1``. Rows labelled ``-1``
are ignored.

References
----------
Imbens, G. W. & Rubin, D. B. (2015). Causal Inference for Statistics, Social, and Biomedical
Sciences. Cambridge University Press, ch. 6, 10 and 17.
Lin, W. (2013). Agnostic notes on regression adjustments to experimental data: reexamining
Freedman's critique. Annals of Applied Statistics 7, 295-318.
Rosenbaum, P. R. (2002). Covariance adjustment in randomized experiments and observational
studies. Statistical Science 17, 286-327.
Imbens, G. W. (2004). Nonparametric estimation of average treatment effects under exogeneity:
a review. Review of Economics and Statistics 86, 4-29 (population, sample and conditional
average effects).
"""

from __future__ import annotations

import math
import warnings

import numpy as np
from scipy import stats

from . import _within_strata as _lin
from ..errors import InputError, ModelWarning
from ._estimate import (MATCHED_SET_MAX, CrudeEstimate, Estimate, StratifiedEstimate, _between_set_variance,
                        _check_alpha, _check_estimand, _check_labels, _check_X, _check_yt,
                        _layout, _matched_sets, _outcome_kind, _strata)
from ._inversion import ConstantEffect, constant_effect
from ._mantel_haenszel import mantel_haenszel

__all__ = ["Estimate", "StratifiedEstimate", "ConstantEffect", "crude", "stratified_regression",
           "plain_stratified_difference", "mantel_haenszel", "constant_effect"]

_MEASURES = {"difference", "rr", "or"}

#: The headline's inference target. Lin's HC2 variance is that of the estimate about the average
#: of the units' own effects, their covariates as observed (Imbens 2004, the conditional average
#: treatment effect); the interval for a wider population the units stand for would add the
#: spread of the effect across covariates, Var(tau(X)) / n (docs/methods.md, section 7).
CI_FOR = ("the average effect over the analysed units, their covariates as observed "
          "(a sample average)")


def _normal_ci(est, se, alpha):
    z = float(stats.norm.ppf(1 - alpha / 2))
    return float(est - z * se), float(est + z * se)


def _label(estimand, population):
    return population if population else estimand.upper()


# --------------------------------------------------------------------------- crude
def crude(y, t, outcome_type, *, alpha=0.05, measure="difference") -> Estimate:
    """Unadjusted difference between the groups, on all complete-case rows before trimming.

    Parameters
    ----------
    y : array (n,)
        Outcome (0/1 for binary outcomes).
    t : array (n,)
        Exposure, 1 = exposed, 0 = reference.
    outcome_type : {"continuous", "binary"}
    alpha : float, default 0.05
        The CI has level ``1 - alpha``.
    measure : {"difference", "rr", "or"}, default "difference"
        Binary outcomes: the scale of the comparison, the headline's own.

    Returns
    -------
    Estimate
        Continuous: difference of means with the Welch SE and the Welch-Satterthwaite t
        interval (Welch 1947). Binary (a ``CrudeEstimate``, which adds each group's risk
        ``risk_exposed``, ``risk_reference``): risk difference with the Wald SE
        ``sqrt(p1 q1 / n1 + p0 q0 / n0)`` and a normal interval; risk ratio with the log-scale
        SE ``sqrt(q1 / (n1 p1) + q0 / (n0 p0))`` (Katz et al. 1978); odds ratio with Woolf's
        log-scale SE ``sqrt(1/a + 1/b + 1/c + 1/d)`` (Woolf 1955).

    References
    ----------
    Welch, B. L. (1947). The generalization of 'Student's' problem when several different
    population variances are involved. Biometrika 34, 28-35.
    Katz, D., Baptista, J., Azen, S. P. & Pike, M. C. (1978). Obtaining confidence intervals for
    the risk ratio in cohort studies. Biometrics 34, 469-474.
    Woolf, B. (1955). On estimating the relation between blood group and disease. Annals of
    Human Genetics 19, 251-253.
    """
    alpha = _check_alpha(alpha)
    y, t = _check_yt(y, t)
    kind = _outcome_kind(y, outcome_type)
    y1, y0 = y[t == 1], y[t == 0]
    n1, n0 = len(y1), len(y0)
    if min(n1, n0) < 2:
        raise InputError(f"crude comparison needs at least 2 units per group; found {n1} exposed "
                         f"and {n0} reference")
    est = y1.mean() - y0.mean()
    if kind == "continuous":
        v1, v0 = y1.var(ddof=1) / n1, y0.var(ddof=1) / n0
        se = math.sqrt(v1 + v0)  # Welch 1947
        df = (v1 + v0) ** 2 / (v1 ** 2 / (n1 - 1) + v0 ** 2 / (n0 - 1)) if se > 0 else math.inf
        q = stats.t.ppf(1 - alpha / 2, df)  # Welch-Satterthwaite degrees of freedom
        lo, hi = est - q * se, est + q * se
        measure, method = "mean difference", "Welch two-sample interval"
    elif measure in ("rr", "or"):
        return _crude_ratio(y1, y0, measure, alpha)
    else:
        p1, p0 = y1.mean(), y0.mean()
        se = math.sqrt(p1 * (1 - p1) / n1 + p0 * (1 - p0) / n0)  # Wald
        lo, hi = _normal_ci(est, se, alpha)
        return CrudeEstimate(float(est), float(se), float(lo), float(hi), "risk difference",
                             "crude (unadjusted)",
                             f"all complete-case rows before trimming (n = {n1 + n0})",
                             "crude (unadjusted), all complete-case rows before trimming; "
                             "Wald interval", alpha, risk_exposed=float(p1),
                             risk_reference=float(p0))
    return Estimate(float(est), float(se), float(lo), float(hi), measure,
                    "crude (unadjusted)", f"all complete-case rows before trimming (n = {n1 + n0})",
                    f"crude (unadjusted), all complete-case rows before trimming; {method}",
                    alpha)


def _crude_ratio(y1, y0, measure, alpha) -> Estimate:
    """Crude risk or odds ratio with its log-scale interval; nan when a cell is empty."""
    a, n1 = float(y1.sum()), len(y1)
    c, n0 = float(y0.sum()), len(y0)
    b, d = n1 - a, n0 - c
    population = f"all complete-case rows before trimming (n = {n1 + n0})"
    if measure == "rr":
        name, method = "risk ratio", "log-scale interval (Katz et al. 1978)"
        ok = a > 0 and c > 0
        est = (a / n1) / (c / n0) if ok else math.nan
        se = math.sqrt(b / (a * n1) + d / (c * n0)) if ok else math.nan  # Katz et al. 1978
    else:
        name, method = "odds ratio", "log-scale interval (Woolf 1955)"
        ok = min(a, b, c, d) > 0
        est = (a * d) / (b * c) if ok else math.nan
        se = math.sqrt(1 / a + 1 / b + 1 / c + 1 / d) if ok else math.nan  # Woolf 1955
    z = float(stats.norm.ppf(1 - alpha / 2))
    lo, hi = (math.exp(math.log(est) - z * se), math.exp(math.log(est) + z * se)) if ok \
        else (math.nan, math.nan)
    return CrudeEstimate(float(est), float(se), float(lo), float(hi), name, "crude (unadjusted)",
                         population,
                         f"crude (unadjusted), all complete-case rows before trimming; {method}",
                         alpha, scale="log", risk_exposed=a / n1, risk_reference=c / n0)


# --------------------------------------------------------------------------- headline
def stratified_regression(y, t, X, labels, *, estimand, measure="difference", alpha=0.05,
                          interaction_min_extra=2, population=None, outcome_type=None,
                          names=None, layout=None, n_linear=None) -> StratifiedEstimate:
    """Subclassification with regression adjustment within strata (the headline estimate).

    Parameters
    ----------
    y, t : arrays (n,)
        Outcome and 0/1 exposure.
    X : array (n, p)
        Covariates (no intercept column).
    labels : int array (n,)
        Stratum labels; ``-1`` rows are ignored. Every stratum must hold both groups.
    estimand : {"ate", "att"}
        Centring point and stratum weights: ATE centres at the stratum mean with weights
        ``n_s / n``; ATT at the stratum's exposed mean with weights ``n1_s / n1``.
    measure : {"difference", "rr", "or"}, default "difference"
        ``"rr"``/``"or"`` (binary outcomes): ratio of the standardized risks.
    alpha : float, default 0.05
    interaction_min_extra : int, default 2
        Interactions need at least ``p + interaction_min_extra`` units of each group.
    population : str, optional
        Estimand label to show instead of "ATE"/"ATT" (e.g. "ATE in the overlap population").
    outcome_type : {"binary", "continuous"}, optional
        Default: binary when every value is 0 or 1.
    names : list of str, optional
        Column names of ``X`` for the recorded choices.
    layout : :class:`stratagap._base.layout.StratumLayout`, optional
        The caller's layout of the rows with ``labels >= 0`` for ``estimand`` (its weights are
        used); None builds it here.
    n_linear : int, optional
        The first ``n_linear`` columns of ``X`` are the linear design and the rest spline
        columns; the spline columns enter under an overfitting guard of 10 units per column
        (see :mod:`stratagap.estimation._within_strata`). None: every column is linear.

    Returns
    -------
    StratifiedEstimate

    Notes
    -----
    Within stratum ``s``, OLS of ``y`` on ``[1, t, Xc, t Xc]`` with ``Xc`` centred as above; the
    exposure coefficient ``tau_s`` is the stratum's average effect even when effects vary
    (Lin 2013), with the HC2 variance ``V_s``. The model is simplified when needed (see
    :mod:`stratagap.estimation._within_strata`) and every choice is recorded. ``tau = sum_s w_s tau_s``,
    ``SE = sqrt(sum_s w_s^2 V_s)`` (strata independent), normal CI. When every stratum is a
    pair or matched set (one unit in a group, at most 10 units), the variance is the weighted
    between-set variance ``S/(S-1) sum_s w_s^2 (tau_s - tau)^2`` (Imbens & Rubin 2015,
    ch. 10), which needs no within-set variance. For binary outcomes the model is a linear
    probability model; with ``a_s`` the intercept (mean predicted reference risk over the
    stratum's target units), ``p1 = sum_s w_s (a_s + tau_s)``, ``p0 = sum_s w_s a_s``,
    ``RR = p1/p0``, ``OR = [p1/(1-p1)] / [p0/(1-p0)]``, with delta-method CIs on the log scale
    from the HC2 covariance of ``(a_s, tau_s)``.

    References
    ----------
    Imbens & Rubin (2015), ch. 10 and 17; Lin (2013); MacKinnon & White (1985), J.
    Econometrics 29, 305-325 (HC2).
    """
    alpha = _check_alpha(alpha)
    estimand = _check_estimand(estimand)
    if measure not in _MEASURES:
        raise InputError(f"`measure` must be one of 'difference', 'rr', 'or'; got {measure!r}")
    if isinstance(interaction_min_extra, bool) or not isinstance(interaction_min_extra,
                                                                 (int, np.integer)) \
            or interaction_min_extra < 0:
        raise InputError("`interaction_min_extra` must be a non-negative integer, got "
                         f"{interaction_min_extra!r}")
    y, t = _check_yt(y, t)
    X = _check_X(X, len(y))
    labels = _check_labels(labels, len(y))
    kind = _outcome_kind(y, outcome_type)
    if measure != "difference" and kind != "binary":
        raise InputError(f"`measure` {measure!r} needs a binary (0/1) outcome; use "
                         "measure='difference' for a continuous outcome")
    names = list(names) if names is not None else [f"x{j}" for j in range(X.shape[1])]
    _strata(t, labels)  # every stratum holds both groups
    layout = _layout(t, labels, estimand, layout)
    ids, n1, n0, w = layout.ids, layout.n1, layout.n0, layout.weights
    matched = _matched_sets(n1, n0)
    fits = []
    for s in ids:
        m = labels == s
        fits.append(_lin.fit_stratum(y[m], t[m], X[m], estimand=estimand,
                                     min_extra=int(interaction_min_extra), names=names,
                                     n_linear=n_linear))
    tau = np.array([f["tau"] for f in fits])
    a = np.array([f["a"] for f in fits])
    covs = np.array([f["cov"] for f in fits])
    v_tau = covs[:, 1, 1]
    est = float(np.sum(w * tau))  # Imbens & Rubin 2015, ch. 17: estimand-weighted stratum effects
    choices = []
    if matched:
        var = _between_set_variance(tau, w)
        variance_method = ("between-set variance of within-set differences (Imbens & Rubin "
                           "2015, ch. 10): every stratum is a pair or matched set")
    else:
        var = float(np.sum(w ** 2 * v_tau))  # independent strata
        variance_method = "sum over strata of w_s^2 x HC2 variance (strata independent)"
    choices.append(f"variance: {variance_method}")
    for s, f in zip(ids, fits):
        if f["reason"] != "all checks passed":
            choices.append(f"stratum {int(s)}: {f['model']} ({f['reason']})")
    # dropping constant or collinear columns leaves the fit unchanged: recorded, not warned
    # with spline columns, main-effect splines are a planned rung of the overfitting guard
    # partial interactions: the slopes one group cannot estimate (or, with splines, the guard's
    # excess columns) are shared, recorded per stratum and not warned
    planned = ("interactions", "partial interactions") if n_linear is None \
        or n_linear >= X.shape[1] else ("interactions", "partial interactions", "main effects")
    simplified = [(s, f) for s, f in zip(ids, fits)
                  if f["model"] not in planned and X.shape[1] > 0]
    if simplified and not matched:
        listing = "; ".join(f"stratum {int(s)}: {f['model']}" for s, f in simplified[:5])
        warnings.warn(f"stratified regression simplified the outcome model in {len(simplified)} "
                      f"of {len(ids)} strata ({listing}{'; ...' if len(simplified) > 5 else ''});"
                      " see the per-stratum choices", ModelWarning, stacklevel=2)
    if not np.isfinite(var):
        bad = [int(s) for s, v in zip(ids, v_tau) if not np.isfinite(v)]
        warnings.warn(f"stratified regression: variance not estimable in strata {bad[:5]} (one "
                      "unit per group); merge strata or supply matched sets", ModelWarning,
                      stacklevel=2)
    z = float(stats.norm.ppf(1 - alpha / 2))
    per = []
    for s, f, ws, a1, a0 in zip(ids, fits, w, n1, n0):
        se_s = math.sqrt(f["cov"][1, 1]) if np.isfinite(f["cov"][1, 1]) else math.nan
        per.append({"stratum": int(s), "n_exposed": int(a1), "n_reference": int(a0),
                    "estimate": f["tau"], "se": se_s, "ci_low": f["tau"] - z * se_s,
                    "ci_high": f["tau"] + z * se_s, "model": f["model"], "reason": f["reason"],
                    "covariates": f["columns"], "interacted": f["interacted"],
                    "weight": float(ws),
                    "reference_mean": f["a"]})
    p1 = p0 = None
    se = math.sqrt(var) if var >= 0 else math.nan
    out_measure = "risk difference" if kind == "binary" else "mean difference"
    scale = "identity"
    lo, hi = _normal_ci(est, se, alpha)
    if kind == "binary":
        p1, p0 = float(np.sum(w * (a + tau))), float(np.sum(w * a))  # standardized risks
    if measure != "difference":
        est, se, lo, hi = _ratio(measure, p1, p0, w, covs, alpha, matched, a, tau)
        out_measure = "risk ratio" if measure == "rr" else "odds ratio"
        scale = "log"
    S = len(ids)
    method = (f"subclassification with regression adjustment within {S} strata (Lin 2013 "
              "interacted least squares, covariates centred at the "
              f"{'stratum mean' if estimand == 'ate' else 'stratum exposed mean'}; HC2)")
    if measure != "difference":
        method += "; ratio of standardized (marginal) risks, delta method on the log scale"
    settings = {"interaction_min_extra": int(interaction_min_extra),
                "spline_units_per_column": _lin.SPLINE_UNITS_PER_COLUMN,
                "extrapolation_ratio": _lin.EXTRAPOLATION_RATIO,
                "leverage_tolerance": _lin.LEVERAGE_TOL, "matched_set_max": MATCHED_SET_MAX,
                "estimand": estimand}
    return StratifiedEstimate(
        float(est), float(se), float(lo), float(hi), out_measure, _label(estimand, population),
        f"{int(n1.sum() + n0.sum())} units in {S} strata ({int(n1.sum())} exposed, "
        f"{int(n0.sum())} reference)", method, alpha, scale, per, choices, p1, p0,
        variance_method, settings, CI_FOR)


def _ratio(measure, p1, p0, w, covs, alpha, matched, a, tau):
    """Log-scale delta-method CI for the ratio of standardized risks."""
    if not (0 < p0 < 1 and 0 < p1 < 1):
        warnings.warn(f"standardized risks outside (0, 1) (exposed {p1:.4g}, reference {p0:.4g}):"
                      f" the {measure.upper()} is not defined; report the risk difference",
                      ModelWarning, stacklevel=3)
        return math.nan, math.nan, math.nan, math.nan
    if measure == "rr":
        log_est = math.log(p1) - math.log(p0)
        d1, d0 = 1 / p1, 1 / p0  # d log p / dp
    else:
        log_est = math.log(p1 / (1 - p1)) - math.log(p0 / (1 - p0))
        d1, d0 = 1 / (p1 * (1 - p1)), 1 / (p0 * (1 - p0))  # d logit p / dp
    # gradient with respect to (a_s, tau_s): p1 depends on both, p0 on a_s only
    g = np.column_stack([w * (d1 - d0), w * d1])
    if matched:
        # between-set analogue of _between_set_variance for the linearized log ratio:
        # S/(S-1) sum_s w_s^2 u_s^2, u_s = d1 (m1_s - p1) - d0 (m0_s - p0)
        u = d1 * (a + tau - p1) - d0 * (a - p0)
        S = len(a)
        var = S / (S - 1) * np.sum(w ** 2 * u ** 2) if S > 1 else math.nan
    else:
        var = float(np.einsum("si,sij,sj->", g, covs, g))  # strata independent
    se = math.sqrt(var) if var >= 0 else math.nan
    z = float(stats.norm.ppf(1 - alpha / 2))
    return math.exp(log_est), se, math.exp(log_est - z * se), math.exp(log_est + z * se)


# --------------------------------------------------------------------------- plain
def plain_stratified_difference(y, t, labels, *, estimand, alpha=0.05,
                                population=None, layout=None) -> Estimate:
    """Stratum-weighted difference of group means, ``sum_s w_s (ybar1_s - ybar0_s)``.

    Variance: Neyman, ``sum_s w_s^2 (s1^2/n1 + s0^2/n0)`` (Imbens & Rubin 2015, ch. 9);
    a stratum with a group of one unit uses its pooled within-stratum variance for both groups;
    when every stratum is a pair or matched set, the between-set variance of the within-set
    differences (Imbens & Rubin 2015, ch. 10) as in :func:`stratified_regression`.
    ``layout``: as for :func:`stratified_regression`.
    """
    alpha = _check_alpha(alpha)
    estimand = _check_estimand(estimand)
    y, t = _check_yt(y, t)
    labels = _check_labels(labels, len(y))
    kind = _outcome_kind(y, None)
    _strata(t, labels)  # every stratum holds both groups
    layout = _layout(t, labels, estimand, layout)
    ids, n1, n0, w = layout.ids, layout.n1, layout.n0, layout.weights
    res = [_lin.difference_of_means(y[labels == s], t[labels == s].astype(float)) for s in ids]
    tau = np.array([r[1] for r in res])
    v = np.array([r[2][1, 1] for r in res])
    est = float(np.sum(w * tau))
    if _matched_sets(n1, n0):
        var, rule = _between_set_variance(tau, w), "between-set variance (matched sets)"
    else:
        var, rule = float(np.sum(w ** 2 * v)), "Neyman variance"
    se = math.sqrt(var) if np.isfinite(var) else math.nan
    lo, hi = _normal_ci(est, se, alpha)
    return Estimate(est, se, float(lo), float(hi),
                    "risk difference" if kind == "binary" else "mean difference",
                    _label(estimand, population),
                    f"{int(n1.sum() + n0.sum())} units in {len(ids)} strata",
                    f"stratified difference of means (unadjusted within strata); {rule}", alpha)
