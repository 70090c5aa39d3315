"""Reading a table and coding it for analysis: exposure, outcome, covariate matrix, missing data.

The first arrow of the pipeline; everything after it works on the arrays of
:class:`PreparedData`, in a canonical row order.
"""

from ._readers import SUFFIXES, read_table
from ._prepare import BalanceTerm, Flow, PreparedData, observed_weights, prepare
from ._clusters import (ClusterStructure, check_cluster_column, cluster_structure, cluster_table,
                        undeclared_clusters)

__all__ = ["read_table", "prepare", "observed_weights", "PreparedData", "BalanceTerm", "Flow",
           "SUFFIXES", "ClusterStructure", "check_cluster_column", "cluster_structure",
           "cluster_table", "undeclared_clusters"]
