"""Gamma bounds when clusters, not people, were assigned: the cluster is the unit of the model.

With clustered assignment the sensitivity model of Rosenbaum (2002, ch. 4) acts on the units
that were assigned: within a stratum of clusters, an unobserved ``u_c`` in [0, 1] per cluster
makes the chance of an exposed set A of clusters proportional to ``Gamma ** sum(u_c, c in A)``
(Hansen, Rosenbaum & Small 2014, sec. 3, from memory). Gamma then bounds how far two clusters
with equal covariates may differ in their odds of adopting the exposure. The cluster-level
test statistic is linear in per-cluster values (:mod:`stratagap.inference.clusters`), so the
bounds of :func:`stratagap.sensitivity.gamma_bounds` apply with clusters as the units: the
separable value (Gastwirth, Krieger & Rosenbaum 2000) and the conservative end of the bracket.

References
----------
Rosenbaum, P. R. (2002). Observational Studies, 2nd ed. Springer, ch. 4.
Hansen, B. B., Rosenbaum, P. R. & Small, D. S. (2014). Clustered treatment assignments and
sensitivity to unmeasured biases in observational studies. JASA 109:133-144 (from memory).
Gastwirth, J. L., Krieger, A. M. & Rosenbaum, P. R. (2000). Asymptotic separability in
sensitivity analysis. JRSS B 62:545-555.
"""

from __future__ import annotations

from ._gamma_bounds import gamma_bounds, sensitivity_value

__all__ = ["cluster_gamma_bounds"]


def cluster_gamma_bounds(cluster_values, *, observed, estimand, alternative, alpha, gammas):
    """Gamma bounds and the sensitivity value of the cluster-level test.

    Parameters
    ----------
    cluster_values : :class:`stratagap.inference.clusters.ClusterValues`
        The per-cluster values, exposure and strata the cluster-level test ran on.
    observed : float
        The cluster-level test's statistic; its sign picks the direction of the bounds.
    estimand, alternative, alpha, gammas
        As in :class:`stratagap.spec.AnalysisSpec`.

    Returns
    -------
    (GammaBounds, SensitivityValue)
    """
    cv = cluster_values
    direction = "greater" if observed >= 0 else "less"
    bounds = gamma_bounds(cv.values, cv.t, cv.labels, estimand=estimand,
                          statistic="mean_difference", direction=direction, gammas=gammas)
    threshold = sensitivity_value(cv.values, cv.t, cv.labels, estimand=estimand,
                                  statistic="mean_difference", direction=direction, alpha=alpha,
                                  two_sided=alternative == "two-sided")
    return bounds, threshold
