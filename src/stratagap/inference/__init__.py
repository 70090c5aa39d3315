"""The stratified permutation test: statistics, engines (exact, Monte Carlo, normal), null draws.

The engine works on per-stratum sufficient statistics (exposed sums of each value column).
"""

from .permutation import (PermutationResult, null_exposed_sums, null_statistics, residualize,
                          shared_draws, stratified_test)

__all__ = ["stratified_test", "PermutationResult", "residualize", "null_exposed_sums",
           "null_statistics", "shared_draws"]
