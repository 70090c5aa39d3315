"""E-values of follow-up-time estimates: the risk ratio at the horizon and the hazard ratio.

The risk ratio at the horizon is a risk ratio and is used directly. A hazard ratio approximates
a risk ratio only when the outcome is rare by the end of follow-up (cumulative incidence below
``RARE_OUTCOME_THRESHOLD``, 15 %; VanderWeele & Ding 2017); otherwise it is converted with
``RR ~ (1 - 0.5^sqrt(HR)) / (1 - 0.5^sqrt(1/HR))`` (VanderWeele 2020), applied to the estimate
and to each confidence limit, and the E-value is computed from the converted values.

References
----------
VanderWeele, T. J. & Ding, P. (2017). Sensitivity analysis in observational research:
introducing the E-value. Annals of Internal Medicine 167:268-274.
VanderWeele, T. J. (2020). Optimal approximate conversions of odds ratios and hazard ratios to
risk ratios. Biometrics 76:746-752.
"""

from __future__ import annotations

import math
from dataclasses import replace

from ._evalue import RARE_OUTCOME_THRESHOLD, EValue, e_value

__all__ = ["hazard_ratio_to_risk_ratio", "hazard_ratio_e_value", "risk_ratio_e_value"]


def hazard_ratio_to_risk_ratio(hr: float) -> float:
    """``(1 - 0.5^sqrt(HR)) / (1 - 0.5^sqrt(1/HR))`` (VanderWeele 2020, common outcome)."""
    return (1.0 - 0.5 ** math.sqrt(hr)) / (1.0 - 0.5 ** math.sqrt(1.0 / hr))


def risk_ratio_e_value(rr, ci_low, ci_high, *, horizon, alpha=0.05) -> EValue:
    """E-value of the risk ratio at the horizon (a risk ratio: used directly)."""
    ev = e_value(rr, ci_low, ci_high, measure="rr", alpha=alpha)
    return replace(ev, computed_from=f"risk ratio at the horizon {horizon:g}: "
                   + ev.computed_from)


def hazard_ratio_e_value(hr, ci_low, ci_high, *, incidence, alpha=0.05) -> EValue:
    """E-value of a hazard ratio; ``incidence``: cumulative incidence by the end of follow-up."""
    if incidence < RARE_OUTCOME_THRESHOLD:
        ev = e_value(hr, ci_low, ci_high, measure="rr", alpha=alpha)
        how = (f"hazard ratio read as a risk ratio (cumulative incidence {incidence:.3g} < 15 %, "
               "VanderWeele & Ding 2017)")
    else:
        rr, lo, hi = (hazard_ratio_to_risk_ratio(v) for v in (hr, ci_low, ci_high))
        ev = e_value(rr, lo, hi, measure="rr", alpha=alpha)
        how = (f"hazard ratio {hr:.4g} converted to RR ~ (1 - 0.5^sqrt(HR)) / "
               f"(1 - 0.5^sqrt(1/HR)) = {rr:.4g} (cumulative incidence {incidence:.3g} >= 15 %, "
               "VanderWeele 2020)")
    return replace(ev, computed_from=how, conversion=how.split(" (")[0])
