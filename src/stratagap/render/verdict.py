"""The verdict: a short plain-language paragraph built only from the numbers of the analysis.

The wording is deliberately conservative: "the gap survives adjustment" is said only when the
headline CI excludes the null, the default permutation test rejects at alpha, and balance after
adjustment is acceptable (every |SMD| <= 0.1, common practice, and no flag on the squares and
products of the covariates, see :mod:`stratagap.stratify.higher_order`). Whatever is said, the
cautions follow.

Every effect number in the paragraph is on the headline's scale. With a ratio measure (risk or
odds ratio, null 1) the crude comparison is quoted only when it is on the same scale, and any
cross-check on the difference scale is named as such and not compared with the ratio null (the
pipeline computes both on the headline's measure).
When the test is not significant without hidden bias (Gamma = 1), the paragraph says so
instead of quoting a sensitivity threshold. A risk difference is written in percentage points
("-0.46 pp", not "-0.00"), as in the summary and the report.
"""

from __future__ import annotations

from .formatting import format_number as _fmt, format_p_relation as _fmt_p
from .rates_text import verdict_sentences as _rate_sentences

__all__ = ["write_verdict", "gamma_sentence", "not_significant_phrase", "RATIO_MEASURES",
           "measure_code"]

#: Headline measure names on the ratio scale (null 1); every other measure is a difference.
RATIO_MEASURES = ("risk ratio", "odds ratio")
#: Cross-check rows name their scale by code; the headline by name.
_CODES = {"risk ratio": "rr", "odds ratio": "or"}
#: The sensitivity value's flag when the one-sided test does not reject at Gamma = 1.
NOT_SIGNIFICANT = "not significant at Gamma=1"
#: The headline measure written in percentage points.
RISK_DIFFERENCE = "risk difference"


def not_significant_phrase() -> str:
    """The short words for a one-sided test that does not reject at Gamma = 1 (no threshold
    number: there is none); the summary and the Gamma figure say it so."""
    return "not significant without hidden bias (Γ = 1)"


def _get(obj, name, default=None):
    if obj is None:
        return default
    if isinstance(obj, dict):
        return obj.get(name, default)
    return getattr(obj, name, default)


def measure_code(measure: str) -> str:
    """The cross-check code of a headline measure name: "rr", "or" or "difference"."""
    return _CODES.get(measure, "difference")


def _value(x, pp=False):
    """A number of the paragraph; a risk difference in percentage points ("-0.46 pp", where
    two decimals of the proportion would read "-0.00")."""
    if not pp or x is None:
        return _fmt(x)
    return f"{_fmt(100 * x)} pp"


def _ci(level, lo, hi, pp=False):
    if pp and lo is not None and hi is not None:
        return f"{level}% CI {_fmt(100 * lo)} to {_fmt(100 * hi)} pp"
    return f"{level}% CI {_fmt(lo)} to {_fmt(hi)}"


def write_verdict(*, spec, crude, adjusted, tests, balance, sensitivity, cross_checks,
                  negative_control, overlap) -> str:
    """Return the verdict paragraph (plain text)."""
    measure = _get(adjusted, "measure", "difference")
    ratio = measure in RATIO_MEASURES
    null = 1.0 if ratio else 0.0
    lo, hi = _get(adjusted, "ci_low"), _get(adjusted, "ci_high")
    excludes = lo is not None and hi is not None and not (lo <= null <= hi)
    main = tests.main
    p = _get(main, "p_value")
    rejects = p is not None and p < spec.alpha
    max_smd = _get(balance, "max_abs_smd_after")
    higher = _get(balance, "higher_order")
    higher_flag = bool(_get(higher, "flagged", False))
    balanced = max_smd is not None and max_smd <= 0.1 and not higher_flag
    level = int(round(100 * (1 - spec.alpha)))
    population = _get(overlap, "estimand_label", spec.estimand.upper())
    matched = getattr(spec, "design", "strata") == "match"
    within = "within matched sets" if matched else "within propensity-score strata"

    parts = []
    if not ratio or _get(crude, "measure") == measure:  # quoted only on the headline's scale
        crude_pp = _get(crude, "measure", measure) == RISK_DIFFERENCE
        parts.append(f"Crude {_get(crude, 'measure', measure)}: "
                     f"{_value(_get(crude, 'estimate'), crude_pp)} "
                     f"({_ci(level, _get(crude, 'ci_low'), _get(crude, 'ci_high'), crude_pp)}).")
    pp = measure == RISK_DIFFERENCE
    rate_how, rate_more = _rate_sentences(spec, adjusted)  # rate outcomes: unit, per 1,000
    parts.append(
        f"Adjusted {measure} ({population}, {rate_how or 'regression ' + within}): "
        f"{_value(_get(adjusted, 'estimate'), pp)} ({_ci(level, lo, hi, pp)}), which "
        f"{'excludes' if excludes else 'includes'} the null value {null:g}.")
    parts.extend(rate_more)
    parts.append(f"The stratified permutation test of the sharp null (no effect for anyone) "
                 f"gives p {_fmt_p(p)} ({_get(main, 'alternative', spec.alternative)}).")
    if max_smd is not None:
        parts.append(f"After {'matching' if matched else 'stratification'} the largest absolute "
                     f"standardized mean difference is "
                     f"{_fmt(max_smd, 3)} ({'within' if max_smd <= 0.1 else 'above'} the 0.1 threshold, "
                     f"common practice).")
    if higher_flag:
        worst = (_get(higher, "worst") or [{}])[0]
        parts.append(f"Squares or products of the covariates stay imbalanced after "
                     f"stratification (largest |SMD| {_fmt(_get(higher, 'max_abs_smd_after'), 3)}, "
                     f"{worst.get('term', '')}; shuffles of the exposure within strata reach "
                     f"{_fmt(_get(higher, 'permutation_p95'), 3)} at their 95th percentile): the strata "
                     f"alone do not balance them, and the result leans on the regression within "
                     f"strata, whose spline terms cover squares but not products of covariates.")
    parts.append(gamma_sentence(sensitivity))
    e_point = _get(sensitivity.e_value, "point")
    if e_point is not None:
        parts.append(f"E-value: {_fmt(e_point)} for the estimate and "
                     f"{_fmt(_get(sensitivity.e_value, 'ci_limit'))} for the confidence limit "
                     f"closer to the null.")
    cross = _cross_check_sentence(cross_checks, measure, null)
    if cross:
        parts.append(cross)
    if negative_control is not None:
        parts.append(
            f"Negative-control outcome {negative_control.column!r}: adjusted 'effect' "
            f"{_fmt(negative_control.estimate.estimate)} (p {_fmt_p(negative_control.test.p_value)})"
            + ("; this is a residual-bias alarm." if negative_control.alarm else
               "; no sign of residual bias from this check."))
    parts.append(_in_short(excludes, rejects, balanced, spec.alpha)
                 + " This is observational evidence only: residual and unmeasured "
                 "confounding remain possible, it is not medical advice, and decisions belong to "
                 "licensed practice and local review boards.")
    return " ".join(parts)


def gamma_sentence(sensitivity) -> str:
    """The sensitivity value in one sentence, from the result's sensitivity block (object or
    dict): the threshold Gamma, or, when the one-sided test is not significant without hidden
    bias, that fact and no threshold. The verdict and the report's sensitivity section."""
    detail = _get(sensitivity, "gamma_threshold_detail")
    flag = _get(detail, "flag", "ok")
    gamma = _get(sensitivity, "gamma_threshold")
    level = _fmt(_get(sensitivity, "gamma_level"), 3)
    if flag == NOT_SIGNIFICANT or gamma is None:
        return (f"Without hidden bias (Γ = 1) the one-sided test is not significant at {level}, "
                f"so there is no sensitivity threshold to report.")
    if flag.startswith(">"):
        return (f"The one-sided test stays significant at {level} for every Γ up to "
                f"{_fmt(_get(detail, 'cap', gamma))}, the largest searched.")
    return (f"An unmeasured confounder would have to change the odds of exposure within a stratum "
            f"by a factor of Γ = {_fmt(gamma)} to make the one-sided test lose significance at "
            f"{level}.")


def _cross_check_sentence(cross_checks, measure, null) -> str | None:
    rows = _get(cross_checks, "rows", cross_checks) or []
    if not rows:
        return None
    code = measure_code(measure)
    same = [r for r in rows if _get(r, "measure", "difference") == code]
    other = len(rows) - len(same)
    text = []
    ests = [_get(r, "estimate") for r in same if _get(r, "estimate") is not None]
    if ests:
        excluding = sum(1 for r in same if _get(r, "ci_low") is not None
                        and _get(r, "ci_high") is not None
                        and not (_get(r, "ci_low") <= null <= _get(r, "ci_high")))
        pp = measure == RISK_DIFFERENCE
        text.append(f"Cross-check estimators ({measure}) range from {_value(min(ests), pp)} to "
                    f"{_value(max(ests), pp)}; {excluding} of {len(same)} have a CI excluding the null "
                    f"value {null:g}.")
    differ = [r for r in same if _get(r, "differs_from_headline")]
    if differ:
        named = ", ".join(f"{_get(r, 'method')} (z = {_fmt(_get(r, 'headline_gap_z'))})"
                          for r in differ)
        text.append(f"{len(differ)} cross-check{'' if len(differ) == 1 else 's'} "
                    f"differ{'s' if len(differ) == 1 else ''} from the headline by "
                    f"more than 1.96 combined standard errors: {named}; the estimators rest on "
                    "different models, so read the cross-check table before the headline (the "
                    "rule under-flags, as the estimates are positively correlated).")
    if other:
        noun = "estimator is" if other == 1 else "estimators are"
        text.append(f"{other} cross-check {noun} on the difference scale (see the cross-check "
                    f"table) and {'is' if other == 1 else 'are'} not compared with the "
                    f"{measure}'s null here.")
    return " ".join(text) or None


def _in_short(excludes, rejects, balanced, alpha) -> str:
    if excludes and rejects and balanced:
        return "In short: the gap survives adjustment for the measured covariates."
    if excludes and rejects:
        return ("In short: the adjusted gap is statistically clear, but residual imbalance on "
                "measured covariates means it may still be partly confounding.")
    if excludes:
        return (f"In short: the data do not show that the gap survives adjustment: the adjusted "
                f"CI excludes the null but the permutation test does not reject at {alpha:g}.")
    if rejects:
        return (f"In short: the data do not show that the gap survives adjustment: the "
                f"permutation test rejects at {alpha:g} but the adjusted CI includes the null.")
    return "In short: the data do not show that the gap survives adjustment."
