"""Effect estimates: the headline within strata, Mantel-Haenszel, test inversion, cross-checks.

Also Cochran's Q and Breslow-Day for heterogeneity across strata.
"""

from .crosscheck import cross_checks
from .effects import (ConstantEffect, Estimate, StratifiedEstimate, constant_effect, crude,
                      mantel_haenszel, plain_stratified_difference, stratified_regression)
from .clustered import ClusterRobust, clustered_estimate, ipw_cluster_sandwich
from .heterogeneity import Heterogeneity, breslow_day, cochran_q, heterogeneity_across_strata

__all__ = ["crude", "stratified_regression", "plain_stratified_difference", "mantel_haenszel",
           "constant_effect", "Estimate", "StratifiedEstimate", "ConstantEffect", "cross_checks",
           "cochran_q", "breslow_day", "heterogeneity_across_strata", "Heterogeneity",
           "clustered_estimate", "ipw_cluster_sandwich", "ClusterRobust"]
