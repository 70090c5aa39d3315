"""Effects on follow-up times: the adjusted risk difference at a horizon and what goes beside it.

* :mod:`.horizon` - the horizon rule and the censoring check;
* :mod:`.risk_difference` - the headline (Cox within stratum-groups, else Kaplan-Meier,
  estimand weights, bootstrap within strata);
* :mod:`.secondary` - RMST difference, stratified Cox hazard ratio, stratum hazard ratios,
  crude Kaplan-Meier risk difference;
* :mod:`.weighted` - IP-weighted Kaplan-Meier and pooled logistic cross-checks;
* :mod:`._curves` - Kaplan-Meier with Greenwood, restricted means, combined curves.
"""

from ._curves import CombinedCurves, Curve, combine_curves, kaplan_meier, restricted_mean
from .horizon import Horizon, censoring_difference, choose_horizon
from .risk_difference import RiskDifference, adjusted_risk_difference
from .secondary import (HazardRatio, RestrictedMean, crude_risk_difference, hazard_ratio,
                        plain_risk_difference, rmst_difference, stratum_hazard_ratios)
from .weighted import (ip_weights, pooled_logistic_risks, weighted_km_risks,
                       weighting_cross_checks)

__all__ = ["Curve", "CombinedCurves", "kaplan_meier", "restricted_mean", "combine_curves",
           "Horizon", "choose_horizon", "censoring_difference", "RiskDifference",
           "adjusted_risk_difference", "HazardRatio", "RestrictedMean", "hazard_ratio",
           "rmst_difference", "stratum_hazard_ratios", "plain_risk_difference", "crude_risk_difference", "ip_weights",
           "weighted_km_risks", "pooled_logistic_risks", "weighting_cross_checks"]
