"""Wiring of ``cluster=``: the assigned unit is a cluster (hospital, clinic, region).

Three hooks the pipeline calls, so :mod:`stratagap.pipeline` changes by a few lines:

1. :func:`structure` (after the data stage): without ``cluster`` it only warns when a column
   looks like an undeclared cluster; with it, codes the clusters and decides the case
   (:mod:`stratagap.data._clusters`).
2. :func:`design` (cluster-level exposure only): score model, overlap and strata at the
   cluster level, on the cluster table (cluster covariates and cluster means of unit
   covariates), expanded back to the rows so every later stage sees its usual arrays.
3. :func:`finish` (after every unit-level stage): the cluster-level test and Gamma bounds
   (cluster-level exposure), CR2 intervals for the headline and the plain stratified difference,
   the CR1 IPW sandwich, the few-clusters caution and the ``clusters`` block.
"""

from __future__ import annotations

import dataclasses
import warnings
from dataclasses import dataclass

import numpy as np

from ._base.jsonable import fields_dict, jsonable
from ._base.layout import StratumLayout
from .data import check_cluster_column, cluster_structure, cluster_table, undeclared_clusters
from .errors import ClusterWarning, InputError, StrataWarning
from .estimation import clustered_estimate, ipw_cluster_sandwich
from .inference import cluster_test
from .result import TEST_LABELS, PermutationTests
from . import sensitivity as _sensitivity
from .sensitivity import cluster_gamma_bounds
from .stratify import balance as _balance
from .stratify import overlap as _overlap
from .stratify import scores as _scores
from .stratify import strata as _strata

__all__ = ["ClusterBlock", "check", "structure", "design", "finish", "FEW_CLUSTERS"]

#: Fewer clusters than this in a group: asymptotic intervals are unreliable (common practice,
#: cf. Cameron & Miller 2015, sec. VI; Bell & McCaffrey 2002).
FEW_CLUSTERS = 20
#: Estimators whose uncertainty is not cluster-robust in this release (listed in the output).
_NOT_ROBUST = ("cross-check rows of the table (IPW, AIPW, standardization): unit-level "
               "sandwich variances; see the CR1 IPW row of this block",
               "Mantel-Haenszel estimates (binary outcomes)",
               "heterogeneity tests across strata",
               "negative-control check (unit-level test and variance)")


@dataclass(frozen=True)
class ClusterBlock:
    """The ``clusters`` block of ``results.json`` (present only with ``cluster``)."""

    column: str
    level: str  # "cluster" (exposure per cluster) or "unit" (exposure varies within clusters)
    requested_level: str
    reason: str
    mixed_clusters: int
    mixed_share: float
    clusters_by_group: dict  # analysed clusters: exposed / reference (unit level: holding any)
    patients_per_cluster: dict  # min, median, max over analysed clusters
    single_patient_clusters: int
    test_level: str  # "clusters" or "units"
    test_weights: str
    few_clusters: bool
    caution: str | None
    flow: dict  # clusters at complete cases, set aside by the overlap rule, analysed
    intervals: list  # ClusterRobust rows (CR2 headline, plain, ratio; CR1 IPW)
    not_cluster_robust: list
    design: dict | None = None  # cluster-level score, covariate kinds, balance, strata

    def to_dict(self) -> dict:
        return fields_dict(self)


def check(table, spec) -> None:
    """The cluster column's own checks (before the data stage)."""
    if spec.cluster is None:
        return
    used = {spec.exposure, spec.outcome, *(spec.covariates or ())}
    check_cluster_column(table, spec.cluster, used=used)


def structure(table, spec, prepared):
    """Clusters of the analysed rows, or None (then warn on a likely undeclared cluster)."""
    if spec.cluster is None:
        used = {spec.exposure, spec.outcome, spec.strata_column, spec.negative_control,
                *prepared.covariates, *prepared.raw.columns}
        for hit in undeclared_clusters(table, prepared.row_ids, prepared.t, used=used):
            warnings.warn(
                f"Column {hit['column']!r} ({hit['values']} values) looks like the unit that was "
                f"assigned: exposure is constant within the values holding "
                f"{100 * hit['share']:.0f} % of the rows (rule: 5 to n/5 values, >= 95 % of rows "
                f"in exposure-constant values). If exposure was decided per {hit['column']}, "
                f"rerun with `cluster={hit['column']}`.", ClusterWarning)
        return None
    values = table[spec.cluster].to_numpy()[prepared.row_ids]
    cs = cluster_structure(values, prepared.t, column=spec.cluster,
                                     level=spec.cluster_level)
    if cs.singletons:
        warnings.warn(f"{cs.singletons} of {cs.n_clusters} clusters of {spec.cluster!r} hold a "
                      "single row; they count as clusters of one (check the column if this is "
                      "unexpected).", ClusterWarning)
    if cs.level == "unit":
        warnings.warn(f"`cluster={spec.cluster}`: {cs.reason()}.", ClusterWarning)
    return cs


def _by_group(t, counts=None):
    t = np.asarray(t)
    w = np.ones(t.size) if counts is None else counts
    return {"exposed": int(np.sum(w[t == 1])), "reference": int(np.sum(w[t == 0]))}


def design(prepared, spec, cs):
    """Score, overlap and strata of clusters, expanded to the rows.

    Returns ``(propensity, overlap, strata, details)``; ``details`` keeps the cluster-level
    objects for the ``clusters`` block.
    """
    codes = cs.codes
    Xc, kinds = cluster_table(prepared.X, prepared.design_names, codes)
    tc = (cs.exposed_share > 0.5).astype(np.int8)
    user = None
    if prepared.user_strata is not None:
        per = np.bincount(codes, weights=prepared.user_strata) / cs.sizes
        if np.any(per != np.round(per)):
            raise InputError(f"`strata_column` {spec.strata_column!r} varies within clusters of "
                             f"{spec.cluster!r}; with cluster-level exposure strata are sets of "
                             "clusters: give one stratum per cluster")
        user = per.astype(np.int64)
    fit = _scores.fit_propensity(Xc, tc, prepared.design_names, method=spec.score_model,
                                 folds=spec.folds, seed=spec.seed)
    ov = _overlap.apply_overlap(fit.score, tc, estimand=spec.estimand, rule=spec.trim)
    keep_c = np.asarray(ov.keep, dtype=bool)
    n_strata = _strata_of_clusters(spec, tc[keep_c])
    st = _strata.make_strata(fit.score[keep_c], tc[keep_c], estimand=spec.estimand,
                             n_strata=n_strata, method=spec.strata_method,
                             min_per_group=spec.min_per_group,
                             user_labels=None if user is None else user[keep_c],
                             logit=fit.logit[keep_c],
                             min_block=len(prepared.design_names) + 2)  # clusters per block
    label_c = np.full(cs.n_clusters, -1, dtype=np.int64)
    label_c[keep_c] = st.labels
    keep = keep_c[codes]
    labels = label_c[codes][keep]
    t_keep = prepared.t[keep]
    inside = labels >= 0
    layout = StratumLayout.build(labels[inside], t_keep[inside], spec.estimand)
    sizes = cs.sizes.astype(float)
    table = []
    for i, row in enumerate(st.table):
        table.append({**row, "n_exposed": int(layout.n1[i]), "n_reference": int(layout.n0[i]),
                      "n": int(layout.n[i]), "weight": float(layout.weights[i]),
                      "n_exposed_clusters": int(row["n_exposed"]),
                      "n_reference_clusters": int(row["n_reference"])})
    strata = dataclasses.replace(
        st, labels=labels, table=table,
        set_aside=_by_group(t_keep[~inside]),
        notes=list(st.notes) + ["strata are sets of clusters; counts are rows, with the "
                                "clusters in n_exposed_clusters / n_reference_clusters"])
    overlap = dataclasses.replace(ov, keep=keep, set_aside=_by_group(prepared.t[~keep]))
    propensity = dataclasses.replace(fit, score=fit.score[codes], logit=fit.logit[codes])
    in_c = np.flatnonzero(keep_c)[np.asarray(st.labels) >= 0]
    terms = [dataclasses.replace(
        term, values=None if term.values is None else
        np.bincount(codes, weights=term.values, minlength=cs.n_clusters)[in_c] / sizes[in_c],
        kind="continuous" if kinds[term.column] == "cluster mean" else term.kind)
        for term in prepared.terms]
    lab_in = label_c[in_c]
    bal = _balance.balance_table(Xc[in_c], tc[in_c], terms,
                                 weights_after=_strata.unit_weights(lab_in, tc[in_c], spec.estimand),
                                 logit=fit.logit[in_c])
    details = {
        "score_auc": fit.auc, "score_coefficients": fit.coefficients,
        "covariates": [{"column": n, "kind": k} for n, k in zip(prepared.design_names, kinds)],
        "clusters_in_strata": _by_group(tc[in_c]),
        "trimmed_clusters": _by_group(tc[~keep_c]),
        "strata": [{"stratum": r["stratum"], "n_exposed_clusters": r["n_exposed_clusters"],
                    "n_reference_clusters": r["n_reference_clusters"]} for r in table],
        "balance_clusters": {"max_abs_smd_before": bal.max_abs_smd_before,
                             "max_abs_smd_after": bal.max_abs_smd_after, "rows": bal.rows},
        "note": ("score model, overlap and strata fitted on one row per cluster: cluster "
                 "covariates as they are, unit covariates as cluster means; balance is shown "
                 "at both levels (rows: the balance table; clusters: here)"),
    }
    return propensity, overlap, strata, details


def _strata_of_clusters(spec, tc):
    """The requested number of strata, capped at what the clusters support (with a warning).

    The cap is the strata stage's own rule (``make_strata``: ``n // (2 min_per_group)`` and
    half the smaller group), counted in clusters.
    """
    K, K1 = tc.size, int(tc.sum())
    supported = max(1, min(K // (2 * spec.min_per_group), min(K1, K - K1) // 2))
    if spec.n_strata > supported and spec.strata_column is None and spec.strata_method == "quantile":
        warnings.warn(f"Strata of clusters: {K1} exposed and {K - K1} reference clusters support "
                      f"at most {supported} strata; {supported} used instead of {spec.n_strata}.",
                      StrataWarning)
        return supported
    return spec.n_strata


def finish(cs, spec, *, design_details, used, y, t, X, labels, names, tests, adjusted, plain,
           risk_ratio, sensitivity, score, terms, binary, progress):
    """Cluster-level test and bounds, cluster-robust intervals, and the ``clusters`` block.

    Returns a dict of the pipeline's parts to replace (``tests``, ``adjusted``, ``plain``,
    ``risk_ratio``, ``constant_effect``, ``sensitivity``) plus ``clusters``.
    """
    _, codes = np.unique(cs.codes[used], return_inverse=True)  # analysed clusters 0..G-1
    G = int(codes.max()) + 1
    sizes = np.bincount(codes, minlength=G)
    share = np.bincount(codes, weights=t, minlength=G) / sizes
    out = {}
    if cs.level == "cluster":
        by_group = {"exposed": int(np.sum(share == 1)), "reference": int(np.sum(share == 0))}
        values = tests["values"]
        main, cv = cluster_test(values, t, labels, codes, estimand=spec.estimand,
                                weight="patients", alternative=spec.alternative,
                                engine=spec.engine, resamples=spec.resamples, seed=spec.seed,
                                batch_size=spec.batch_size, progress=progress)
        out["tests"] = PermutationTests(
            main=main, statistic_kind=spec.statistic,
            statistic_label=f"{TEST_LABELS[spec.statistic]}; clusters as the units: exposure "
                            "shuffled among the clusters of each stratum of clusters, residual "
                            "totals per cluster, rows weighted equally (Horvitz-Thompson)")
        bounds, threshold = cluster_gamma_bounds(cv, observed=main.statistic,
                                                 estimand=spec.estimand,
                                                 alternative=spec.alternative, alpha=spec.alpha,
                                                 gammas=spec.gamma_grid)
        out["sensitivity"] = dataclasses.replace(
            sensitivity, gamma_bounds=bounds, gamma_threshold_detail=threshold,
            gamma_level=threshold.alpha, gamma_direction=bounds.direction)
        out["constant_effect"] = None  # the inversion shuffles rows, not clusters
        test_level = "clusters"
    else:
        by_group = {"exposed": int(np.sum(share > 0)), "reference": int(np.sum(share < 1))}
        test_level = "units"
    weights = np.array([row["weight"] for row in adjusted.per_stratum])
    common = dict(weights=weights, names=names, estimand=spec.estimand, alpha=spec.alpha)
    new_adjusted, row = clustered_estimate(adjusted, y, t, X, labels, codes,
                                                      name="headline", **common)
    intervals = [row]
    new_plain, row = clustered_estimate(plain, y, t, X, labels, codes,
                                                   name="plain stratified difference", **common)
    intervals.append(row)
    out.update(adjusted=new_adjusted, plain=new_plain, risk_ratio=risk_ratio)
    if risk_ratio is adjusted:
        out["risk_ratio"] = new_adjusted
    elif risk_ratio is not None:
        out["risk_ratio"], row = clustered_estimate(
            risk_ratio, y, t, X, labels, codes, name="standardized risk ratio", **common)
        intervals.append(row)
    # the E-value and the tipping grid read the cluster-robust intervals
    sens = out.get("sensitivity", sensitivity)
    out["sensitivity"] = dataclasses.replace(
        sens, e_value=_sensitivity.headline_e_value(new_adjusted, out["risk_ratio"], y, t,
                                                    binary=binary, alpha=spec.alpha),
        tipping=_sensitivity.tipping_grid(
            new_adjusted.estimate, new_adjusted.ci_low, new_adjusted.ci_high,
            measure="difference", benchmarks=_sensitivity.covariate_benchmarks(terms, X, y, t)))
    intervals.append(ipw_cluster_sandwich(y, t, score, codes, estimand=spec.estimand,
                                                     alpha=spec.alpha))
    few = min(by_group.values()) < FEW_CLUSTERS
    caution = None
    if few:
        caution = (f"Few clusters ({by_group['exposed']} exposed, {by_group['reference']} "
                   f"reference; fewer than {FEW_CLUSTERS} in a group): asymptotic intervals, the "
                   "cluster-robust ones included, are unreliable; the permutation test "
                   + ("at the cluster level is the primary inference." if test_level == "clusters"
                      else "is the primary inference."))
        warnings.warn(caution, ClusterWarning)
    flow = {"clusters_complete_cases": int(cs.n_clusters), "clusters_analysed": by_group,
            "clusters_analysed_total": G}
    if design_details is not None:
        flow["clusters_trimmed"] = design_details["trimmed_clusters"]
    out["clusters"] = ClusterBlock(
        column=cs.column, level=cs.level, requested_level=cs.requested, reason=cs.reason(),
        mixed_clusters=cs.mixed, mixed_share=cs.mixed_share, clusters_by_group=by_group,
        patients_per_cluster={"min": int(sizes.min()), "median": float(np.median(sizes)),
                              "max": int(sizes.max())},
        single_patient_clusters=int(np.sum(sizes == 1)), test_level=test_level,
        test_weights=("rows (patients) weighted equally; stratum weights in rows"
                      if test_level == "clusters" else "unit-level test (rows are the units)"),
        few_clusters=few, caution=caution, flow=flow, intervals=intervals,
        not_cluster_robust=list(_NOT_ROBUST) + (
            ["constant-effect inversion: not run (it shuffles rows, not clusters)"]
            if test_level == "clusters" else []),
        design=None if design_details is None else jsonable(design_details))
    return out
