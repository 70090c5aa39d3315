"""The cluster column: checks, the cluster-level / unit-level decision, the cluster table and
the undeclared-clustering rule (rules of our own, stated in stratagap.data._clusters)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from stratagap.data._clusters import (check_cluster_column, cluster_structure, cluster_table,
                                      undeclared_clusters)
from stratagap.errors import InputError


def test_missing_cluster_values_name_the_rows():
    table = pd.DataFrame({"h": ["a", None, "b", "b", None], "t": [0, 1, 0, 1, 1]})
    with pytest.raises(InputError, match=r"missing in 2 rows \(data rows 2, 5"):
        check_cluster_column(table, "h")
    with pytest.raises(InputError, match="not in the table"):
        check_cluster_column(table, "hospital")
    with pytest.raises(InputError, match="also the exposure"):
        check_cluster_column(table, "t", used={"t"})


def test_one_cluster_per_row_is_not_a_cluster():
    with pytest.raises(InputError, match="identifies rows, not clusters"):
        cluster_structure(np.arange(6), np.array([0, 1, 0, 1, 0, 1]), column="id")


def test_cluster_level_needs_two_clusters_per_group():
    values = np.repeat(["a", "b", "c", "d"], 3)
    t = np.repeat([1, 0, 0, 0], 3)
    with pytest.raises(InputError, match="exposed group is a single cluster"):
        cluster_structure(values, t, column="h")


def test_level_decision_reports_the_share_of_mixed_clusters():
    values = np.repeat(["a", "b", "c", "d"], 3)
    pure = cluster_structure(values, np.repeat([1, 1, 0, 0], 3), column="h")
    assert pure.level == "cluster" and pure.mixed == 0
    t = np.repeat([1, 1, 0, 0], 3)
    t[0] = 0  # cluster a becomes mixed
    mixed = cluster_structure(values, t, column="h")
    assert mixed.level == "unit" and mixed.mixed == 1 and mixed.mixed_share == 0.25
    assert "1 of 4 clusters (25.0 %)" in mixed.reason()
    with pytest.raises(InputError, match=r"varies within 1 of 4 clusters .*25.0 %"):
        cluster_structure(values, t, column="h", level="cluster")
    assert cluster_structure(values, np.repeat([1, 1, 0, 0], 3), column="h",
                             level="unit").level == "unit"


def test_cluster_table_keeps_cluster_covariates_and_averages_unit_covariates():
    codes = np.array([0, 0, 1, 1, 1, 2])
    X = np.column_stack([[5.0, 5, 7, 7, 7, 1], [1.0, 3, 0, 0, 3, 4]])
    means, kinds = cluster_table(X, ["beds", "age"], codes)
    np.testing.assert_allclose(means, [[5, 2], [7, 1], [1, 4]])
    assert kinds == ["cluster covariate", "cluster mean"]


def _table(rng, n_clusters=40, size=10, flip=0):
    g = np.repeat(np.arange(n_clusters), size)
    tc = rng.integers(0, 2, n_clusters)
    t = tc[g].copy()
    t[:flip] = 1 - t[:flip]
    return pd.DataFrame({"site": g, "age": rng.normal(50, 10, g.size).round(),
                         "ward": rng.integers(0, 8, g.size), "t": t}), t


def test_undeclared_cluster_rule():
    rng = np.random.default_rng(0)
    table, t = _table(rng)
    rows = np.arange(len(table))
    found = undeclared_clusters(table, rows, t, used={"t", "age"})
    assert [f["column"] for f in found] == ["site"]  # 'ward' varies in exposure
    # nearly constant: 3 of 40 sites mixed (30 rows of 400 in mixed values) still fires
    table, t = _table(rng, flip=25)
    assert [f["column"] for f in undeclared_clusters(table, rows, t, used={"t"})] == ["site"]
    # more than n/5 values, or fewer than 5: not a cluster column
    table, t = _table(rng, n_clusters=100, size=4)
    assert undeclared_clusters(table, np.arange(400), t, used={"t"}) == []
    table, t = _table(rng, n_clusters=4, size=50)
    assert undeclared_clusters(table, np.arange(200), t, used={"t"}) == []
