"""The permutation test when whole clusters (hospitals, clinics, regions) were assigned.

If exposure was decided per cluster, the assignment mechanism shuffles exposure among the
clusters of a stratum, not among patients: shuffling patients ignores the correlation of
outcomes within a cluster and rejects a true null far too often. Following Rosenbaum (2002,
sec. 2 and ch. 3) the test permutes the clusters' exposure within strata of clusters, with a
statistic built from quantities fixed under the sharp null: the patient-level residuals of an
outcome model of the covariates with stratum effects (never the exposure), summed per cluster.

Weights (the estimand's unit, said on the result):

* ``"patients"`` (the default; the headline's estimand is a patient average): within stratum s
  the contrast is ``sum_{exposed c} R_c / (K1_s mbar_s) - sum_{reference c} R_c / (K0_s
  mbar_s)``, ``R_c`` the cluster's residual total, ``K1_s`` / ``K0_s`` its exposed / reference
  clusters and ``mbar_s`` its mean cluster size: a Horvitz-Thompson difference of patient
  means, whose denominators do not change under the shuffle. Stratum weights: ATE ``N_s / N``
  (patients), ATT ``K1_s mbar_s / sum_s K1_s mbar_s`` (expected exposed patients, fixed under
  the shuffle).
* ``"clusters"``: each cluster's mean residual, clusters weighted equally; stratum weights ATE
  ``K_s / K``, ATT ``K1_s / K1``.

Either way the statistic is linear in per-cluster values, so every engine of
:func:`stratagap.inference.stratified_test` (exact enumeration, Monte Carlo, normal) applies
with clusters as the units, and its moments are exact.

References
----------
Rosenbaum, P. R. (2002). Covariance adjustment in randomized experiments and observational
studies. Statistical Science 17:286-327.
Rosenbaum, P. R. (2002). Observational Studies, 2nd ed. Springer, ch. 3.
Hansen, B. B., Rosenbaum, P. R. & Small, D. S. (2014). Clustered treatment assignments and
sensitivity to unmeasured biases in observational studies. JASA 109:133-144 (from memory).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import InputError
from .._base.layout import StratumLayout
from .permutation import stratified_test

__all__ = ["ClusterValues", "cluster_values", "cluster_test", "CLUSTER_WEIGHTS"]

CLUSTER_WEIGHTS = ("patients", "clusters")


@dataclass(frozen=True, eq=False)
class ClusterValues:
    """Per-cluster arrays of the cluster-level test (clusters ``0..G-1``).

    ``values`` are scaled so that the cluster-level estimand-weighted stratified difference of
    means is the statistic described in the module docstring; ``t``, ``labels`` and ``sizes``
    are each cluster's exposure, stratum and number of patients.
    """

    values: np.ndarray
    t: np.ndarray
    labels: np.ndarray
    sizes: np.ndarray
    weight: str
    stratum_weights: np.ndarray  # the estimand's stratum weights for `weight`


def cluster_values(values, t, labels, clusters, *, estimand, weight="patients") -> ClusterValues:
    """Aggregate patient-level ``values`` to the clusters of a cluster-level design.

    Parameters
    ----------
    values : (n,) float, e.g. residuals from :func:`stratagap.inference.residualize`
    t : (n,) 0/1 exposure, constant within each cluster
    labels : (n,) stratum labels >= 0, constant within each cluster
    clusters : (n,) cluster codes ``0..G-1``
    estimand : {"ate", "att"}
    weight : {"patients", "clusters"}
    """
    if weight not in CLUSTER_WEIGHTS:
        raise InputError(f"`cluster_weight` must be one of {', '.join(CLUSTER_WEIGHTS)}; got {weight!r}")
    clusters = np.asarray(clusters, dtype=np.int64)
    G = int(clusters.max()) + 1
    sizes = np.bincount(clusters, minlength=G).astype(float)
    totals = np.bincount(clusters, weights=np.asarray(values, dtype=float), minlength=G)
    tc = np.bincount(clusters, weights=t, minlength=G) / sizes
    sc = np.bincount(clusters, weights=labels, minlength=G) / sizes
    if np.any((tc != 0) & (tc != 1)) or np.any(sc != np.round(sc)):
        raise InputError("the cluster-level test needs exposure and stratum constant within "
                         "each cluster; use the unit-level test for exposure varying within clusters")
    tc, sc = tc.astype(np.int8), sc.astype(np.int64)
    layout = StratumLayout.build(sc, tc, estimand)  # cluster counts: K_s, K1_s, K0_s
    s = layout.codes
    if weight == "patients":
        N_s = np.bincount(s, weights=sizes, minlength=layout.n_strata)
        mbar = N_s / layout.n
        v = totals / mbar[s]  # Horvitz-Thompson: R_c / mbar_s
        target = N_s if estimand == "ate" else layout.n1 * mbar  # patients / expected exposed
        W = target / target.sum()
    else:
        v = totals / sizes  # cluster means, clusters weighted equally
        W = layout.weights
    # the engine weights strata by cluster counts; rescaling a stratum's values by a constant
    # keeps the statistic linear and the test exact
    v = v * (W / layout.weights)[s]
    return ClusterValues(values=v, t=tc, labels=sc, sizes=sizes, weight=weight,
                         stratum_weights=W)


def cluster_test(values, t, labels, clusters, *, estimand, weight="patients", **options):
    """The stratified permutation test with clusters as the units.

    ``options`` are those of :func:`stratagap.inference.stratified_test` (``alternative``,
    ``engine``, ``resamples``, ``seed``, ``batch_size``, ``progress``); the statistic is the
    estimand-weighted stratified difference of means of :func:`cluster_values`.

    Returns
    -------
    (PermutationResult, ClusterValues)
    """
    cv = cluster_values(values, t, labels, clusters, estimand=estimand, weight=weight)
    result = stratified_test(cv.values, cv.t, cv.labels, estimand=estimand,
                             statistic="mean_difference", **options)
    return result, cv
