"""Sensitivity analysis: how strong would an unmeasured confounder have to be?

Three views, each on the estimate or test the core pipeline reported:

* :func:`e_value` - E-values of the estimate and of its confidence limit closer to the null
  (VanderWeele & Ding 2017);
* :func:`gamma_bounds` and :func:`sensitivity_value` - Rosenbaum-type bounds on the one-sided
  p-value of the stratified permutation test over Gamma, and the Gamma at which the bound
  reaches alpha (Rosenbaum 2002, ch. 4; Gastwirth, Krieger & Rosenbaum 2000);
* :func:`tipping_grid` and :func:`covariate_benchmarks` - bias-corrected estimates for a binary
  unmeasured confounder over a grid, the tipping curve, and measured covariates as benchmarks
  (Lin, Psaty & Kronmal 1998; caveat of Cinelli & Hazlett 2020);
* :func:`sensitivity_analysis` - the three together, as the analysis's ``sensitivity`` block;
  :func:`negative_control_check` - the residual-bias check on a negative-control outcome
  (Lipsitch, Tchetgen Tchetgen & Cohen 2010).

Inputs are the arrays of the pipeline contract (``t`` int8, ``labels`` int64 with -1 set aside,
``estimand`` "ate"/"att") and the headline estimates; results are frozen dataclasses with
``to_dict()``.
"""

from ._evalue import RARE_OUTCOME_THRESHOLD, EValue, e_value, headline_e_value, pooled_sd
from ._gamma_bounds import DEFAULT_GAMMAS, GAMMA_CAP, GammaBounds, SensitivityValue, gamma_bounds, sensitivity_value
from ._tipping import BENCHMARK_CAVEAT, TippingGrid, covariate_benchmarks, tipping_grid
from .analysis import Sensitivity, sensitivity_analysis
from ._gamma_clusters import cluster_gamma_bounds
from .negative_control import NegativeControl, negative_control_check
from ._survival_evalue import hazard_ratio_e_value, hazard_ratio_to_risk_ratio, risk_ratio_e_value

__all__ = [
    "e_value", "EValue", "RARE_OUTCOME_THRESHOLD",
    "gamma_bounds", "sensitivity_value", "GammaBounds", "SensitivityValue", "DEFAULT_GAMMAS", "GAMMA_CAP",
    "tipping_grid", "covariate_benchmarks", "TippingGrid", "BENCHMARK_CAVEAT",
    "headline_e_value", "pooled_sd", "sensitivity_analysis", "Sensitivity",
    "negative_control_check", "NegativeControl", "cluster_gamma_bounds",
    "hazard_ratio_e_value", "hazard_ratio_to_risk_ratio", "risk_ratio_e_value",
]
