"""The normal engine: the statistic standardized by its permutation moments, against N(0, 1).

The mean and variance come from :meth:`stratagap.inference.statistic.Statistic.null_moments`
(exact permutation moments of a linear statistic; ``(0, 1)`` for the studentized one).
"""

from __future__ import annotations

import numpy as np
from scipy import stats


def normal_p(observed, mean, var, statistic):
    """One-sided p-values ``(P(Z >= z), P(Z <= z))``, ``z = (T - mean) / sqrt(var)``."""
    if statistic != "studentized" and var <= 0:
        return 1.0, 1.0
    z = (observed - mean) / np.sqrt(var)
    return float(stats.norm.sf(z)), float(stats.norm.cdf(z))
