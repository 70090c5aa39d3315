"""The design on the propensity score: the score, overlap, subclassification and balance.

Nothing here looks at the outcome.
"""

from .balance import BalanceResult, balance_table
from .overlap import OverlapResult, apply_overlap
from .scores import PropensityFit, check_score, fit_propensity
from .strata import Strata, make_strata, stratum_weights, unit_weights

__all__ = ["fit_propensity", "PropensityFit", "check_score", "apply_overlap", "OverlapResult",
           "make_strata", "Strata", "stratum_weights", "unit_weights", "balance_table",
           "BalanceResult"]
