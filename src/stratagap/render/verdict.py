"""The verdict: a short plain-language paragraph built only from the numbers of the analysis.

The wording is deliberately conservative: "the gap survives adjustment" is said only when the
headline CI excludes the null, the default permutation test rejects at alpha, and balance after
adjustment is acceptable (every |SMD| <= 0.1, common practice, and no flag on the squares and
products of the covariates, see :mod:`stratagap.stratify.higher_order`). Whatever is said, the
cautions follow.
"""

from __future__ import annotations

from .formatting import format_number as _fmt, format_p_relation as _fmt_p

__all__ = ["write_verdict"]


def _get(obj, name, default=None):
    if obj is None:
        return default
    if isinstance(obj, dict):
        return obj.get(name, default)
    return getattr(obj, name, default)


def write_verdict(*, spec, crude, adjusted, tests, balance, sensitivity, cross_checks,
                  negative_control, overlap) -> str:
    """Return the verdict paragraph (plain text)."""
    null = 1.0 if _get(adjusted, "measure", "") in ("risk ratio", "odds ratio") else 0.0
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
    measure = _get(adjusted, "measure", "difference")

    parts = [
        f"Crude {measure}: {_fmt(_get(crude, 'estimate'))} ({level}% CI {_fmt(_get(crude, 'ci_low'))} "
        f"to {_fmt(_get(crude, 'ci_high'))}). Adjusted {measure} ({population}, regression within "
        f"propensity-score strata): {_fmt(_get(adjusted, 'estimate'))} ({level}% CI {_fmt(lo)} to "
        f"{_fmt(hi)}), which {'excludes' if excludes else 'includes'} the null value {null:g}.",
        f"The stratified permutation test of the sharp null (no effect for anyone) gives p {_fmt_p(p)} "
        f"({_get(main, 'alternative', spec.alternative)}).",
    ]
    if max_smd is not None:
        parts.append(f"After stratification the largest absolute standardized mean difference is "
                     f"{_fmt(max_smd, 3)} ({'within' if max_smd <= 0.1 else 'above'} the 0.1 "
                     f"threshold, common practice).")
    if higher_flag:
        worst = (_get(higher, "worst") or [{}])[0]
        parts.append(f"Squares or products of the covariates stay imbalanced after "
                     f"stratification (largest |SMD| {_fmt(_get(higher, 'max_abs_smd_after'), 3)}, "
                     f"{worst.get('term', '')}; shuffles of the exposure within strata reach "
                     f"{_fmt(_get(higher, 'permutation_p95'), 3)} at their 95th percentile): the strata "
                     f"alone do not balance them, and the result leans on the regression within "
                     f"strata, whose spline terms cover squares but not products of covariates.")
    gamma = sensitivity.gamma_threshold
    e_point = _get(sensitivity.e_value, "point")
    e_limit = _get(sensitivity.e_value, "ci_limit")
    if gamma is not None:
        parts.append(
            f"An unmeasured confounder would have to change the odds of exposure within a stratum by "
            f"a factor of Γ = {_fmt(gamma)} to make the one-sided test lose significance at "
            f"{_fmt(sensitivity.gamma_level, 3)}.")
    if e_point is not None:
        parts.append(f"E-value: {_fmt(e_point)} for the estimate and {_fmt(e_limit)} for the "
                     f"confidence limit closer to the null.")
    rows = _get(cross_checks, "rows", cross_checks) or []
    if rows:
        ests = [_get(r, "estimate") for r in rows if _get(r, "estimate") is not None]
        agree = sum(1 for r in rows if _get(r, "ci_low") is not None
                    and not (_get(r, "ci_low") <= null <= _get(r, "ci_high")))
        if ests:
            parts.append(f"Cross-check estimators range from {_fmt(min(ests))} to {_fmt(max(ests))}; "
                         f"{agree} of {len(rows)} have a CI excluding the null.")
    if negative_control is not None:
        parts.append(
            f"Negative-control outcome {negative_control.column!r}: adjusted 'effect' "
            f"{_fmt(negative_control.estimate.estimate)} (p {_fmt_p(negative_control.test.p_value)})"
            + ("; this is a residual-bias alarm." if negative_control.alarm else
               "; no sign of residual bias from this check."))
    if excludes and rejects and balanced:
        summary = ("In short: the gap survives adjustment for the measured covariates. ")
    elif excludes and rejects:
        summary = ("In short: the adjusted gap is statistically clear, but residual imbalance on "
                   "measured covariates means it may still be partly confounding. ")
    else:
        summary = "In short: the data do not show that the gap survives adjustment. "
    parts.append(summary + "This is observational evidence only: residual and unmeasured "
                 "confounding remain possible, it is not medical advice, and decisions belong to "
                 "licensed practice and local review boards.")
    return " ".join(parts)
