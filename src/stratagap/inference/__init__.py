"""The stratified permutation test: statistics, engines (exact, Monte Carlo, normal), null draws.

The engine works on per-stratum sufficient statistics (exposed sums of each value column);
:mod:`.statistic` holds the statistics as functions of them, their permutation moments and the
tie rule; :mod:`.draws` the Monte Carlo null draws shared between calls.
"""

from .draws import SharedDraws, shared_draws
from .permutation import (PermutationResult, null_exposed_sums, null_statistics, residualize,
                          stratified_test)
from .statistic import STATISTICS, TIE_RTOL, Statistic, exposed_sum_moments, tie_tolerance
from ._checks import _check_resamples as check_resamples
from .clusters import ClusterValues, cluster_test, cluster_values
from ._engines import exact as _exact

#: Most within-strata assignments the exact engine enumerates.
MAX_ASSIGNMENTS = _exact.MAX_ASSIGNMENTS
n_assignments = _exact.n_assignments
enumerate_exposed_sums = _exact.enumerate_exposed_sums

__all__ = ["stratified_test", "PermutationResult", "residualize", "null_exposed_sums",
           "null_statistics", "shared_draws", "SharedDraws", "Statistic", "STATISTICS",
           "TIE_RTOL", "exposed_sum_moments", "tie_tolerance", "check_resamples",
           "MAX_ASSIGNMENTS", "n_assignments", "enumerate_exposed_sums", "cluster_test",
           "cluster_values", "ClusterValues"]
