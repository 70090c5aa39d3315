"""Cross-check estimators: does the gap survive across standard adjustment methods?

Beside the stratified headline, three marginal estimators of the same estimand on the same
analysed sample:

* **IPW** with Hájek (normalized) weights; the standard error comes from stacking the logistic
  score equations under the two weighted-mean equations (M-estimation sandwich), so it accounts
  for the estimated score (Lunceford & Davidian 2004). Treating the score as known is *not*
  guaranteed conservative for the ATT (Reifeis & Hudgens 2022); that SE is reported beside it
  only for comparison. Weight diagnostics: max weight, largest normalized weight share, Kish
  effective sample size per group; optional truncation at given percentiles (then a second IPW
  row with the truncated weights).
* **AIPW** (doubly robust): outcome regressions fitted separately in each group (OLS or logistic
  GLM), standard error from the estimated influence function.
* **Outcome regression with standardization** (g-formula): one outcome model with the exposure,
  the covariates and exposure x covariate interactions (default: all, which equals separate
  models per group), averaged over the estimand's population (everyone for the ATE, the exposed
  for the ATT); stacked-equation sandwich standard error.

All three are *marginal* estimands (``estimand_kind="marginal"``); the Mantel-Haenszel rows
that the pipeline adds are conditional. The score used here is always a plain logistic model
with intercept refitted on ``X`` (maximum likelihood, statsmodels), so that the stacked equations
are the ones actually solved; a pipeline score passed as ``score`` is only compared with it,
or used (treated as known) when the refit separates.

References
----------
Lunceford JK, Davidian M (2004). Stratification and weighting via the propensity score in
    estimation of causal treatment effects: a comparative study. Statistics in Medicine 23,
    2937-2960.
Reifeis SA, Hudgens MG (2022). On variance of the treatment effect in the treated when
    estimated by inverse probability weighting. American Journal of Epidemiology 191, 1092-1097.
Hernán MA, Robins JM (2020). Causal Inference: What If. Chapman & Hall/CRC, ch. 12-13.
Hahn J (1998). Econometrica 66, 315-331; Mercatanti A, Li F (2014). Annals of Applied
    Statistics 8, 2485-2508 (doubly robust ATT).
Kish L (1965). Survey Sampling. Wiley (effective sample size).
Cole SR, Hernán MA (2008). American Journal of Epidemiology 168, 656-664 (weight truncation).
"""

from __future__ import annotations

import functools
import math

import numpy as np
from scipy import stats

from ._aipw import aipw_fit, standardize_fit
from ..errors import InputError
from ._crosscheck_inputs import check_inputs as _check_inputs, outcome_columns as _outcome_columns
from ._ipw import MAX_SHARE_FLAG, _weight_parts, fit_score, flag_weights, ipw_fit, weight_summary
from ._crosscheck_result import (CrossCheckResult, CrossCheckRow, WeightDiagnostics,
                                compare_with_headline)

__all__ = [
    "cross_checks",
    "compare_with_headline",
    "ipw",
    "aipw",
    "standardize",
    "CrossCheckRow",
    "CrossCheckResult",
    "WeightDiagnostics",
]

_BLAS = None
#: Marginal risks closer than this to 0 or 1 leave ratios undefined (a group with no events).
_TINY = 1e-8


def _one_blas_thread(func):
    """Run the small model fits with one BLAS thread: much faster for n x (few) designs on a
    busy machine, and reproducible (BLAS sums do not depend on the thread count)."""

    @functools.wraps(func)
    def wrapper(*args, **kwargs):
        global _BLAS
        if _BLAS is None:
            from threadpoolctl import ThreadpoolController  # installed with scikit-learn

            _BLAS = ThreadpoolController()
        with _BLAS.limit(limits=1, user_api="blas"):
            return func(*args, **kwargs)

    return wrapper


# ----------------------------------------------------------------------------- contrasts
def _contrast(mu, cov, measure, alpha):
    """Estimate, SE, CI of difference / RR / OR from the means and their covariance (delta method)."""
    mu1, mu0 = float(mu[0]), float(mu[1])
    z = float(stats.norm.ppf(1 - alpha / 2))
    if measure == "difference":
        g = np.array([1.0, -1.0])
        est = mu1 - mu0
        se = float(np.sqrt(g @ cov @ g))
        return est, se, float(est - z * se), float(est + z * se), "difference"
    if measure == "rr":
        if not (mu1 > _TINY and mu0 > _TINY):
            return math.nan, math.nan, math.nan, math.nan, "log ratio"
        g = np.array([1.0 / mu1, -1.0 / mu0])  # d log(mu1/mu0)
        log_est = math.log(mu1 / mu0)
    else:
        if not (_TINY < mu1 < 1 - _TINY and _TINY < mu0 < 1 - _TINY):
            return math.nan, math.nan, math.nan, math.nan, "log ratio"
        g = np.array([1.0 / (mu1 * (1 - mu1)), -1.0 / (mu0 * (1 - mu0))])  # d log OR
        log_est = math.log(mu1 / (1 - mu1)) - math.log(mu0 / (1 - mu0))
    se = float(np.sqrt(g @ cov @ g))
    return math.exp(log_est), se, math.exp(log_est - z * se), math.exp(log_est + z * se), "log ratio"


def _row(method, fit, *, measure, alpha, estimand, label, se_method, notes=(), details=None):
    est, se, lo, hi, scale = _contrast(fit["mu"], fit["cov"], measure, alpha)
    notes = list(notes)
    if not math.isfinite(est):
        notes.append("a marginal risk is (almost) 0 or 1, so the ratio is undefined")
    return CrossCheckRow(
        method=method, estimate=est, se=se, ci_low=lo, ci_high=hi, measure=measure,
        se_scale=scale, estimand=label, estimand_kind="marginal",
        population="everyone analysed" if estimand == "ate" else "the exposed",
        mu1=float(fit["mu"][0]), mu0=float(fit["mu"][1]), se_method=se_method,
        notes=tuple(notes), details=details or {},
    )


def _label(estimand, estimand_label):
    return estimand_label if estimand_label is not None else estimand.upper()


# ----------------------------------------------------------------------------- public API
@_one_blas_thread
def ipw(y, t, X, *, estimand, outcome_type, alpha=0.05, measure="difference", truncate=None,
        estimand_label=None):
    """Hájek IPW estimate with the stacked-equation (M-estimation) standard error.

    Parameters
    ----------
    y, t, X : arrays
        Outcome (float; 0/1 if binary), exposure (1 exposed, 0 reference), covariate design
        without intercept. The score model is logistic on ``[1, X]``, refitted here.
    estimand : {"ate", "att"}
        ATE weights 1/e (exposed) and 1/(1-e) (reference); ATT weights 1 and e/(1-e).
    outcome_type : {"binary", "continuous"}
    alpha : float, default 0.05
    measure : {"difference", "rr", "or"}, default "difference"
    truncate : (lo, hi) percentiles or None
        Clip each group's weights at its own percentiles (Cole & Hernán 2008).
    estimand_label : str, optional
        Label for the rows (e.g. "ATE in the overlap population").

    Returns
    -------
    (CrossCheckRow, WeightDiagnostics)
        Row ``details`` hold ``se_known_score`` (SE treating the score as known).

    Notes
    -----
    Stacked equations (Lunceford & Davidian 2004): ``Z (t - e(Z beta)) = 0``,
    ``w1 (y - mu1) = 0``, ``w0 (y - mu0) = 0``; covariance ``A^{-1} B A^{-T} / n`` with the
    analytic derivative ``A``. With truncation the percentile limits are treated as fixed.
    """
    y, t, X, estimand, alpha, truncate, _ = _check_inputs(
        y, t, X, estimand, alpha, outcome_type, measure, truncate)
    sfit = _score_or_raise(t, X, None)
    fit = ipw_fit(y, t, sfit, estimand, truncate=truncate)
    diag = _diagnostics(fit, t, estimand, truncate)
    return _ipw_row(fit, measure, alpha, estimand, _label(estimand, estimand_label), truncate), diag


def _score_or_raise(t, X, score):
    sfit = fit_score(t, X, score)
    if sfit is None:
        raise InputError("the cross-check score model separates (a covariate pattern predicts "
                         "exposure perfectly); pass the pipeline's penalized `score` or drop that covariate")
    return sfit


def _ipw_row(fit, measure, alpha, estimand, label, truncate):
    method = "IPW (Hájek weights)"
    notes = []
    if truncate is not None:
        method = f"IPW (Hájek weights, truncated at percentiles {truncate[0]:g}-{truncate[1]:g})"
        notes.append("truncation changes the estimand slightly; percentile limits treated as fixed in the SE")
    if fit["score_ok"]:
        se_method = "stacked estimating equations (score estimated)"
    else:
        se_method = "sandwich treating the given score as known"
        notes.append("the logistic refit separated; the given score was used and treated as known")
    known = _contrast(fit["mu"], fit["cov_known_score"], measure, alpha)[1]
    return _row(method, fit, measure=measure, alpha=alpha, estimand=estimand, label=label,
                se_method=se_method, notes=notes, details={"se_known_score": known})


def _censoring_row(y, t, e, cw, measure, alpha, estimand, label, note):
    """Hájek IPW with each unit's weight multiplied by its inverse probability of an observed
    outcome (Hernán & Robins, What If, §12.6). The SE is the sandwich for the two weighted means
    with both sets of weights treated as known (the What If practice, from memory)."""
    w1, w0, _, _ = _weight_parts(e, t, estimand)
    mu, psi = np.empty(2), np.empty((len(y), 2))
    for j, w in enumerate((w1 * cw, w0 * cw)):
        mu[j] = np.sum(w * y) / np.sum(w)
        psi[:, j] = w * (y - mu[j]) / np.mean(w)  # influence of a Hájek mean, weights fixed
    fit = {"mu": mu, "cov": psi.T @ psi / len(y) ** 2}
    return _row("IPW x censoring weights (Hájek)", fit, measure=measure, alpha=alpha,
                estimand=estimand, label=label,
                se_method="sandwich treating the exposure and censoring weights as known",
                notes=["complete cases weighted by 1 / P(outcome observed | covariates, exposure)",
                       note])


def _diagnostics(fit, t, estimand, truncate):
    raw = weight_summary(fit["raw_weights"], t)
    flag_weights(raw)
    groups = ("exposed", "reference")
    trunc = weight_summary(fit["weights"], t) if truncate is not None else None
    return WeightDiagnostics(
        estimand=estimand,
        n={g: raw[g]["n"] for g in groups},
        max_weight={g: raw[g]["max_weight"] for g in groups},
        max_share={g: raw[g]["max_share"] for g in groups},
        ess={g: raw[g]["ess"] for g in groups},
        percentiles=truncate,
        truncation_bounds=fit["bounds"],
        n_truncated={"exposed": int(np.sum(fit["clipped"] & (t == 1))),
                     "reference": int(np.sum(fit["clipped"] & (t == 0)))},
        max_weight_truncated=None if trunc is None else {g: trunc[g]["max_weight"] for g in groups},
        ess_truncated=None if trunc is None else {g: trunc[g]["ess"] for g in groups},
        share_flag=MAX_SHARE_FLAG,
    )


@_one_blas_thread
def aipw(y, t, X, *, estimand, outcome_type, alpha=0.05, measure="difference", score=None,
         estimand_label=None):
    """Doubly robust augmented IPW estimate with an influence-function standard error.

    Outcome regressions are fitted separately in each group (OLS for continuous, logistic GLM
    for binary outcomes); the score is the logistic refit on ``[1, X]`` unless ``score`` is given.
    ATE: the usual augmented estimator (Lunceford & Davidian 2004). ATT:
    ``[sum t (y - m0) - sum (1-t) e/(1-e) (y - m0)] / sum t`` (Hahn 1998; Mercatanti & Li 2014).
    SE: square root of the empirical variance of the estimated influence function over n
    (nuisance estimation ignored: first-order valid when both models are right).
    """
    y, t, X, estimand, alpha, _, score = _check_inputs(
        y, t, X, estimand, alpha, outcome_type, measure, None, score)
    if score is None:
        score = _score_or_raise(t, X, None)["e"]
    return _aipw_row(y, t, X, score, estimand, outcome_type, measure, alpha,
                     _label(estimand, estimand_label))


def _aipw_row(y, t, X, score, estimand, outcome_type, measure, alpha, label):
    res = aipw_fit(y, t, X, score, estimand, outcome_type)
    model = "OLS" if outcome_type == "continuous" else "logistic GLM"
    return _row("AIPW (doubly robust)", res, measure=measure, alpha=alpha, estimand=estimand,
                label=label, se_method="empirical variance of the estimated influence function",
                notes=[f"outcome models: {model} fitted separately in each group"])


def _check_interactions(interactions, p):
    if isinstance(interactions, str):
        if interactions not in ("all", "none"):
            raise InputError(f"`interactions` must be 'all', 'none' or column indexes of X, got {interactions!r}")
        return interactions
    idx = list(np.atleast_1d(interactions))
    if any(isinstance(j, (bool, np.bool_)) or not isinstance(j, (int, np.integer)) or not 0 <= j < p for j in idx):
        raise InputError(f"`interactions` must be 'all', 'none' or column indexes 0..{p - 1} of X, got {interactions!r}")
    return tuple(sorted({int(j) for j in idx}))


@_one_blas_thread
def standardize(y, t, X, *, estimand, outcome_type, alpha=0.05, measure="difference",
                interactions="all", estimand_label=None):
    """Outcome regression with standardization (g-formula) and a stacked sandwich SE.

    Parameters
    ----------
    interactions : "all", "none" or sequence of int, default "all"
        Columns of ``X`` that interact with the exposure in the outcome model
        ``y ~ 1 + t + X + t * X[:, S]``. "all" equals separate models in each group.

    Notes
    -----
    ``mu_a`` is the mean of the model's prediction with the exposure set to ``a`` over
    everyone (ATE) or the exposed (ATT) (What If, section 13.3). The SE stacks the model's
    score equations and the averaging equations, so it also reflects the sampling of X.
    """
    y, t, X, estimand, alpha, _, _ = _check_inputs(y, t, X, estimand, alpha, outcome_type, measure)
    interactions = _check_interactions(interactions, X.shape[1])
    res = standardize_fit(y, t, X, estimand, outcome_type, interactions)
    model = "OLS" if outcome_type == "continuous" else "logistic GLM"
    which = ("exposure x every covariate (separate models per group)" if interactions == "all"
             else "no exposure interactions" if interactions == "none"
             else f"exposure x columns {list(interactions)}")
    return _row("Outcome regression, standardized", res, measure=measure, alpha=alpha,
                estimand=estimand, label=_label(estimand, estimand_label),
                se_method="stacked estimating equations (model and averaging)",
                notes=[f"outcome model: {model} with {which}"],
                details={"n_coefficients": res["n_coef"]})


@_one_blas_thread
def cross_checks(y, t, X, *, estimand, alpha=0.05, outcome_type, measure="difference",
                 truncate=None, score=None, interactions="all", estimand_label=None,
                 censoring_weights=None, censoring_score=None, n_linear=None):
    """Run IPW, AIPW and standardization on the same sample and estimand.

    Parameters
    ----------
    y, t, X : arrays
        The analysed rows (after overlap trimming): outcome, exposure (int8, 1 exposed), design.
    estimand : {"ate", "att"}
    alpha : float, default 0.05
    outcome_type : {"binary", "continuous"}
    measure : {"difference", "rr", "or"}, default "difference"
        Every row uses this measure; ratios only for binary outcomes.
    truncate : (lo, hi) or None
        When given, a second IPW row uses weights clipped at these within-group percentiles.
    score : array or None
        The pipeline's propensity score. The cross-checks use their own logistic refit (so the
        stacked SE is exact); ``score`` is compared with it and used, treated as known, only
        when the refit separates.
    interactions : passed to :func:`standardize`.
    estimand_label : str, optional
    censoring_weights : array or None
        Inverse probabilities of an observed outcome for these rows
        (:func:`stratagap.data.observed_weights`); when given, one more IPW row uses them.
    censoring_score : array or None
        The exposure score for that row, fitted on every row with complete covariates (also
        those whose outcome is missing); None uses this function's complete-case refit.
    n_linear : int, optional
        The first ``n_linear`` columns of ``X`` are the linear design, spline columns follow.
        The outcome models of AIPW and standardization (one per group) keep the spline columns
        only when each group has at least ``SPLINE_UNITS_PER_COLUMN`` (10) units per column,
        the headline's rule; otherwise they use the linear design, and a note says so (a
        matched sample of 150 pairs with four spline covariates gave outcome models that
        extrapolated to -88,000 on an effect near 1,500).

    Returns
    -------
    CrossCheckResult
    """
    y, t, X, estimand, alpha, truncate, score = _check_inputs(
        y, t, X, estimand, alpha, outcome_type, measure, truncate, score)
    _check_interactions(interactions, X.shape[1])
    label = _label(estimand, estimand_label)
    notes = []
    sfit = _score_or_raise(t, X, score)
    fit = ipw_fit(y, t, sfit, estimand)
    source = "logistic refit on X (maximum likelihood)" if fit["score_ok"] else "given score (refit separated)"
    if score is not None and fit["score_ok"]:
        gap = float(np.max(np.abs(score - fit["score"])))
        if gap > 1e-4:
            notes.append(f"the pipeline's score differs from the plain logistic refit used here "
                         f"(max |difference| {gap:.3g}), e.g. because it was penalized or not logistic")
    rows = [_ipw_row(fit, measure, alpha, estimand, label, None)]
    diag_fit = fit
    if truncate is not None:
        tfit = ipw_fit(y, t, sfit, estimand, truncate=truncate)
        rows.append(_ipw_row(tfit, measure, alpha, estimand, label, truncate))
        diag_fit = tfit
    if censoring_weights is not None:
        cw = np.asarray(censoring_weights, dtype=float)
        if cw.shape != y.shape or not np.all(np.isfinite(cw) & (cw > 0)):
            raise InputError("`censoring_weights` must be positive, finite and one per row")
        e_all = fit["score"] if censoring_score is None else np.asarray(censoring_score, float)
        note = ("exposure model fitted on every row with complete covariates" if censoring_score
                is not None else "exposure model fitted on the complete cases (the all-rows fit "
                "was not available)")
        rows.append(_censoring_row(y, t, e_all, cw, measure, alpha, estimand, label, note))
    X_out = _outcome_columns(X, t, n_linear, notes)
    rows.append(_aipw_row(y, t, X_out, fit["score"], estimand, outcome_type, measure, alpha, label))
    rows.append(standardize(y, t, X_out, estimand=estimand, outcome_type=outcome_type, alpha=alpha,
                            measure=measure, interactions=interactions, estimand_label=label))
    return CrossCheckResult(
        rows=tuple(rows), weights=_diagnostics(diag_fit, t, estimand, truncate),
        estimand=estimand, measure=measure, outcome_type=outcome_type, alpha=alpha,
        score_source=source, notes=tuple(notes))
