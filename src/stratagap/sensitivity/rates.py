"""The sensitivity block of a rate outcome: Gamma bounds, the rate ratio's E-value, tipping grid.

* Gamma bounds (Rosenbaum 2002, ch. 4) on the test that was run: the stratified mean-difference
  statistic on the events-minus-expected values (:mod:`stratagap.inference.rate_scores`); those
  values are fixed under the sharp null, so the general bounds of
  :mod:`stratagap.sensitivity._gamma_bounds` apply unchanged, anchored at Gamma = 1 on the
  test's own one-sided p-value.
* E-value (VanderWeele & Ding 2017) of the Mantel-Haenszel rate ratio, a ratio of rates read
  directly as a risk ratio (as the paper does for rate ratios of rare and common outcomes
  alike, from memory); none, with a ModelWarning, when that ratio is not estimable.
* Tipping grid (Lin, Psaty & Kronmal 1998) on the rate difference: a binary U shifting the
  rate by gamma (events per unit of person-time). Benchmarks regress each person's own rate
  ``y / PT`` on the covariates in the reference group (least squares), so their shifts are in
  the same unit.

References
----------
Rosenbaum, P. R. (2002). Observational Studies, 2nd ed., Springer, ch. 4.
VanderWeele, T. J. & Ding, P. (2017). Annals of Internal Medicine 167:268-274.
Lin, D. Y., Psaty, B. M. & Kronmal, R. A. (1998). Biometrics 54:948-963.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import replace

import numpy as np

from ..errors import ModelWarning
from ._evalue import e_value
from ._gamma_bounds import anchor_at_one, gamma_bounds, sensitivity_value
from ._tipping import covariate_benchmarks, tipping_grid
from .analysis import Sensitivity

__all__ = ["rate_sensitivity"]


def rate_ratio_e_value(rate_ratio, alpha):
    """E-value of a rate ratio Estimate, or None (ModelWarning) when it is not estimable."""
    vals = (rate_ratio.estimate, rate_ratio.ci_low, rate_ratio.ci_high)
    if not all(v is not None and math.isfinite(v) and v > 0 for v in vals):
        warnings.warn("E-value not computed: the Mantel-Haenszel rate ratio is not estimable "
                      "(no events in a group).", ModelWarning, stacklevel=2)
        return None
    ev = e_value(*vals, measure="rr", alpha=alpha)
    return replace(ev, computed_from=ev.computed_from.replace(
        "risk ratio", "Mantel-Haenszel rate ratio", 1), conversion="rate ratio as risk ratio")


def rate_sensitivity(values, t, labels, X, y, person_time, terms, *, test, estimand,
                     alternative, alpha, gammas, adjusted, rate_ratio, seed=0) -> Sensitivity:
    """The sensitivity block of a rate analysis (field for field as for other outcomes).

    Parameters
    ----------
    values : (n,) the test's values (events minus expected)
    t, labels : exposure and strata of the analysed rows
    X : (n, p) the linear design (one column per covariate), for the benchmarks
    y, person_time : event counts and person-time
    terms : the analysed covariate terms (benchmarks)
    test : the headline PermutationResult (statistic "mean_difference" on ``values``)
    estimand, alternative, alpha, gammas : as in the spec
    adjusted : the headline rate difference (Estimate)
    rate_ratio : the Mantel-Haenszel rate ratio (Estimate, log scale)
    seed : seed of the Monte Carlo estimates at the selected allocation

    Returns
    -------
    Sensitivity
    """
    direction = "greater" if test.statistic >= test.normal_mean else "less"
    p_at_one = test.p_greater if direction == "greater" else test.p_less
    level = alpha / 2.0 if alternative == "two-sided" else alpha
    bounds = gamma_bounds(values, t, labels, estimand=estimand, statistic="mean_difference",
                          direction=direction, gammas=gammas, monte_carlo_level=level, seed=seed)
    bounds = anchor_at_one(bounds, p_at_one, test.engine)
    threshold = sensitivity_value(values, t, labels, estimand=estimand,
                                  statistic="mean_difference", direction=direction, alpha=alpha,
                                  two_sided=alternative == "two-sided", p_at_one=p_at_one,
                                  seed=seed)
    person_rate = np.asarray(y, dtype=float) / np.asarray(person_time, dtype=float)
    benchmarks = covariate_benchmarks(terms, X, person_rate, t, measure="difference")
    tipping = tipping_grid(adjusted.estimate, adjusted.ci_low, adjusted.ci_high,
                           measure="difference", benchmarks=benchmarks)
    return Sensitivity(e_value=rate_ratio_e_value(rate_ratio, alpha),
                       gamma_threshold_detail=threshold, gamma_level=threshold.alpha,
                       gamma_direction=direction, gamma_bounds=bounds, tipping=tipping)
