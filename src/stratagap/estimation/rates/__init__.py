"""Rate outcomes (event counts over person-time): tables, headline, Mantel-Haenszel, cross-checks.

Unit: events per unit of the person-time column (the renderers also show per 1,000).
"""

from ._tables import (RateTable, crude_rates, mantel_haenszel_rates, mh_rate_parts, rate_table,
                      not_estimable_reason)
from .crosscheck import ipw_rates, poisson_offset, rate_cross_checks
from .standardized import EVENTS_PER_COLUMN, standardized_rate_difference

__all__ = ["RateTable", "rate_table", "crude_rates", "mantel_haenszel_rates", "mh_rate_parts",
           "not_estimable_reason", "standardized_rate_difference", "EVENTS_PER_COLUMN",
           "ipw_rates", "poisson_offset", "rate_cross_checks"]
