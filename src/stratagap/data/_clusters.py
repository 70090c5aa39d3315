"""The cluster column: the unit that was assigned (hospital, clinic, practice, region).

* :func:`check_cluster_column` refuses a missing column or missing values (naming the rows).
* :func:`cluster_structure` codes the clusters of the analysed rows, refuses a column that
  holds one row per value, and decides the case: **cluster-level** exposure (constant within
  every cluster: the design and the test work with clusters as units) or **within-cluster**
  exposure (the unit-level test stays valid for unit-level assignment; estimates get
  cluster-robust variances). The share of mixed clusters is reported either way.
* :func:`cluster_table` builds the cluster-level covariate table: a covariate constant within
  every cluster is a cluster covariate and is kept as is; any other covariate enters as its
  cluster mean (a dummy's mean is the cluster's share of that level).
* :func:`undeclared_clusters` finds columns that look like an undeclared assigned unit.

Rule of the undeclared-clustering warning (ours, stated in the message): a column of the table
that the analysis does not use, with between 5 and n/5 distinct values among the analysed rows,
such that at least 95 % of those rows lie in values within which exposure is constant (and both
groups have such values). 95 % rather than 100 % so that a few miscoded rows do not hide a
hospital column.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from ..errors import InputError

__all__ = ["ClusterStructure", "check_cluster_column", "cluster_structure", "cluster_table",
           "undeclared_clusters", "LEVELS", "PURE_SHARE", "MIN_VALUES"]

#: Requested case: "auto" decides from the data; "cluster" requires exposure constant within
#: clusters; "unit" keeps the unit-level design and test (cluster-robust estimates only).
LEVELS = ("auto", "cluster", "unit")
#: Undeclared-clustering rule: share of rows in exposure-constant values, and the value range.
PURE_SHARE = 0.95
MIN_VALUES = 5


def check_cluster_column(table: pd.DataFrame, column, *, used=()) -> None:
    """The column exists, is not an analysed column, and has no missing values."""
    if not isinstance(column, str) or not column:
        raise InputError(f"`cluster` names the column of the assigned unit (hospital, clinic); got {column!r}")
    if column not in table.columns:
        raise InputError(f"`cluster` column {column!r} is not in the table; the columns are "
                         f"{', '.join(map(str, list(table.columns)[:12]))}")
    if column in used:
        raise InputError(f"`cluster` column {column!r} is also the exposure, the outcome or a "
                         "covariate; give cluster-level covariates as their own columns")
    missing = np.flatnonzero(table[column].isna().to_numpy())
    if missing.size:
        rows = ", ".join(str(i + 1) for i in missing[:8]) + (", ..." if missing.size > 8 else "")
        raise InputError(f"`cluster` column {column!r} is missing in {missing.size} rows (data rows "
                         f"{rows}, counting from 1): fill in each row's cluster or drop those rows")


@dataclass(frozen=True, eq=False)
class ClusterStructure:
    """Clusters of the analysed rows and the case that applies.

    ``codes`` (n,) are cluster codes ``0..G-1`` in sorted order of the cluster values
    (``names``); ``level`` is "cluster" or "unit"; ``mixed`` the number of clusters holding
    both groups and ``mixed_share`` their share; ``sizes`` patients per cluster.
    """

    column: str
    codes: np.ndarray
    names: list
    level: str
    requested: str
    mixed: int
    mixed_share: float
    sizes: np.ndarray
    exposed_share: np.ndarray  # per cluster: share of its rows exposed
    singletons: int  # clusters of one row

    @property
    def n_clusters(self) -> int:
        return int(self.sizes.size)

    def reason(self) -> str:
        if self.level == "cluster":
            return ("exposure is constant within every cluster: cluster-level assignment, "
                    "the design and the test use clusters as the units")
        return (f"exposure varies within {self.mixed} of {self.n_clusters} clusters "
                f"({100 * self.mixed_share:.1f} %): unit-level assignment within clusters, the "
                "unit-level test stays valid; estimates get cluster-robust variances")


def cluster_structure(values, t, *, column, level="auto") -> ClusterStructure:
    """Code the clusters of the analysed rows and decide cluster-level or unit-level exposure.

    Parameters
    ----------
    values : (n,) the cluster column over the analysed rows
    t : (n,) 0/1 exposure of the same rows
    column : str, the column's name (for messages)
    level : {"auto", "cluster", "unit"}
    """
    if level not in LEVELS:
        raise InputError(f"`cluster_level` must be one of {', '.join(LEVELS)}; got {level!r}")
    values = pd.Series(np.asarray(values, dtype=object))
    codes, uniques = pd.factorize(values.astype(str), sort=True)
    t = np.asarray(t, dtype=float)
    n, G = codes.size, len(uniques)
    if G == n:
        raise InputError(f"`cluster` column {column!r} has a different value in every analysed row "
                         f"({n} rows): it identifies rows, not clusters; give the column of the "
                         "assigned unit (hospital, clinic, region) or leave out `cluster`")
    if G < 2:
        raise InputError(f"`cluster` column {column!r} holds a single cluster: no comparison "
                         "between clusters is possible; leave out `cluster`")
    sizes = np.bincount(codes, minlength=G)
    share = np.bincount(codes, weights=t, minlength=G) / sizes
    mixed = int(np.sum((share > 0) & (share < 1)))
    chosen = level if level != "auto" else ("cluster" if mixed == 0 else "unit")
    if chosen == "cluster" and mixed:
        raise InputError(f"`cluster_level=cluster`: exposure varies within {mixed} of {G} clusters "
                         f"of {column!r} ({100 * mixed / G:.1f} %); cluster-level assignment needs "
                         "one exposure per cluster: fix the data or use `cluster_level=unit`")
    if chosen == "cluster":
        for name, value in (("exposed", 1.0), ("reference", 0.0)):
            k = int(np.sum(share == value))
            if k < 2:
                raise InputError(f"`cluster` column {column!r}: the {name} group is "
                                 f"{'a single cluster' if k == 1 else 'no cluster'}, so exposure is "
                                 "confounded with that cluster and no comparison of clusters is "
                                 "possible; a cluster-level comparison needs at least 2 clusters per group")
    return ClusterStructure(column=column, codes=codes.astype(np.int64),
                            names=[str(u) for u in uniques], level=chosen, requested=level,
                            mixed=mixed, mixed_share=mixed / G, sizes=sizes.astype(np.int64),
                            exposed_share=share, singletons=int(np.sum(sizes == 1)))


def cluster_table(X, names, codes):
    """Cluster-level covariates: cluster covariates as they are, unit covariates as means.

    Returns ``(Xc (G, p), kinds)``: ``kinds[j]`` is "cluster covariate" (constant within every
    cluster) or "cluster mean" (of a unit-level covariate).
    """
    X = np.asarray(X, dtype=float)
    G = int(codes.max()) + 1
    sizes = np.bincount(codes, minlength=G).astype(float)
    means = np.stack([np.bincount(codes, weights=X[:, j], minlength=G) / sizes
                      for j in range(X.shape[1])], axis=1) if X.shape[1] else np.zeros((G, 0))
    spread = np.abs(X - means[codes]).max(axis=0) if X.size else np.zeros(X.shape[1])
    scale = np.maximum(np.abs(X).max(axis=0), 1.0) if X.size else np.ones(X.shape[1])
    kinds = ["cluster covariate" if s <= 1e-12 * c else "cluster mean" for s, c in zip(spread, scale)]
    return means, kinds


def undeclared_clusters(table: pd.DataFrame, row_ids, t, *, used) -> list[dict]:
    """Columns that look like an undeclared assigned unit (rule in the module docstring).

    Returns one dict per flagged column: ``column, values, share`` (share of analysed rows in
    exposure-constant values).
    """
    row_ids = np.asarray(row_ids)
    t = np.asarray(t, dtype=float)
    n = row_ids.size
    found = []
    for col in table.columns:  # one column at a time: no copy of the whole table
        if col in used:
            continue
        s = table[col].iloc[row_ids]
        known = s.notna().to_numpy()
        if known.sum() < n * PURE_SHARE:
            continue
        codes, uniques = pd.factorize(s[known])
        k = len(uniques)
        if not MIN_VALUES <= k <= n / 5:
            continue
        sizes = np.bincount(codes, minlength=k)
        share = np.bincount(codes, weights=t[known], minlength=k) / sizes
        pure1, pure0 = share == 1, share == 0
        if not (pure1.any() and pure0.any()):
            continue
        pure = float(sizes[pure1 | pure0].sum() / n)
        if pure >= PURE_SHARE:
            found.append({"column": str(col), "values": int(k), "share": pure})
    return found
