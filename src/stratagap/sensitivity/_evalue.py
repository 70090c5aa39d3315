"""E-values for an adjusted estimate and its confidence limit (VanderWeele & Ding 2017).

The E-value is the minimum strength of association, on the risk-ratio scale, that an
unmeasured confounder would need with both the exposure and the outcome, conditional on the
measured covariates, to fully explain away the observed association.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import asdict, dataclass

import numpy as np
from scipy import stats

from .._base.checks import check_alpha
from ..errors import InputError, ModelWarning
from .._base.jsonable import jsonable as _jsonable

__all__ = ["EValue", "e_value", "headline_e_value", "pooled_sd", "RARE_OUTCOME_THRESHOLD"]

#: Outcome risk at or below which an odds ratio is read as a risk ratio (VanderWeele & Ding 2017).
RARE_OUTCOME_THRESHOLD = 0.15

#: Factor converting a standardized mean difference to an approximate log risk ratio
#: (VanderWeele & Ding 2017, after Chinn 2000: log OR ~ 1.81 d and sqrt(OR) ~ RR).
SMD_TO_LOG_RR = 0.91

_MEASURES = {
    "rr": "rr", "risk_ratio": "rr", "hr": "rr",
    "or": "or", "odds_ratio": "or",
    "difference": "difference", "mean_difference": "difference",
}



@dataclass(frozen=True)
class EValue:
    """E-values of a point estimate and of its confidence limit closer to the null.

    Attributes
    ----------
    point : float
        E-value of the point estimate (1 when the estimate is at the null).
    ci_limit : float
        E-value of the confidence limit closer to the null; 1 when the interval includes the null.
    computed_from : str
        Plain text naming the estimate and the conversion to the risk-ratio scale.
    rr_used : float
        Risk ratio (oriented to be >= 1) that the point E-value was computed from.
    rr_limit_used : float or None
        Risk ratio (oriented to be >= 1) for the limit, None when the interval includes the null.
    limit : str
        Which limit was used: "lower", "upper" or "none (interval includes the null)".
    measure : str
        "rr", "or" or "difference".
    alpha : float
        Two-sided level of the interval (the limit of a mean difference uses z = Phi^-1(1 - alpha/2)).
    conversion : str
        Short name of the conversion ("risk ratio", "odds ratio as risk ratio (rare outcome)",
        "sqrt(odds ratio) (common outcome)", "exp(0.91 d), d = difference / pooled within-group SD").
    """

    point: float
    ci_limit: float
    computed_from: str
    rr_used: float
    rr_limit_used: float | None
    limit: str
    measure: str
    alpha: float
    conversion: str
    estimate: float
    ci_low: float
    ci_high: float
    outcome_sd: float | None = None
    baseline_risk: float | None = None

    def to_dict(self) -> dict:
        return _jsonable(asdict(self))


def _e_of_rr(rr: float) -> float:
    """E-value of a risk ratio: RR + sqrt(RR (RR - 1)), after turning RR < 1 into 1/RR."""
    if rr < 1.0:
        rr = 1.0 / rr  # VanderWeele & Ding 2017: protective estimates are inverted first
    return rr + math.sqrt(rr * (rr - 1.0))  # VanderWeele & Ding 2017, eq. for E-value


def _finite(name, value):
    try:
        value = float(value)
    except (TypeError, ValueError):
        raise InputError(f"`{name}` must be a number, got {value!r}; pass the estimate on its own scale") from None
    if not math.isfinite(value):
        raise InputError(f"`{name}` must be finite, got {value}; an E-value needs a finite estimate and interval")
    return value


def _e_value_iv(estimate, ci_low, ci_high, measure, outcome_sd, se, alpha, baseline_risk):
    if measure not in _MEASURES:
        raise InputError(f"`measure` must be one of 'rr', 'or', 'difference', got {measure!r}")
    measure = _MEASURES[measure]
    estimate, ci_low, ci_high = (_finite(n, v) for n, v in
                                 (("estimate", estimate), ("ci_low", ci_low), ("ci_high", ci_high)))
    if not ci_low <= estimate <= ci_high:
        raise InputError(f"`ci_low` <= `estimate` <= `ci_high` is required, got {ci_low} <= {estimate} <= "
                         f"{ci_high}; pass the interval limits in order")
    alpha = check_alpha(alpha)
    if measure in ("rr", "or") and ci_low <= 0.0:
        raise InputError(f"`estimate` and its interval must be positive for measure {measure!r}, "
                         f"got ci_low={ci_low}; pass the ratio itself, not its logarithm")
    if measure == "or":
        if baseline_risk is None:
            raise InputError("`baseline_risk` is required for measure 'or' (the outcome risk decides between "
                             "the rare- and common-outcome conversions); pass the outcome proportion")
        baseline_risk = _finite("baseline_risk", baseline_risk)
        if not 0.0 <= baseline_risk <= 1.0:
            raise InputError(f"`baseline_risk` must be a proportion in [0, 1], got {baseline_risk}")
    if measure == "difference":
        if outcome_sd is None:
            raise InputError("`outcome_sd` is required for measure 'difference': pass the pooled within-group "
                             "SD of the outcome")
        outcome_sd = _finite("outcome_sd", outcome_sd)
        if outcome_sd <= 0.0:
            raise InputError(f"`outcome_sd` must be positive, got {outcome_sd}; a constant outcome has no E-value")
        if se is not None:
            se = _finite("se", se)
            if se < 0.0:
                raise InputError(f"`se` must be non-negative, got {se}")
    return estimate, ci_low, ci_high, measure, outcome_sd, se, alpha, baseline_risk


def e_value(estimate, ci_low, ci_high, *, measure, outcome_sd=None, se=None, alpha=0.05,
            baseline_risk=None) -> EValue:
    """E-value of an estimate and of its confidence limit closer to the null.

    Parameters
    ----------
    estimate, ci_low, ci_high : float
        The estimate and its confidence interval, on the scale named by `measure`.
    measure : {"rr", "or", "difference"}
        Risk ratio (also used for hazard ratios of rare outcomes), odds ratio, or mean
        difference. For binary outcomes pass the standardized (marginal) risk ratio.
    outcome_sd : float, optional
        Required for "difference": the pooled within-group SD of the outcome, used for
        d = estimate / outcome_sd.
    se : float, optional
        Standard error of a mean difference. When given, the limit is
        exp(0.91 d -/+ z 0.91 SE_d) with SE_d = se / outcome_sd; when omitted, the interval
        limit closer to the null is standardized directly (identical for a Wald interval).
    alpha : float, default 0.05
        Two-sided level; z = Phi^-1(1 - alpha/2) (1.96 for 0.05, so 0.91 z = 1.78).
    baseline_risk : float, optional
        Required for "or": the outcome risk. At or below 15 % the odds ratio is read as a risk
        ratio; above, sqrt(OR) is used.

    Returns
    -------
    EValue

    Notes
    -----
    E = RR + sqrt(RR (RR - 1)) for RR >= 1 (use 1/RR below 1). An interval that includes the
    null gives a limit E-value of 1.

    References
    ----------
    VanderWeele TJ, Ding P (2017). Sensitivity analysis in observational research: introducing
    the E-value. Annals of Internal Medicine 167:268-274.

    Examples
    --------
    >>> round(e_value(3.9, 1.8, 8.7, measure="rr").point, 2)
    7.26
    """
    estimate, ci_low, ci_high, measure, outcome_sd, se, alpha, baseline_risk = _e_value_iv(
        estimate, ci_low, ci_high, measure, outcome_sd, se, alpha, baseline_risk)
    z = float(stats.norm.isf(alpha / 2.0))
    level = f"{100 * (1 - alpha):g} %"

    if measure == "difference":
        d = estimate / outcome_sd  # VanderWeele & Ding 2017: standardized difference
        rr = math.exp(SMD_TO_LOG_RR * d)  # VanderWeele & Ding 2017: RR ~ exp(0.91 d)
        if se is not None:
            se_d = se / outcome_sd
            d_low, d_high = d - z * se_d, d + z * se_d
            how = f"limit exp(0.91 d -/+ {z:.4g} x 0.91 SE_d), SE_d = SE / SD, z for the {level} level"
        else:
            d_low, d_high = ci_low / outcome_sd, ci_high / outcome_sd
            how = f"limit from the {level} interval divided by the SD"
        lim_low, lim_high = math.exp(SMD_TO_LOG_RR * d_low), math.exp(SMD_TO_LOG_RR * d_high)
        conversion = "exp(0.91 d), d = difference / pooled within-group SD"
        computed_from = (f"mean difference {estimate:.4g} standardized by the pooled within-group SD of the "
                         f"outcome ({outcome_sd:.4g}): d = {d:.4g}, RR ~ exp(0.91 d) = {rr:.4g}; {how}")
    elif measure == "or":
        rare = baseline_risk <= RARE_OUTCOME_THRESHOLD
        if rare:
            rr, lim_low, lim_high = estimate, ci_low, ci_high  # VanderWeele & Ding 2017: rare outcome
            conversion = "odds ratio as risk ratio (rare outcome)"
        else:
            rr, lim_low, lim_high = (math.sqrt(v) for v in (estimate, ci_low, ci_high))  # common outcome
            conversion = "sqrt(odds ratio) (common outcome)"
        computed_from = (f"odds ratio {estimate:.4g} ({level} CI {ci_low:.4g} to {ci_high:.4g}), outcome risk "
                         f"{baseline_risk:.3g} {'<=' if rare else '>'} 15 %: {conversion}")
    else:
        rr, lim_low, lim_high = estimate, ci_low, ci_high
        conversion = "risk ratio"
        computed_from = f"risk ratio {estimate:.4g} ({level} CI {ci_low:.4g} to {ci_high:.4g}), used directly"

    point = 1.0 if rr == 1.0 else _e_of_rr(rr)
    if lim_low <= 1.0 <= lim_high:
        limit, rr_limit, ci_e = "none (interval includes the null)", None, 1.0
    elif rr > 1.0:
        limit, rr_limit = "lower", lim_low
        ci_e = _e_of_rr(rr_limit)
    else:
        limit, rr_limit = "upper", lim_high
        ci_e = _e_of_rr(rr_limit)
    return EValue(point=point, ci_limit=ci_e, computed_from=computed_from,
                  rr_used=max(rr, 1.0 / rr),
                  rr_limit_used=None if rr_limit is None else max(rr_limit, 1.0 / rr_limit),
                  limit=limit, measure=measure, alpha=alpha, conversion=conversion,
                  estimate=estimate, ci_low=ci_low, ci_high=ci_high,
                  outcome_sd=outcome_sd, baseline_risk=baseline_risk)


def pooled_sd(y, t) -> float:
    """Pooled within-group SD of the outcome (the E-value's standardizer for mean differences).

    sqrt(((n1 - 1) s1^2 + (n0 - 1) s0^2) / (n - 2)), the SD of Cohen's d that
    VanderWeele & Ding (2017) standardize by.
    """
    y1, y0 = y[t == 1], y[t == 0]
    pooled = ((len(y1) - 1) * y1.var(ddof=1) + (len(y0) - 1) * y0.var(ddof=1)) / (len(y) - 2)
    return float(np.sqrt(pooled))


def headline_e_value(adjusted, risk_ratio, y, t, *, binary: bool, alpha: float) -> EValue | None:
    """The E-value the analysis reports, on the scale the outcome calls for.

    Binary outcomes: the E-value of the standardized (marginal) risk ratio, as VanderWeele &
    Ding (2017) recommend, whatever the headline measure; None, with a ModelWarning, when the
    ratio or a limit is undefined (a standardized risk of 0 or 1). Continuous outcomes: the
    headline mean difference standardized by the pooled within-group SD (:func:`pooled_sd`).
    """
    if binary:
        rr = risk_ratio
        if all(v is not None and np.isfinite(v) and v > 0 for v in (rr.estimate, rr.ci_low, rr.ci_high)):
            return e_value(rr.estimate, rr.ci_low, rr.ci_high, measure="rr", alpha=alpha)
        warnings.warn("E-value not computed: the standardized risk ratio or a confidence limit "
                      "is undefined (a standardized risk of 0 or 1).", ModelWarning)
        return None
    sd = pooled_sd(y, t)
    d = abs(adjusted.estimate) / sd if sd > 0 else math.inf
    if not math.isfinite(SMD_TO_LOG_RR * d) or SMD_TO_LOG_RR * d > 700:  # exp() would overflow
        warnings.warn(f"E-value not computed: the headline is {d:.3g} pooled SDs from the null, "
                      "beyond what the conversion RR ~ exp(0.91 d) can represent; check the "
                      "per-stratum estimates.", ModelWarning)
        return None
    return e_value(adjusted.estimate, adjusted.ci_low, adjusted.ci_high, measure="difference",
                   outcome_sd=sd, se=adjusted.se, alpha=alpha)
