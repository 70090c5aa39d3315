"""`analyze`: the whole pipeline, from a table to an :class:`AnalysisResult`.

data -> scores -> overlap -> strata -> balance -> permutation test -> effects -> cross-checks
-> heterogeneity -> sensitivity -> verdict. Each stage lives in its own module; this one only
wires them together, in one direction, and records every warning on the result.
"""

from __future__ import annotations

import dataclasses
import time
import warnings
from pathlib import Path

import numpy as np
import pandas as pd

from .stratify import balance as _balance
from .stratify.higher_order import higher_order_balance
from .estimation import crosscheck as _crosscheck
from . import data as _data
from .estimation import effects as _effects
from .estimation import heterogeneity as _heterogeneity
from .stratify import overlap as _overlap
from .inference import permutation as _permutation
from .stratify import scores as _scores
from . import sensitivity as _sensitivity
from .stratify import strata as _strata
from .stratify import matching as _matching
from ._base.layout import StratumLayout
from . import _cluster_wiring as _clusters
from . import _followup_wiring as _followup
from .errors import InputError, MissingDataWarning, StrataWarning, StratagapWarning
from .result import (AnalysisResult, CAUTIONS, TEST_LABELS, ParticipantFlow, PermutationTests,
                     PreparedSummary, versions)
from .spec import AnalysisSpec
from .render.verdict import write_verdict

__all__ = ["analyze"]


def analyze(table, *, exposure: str, outcome: str, covariates=None, progress=None,
            source: dict | None = None, command: str | None = None,
            **options) -> AnalysisResult:
    """Adjusted, permutation-tested comparison of an outcome between two non-randomized groups.

    Parameters
    ----------
    table : pandas.DataFrame or path-like
        The data: one row per person. A path is read with :func:`stratagap.data.read_table`.
    exposure, outcome : str
        Column names. The exposure must have two values (see ``exposed_value``).
    covariates : list of str or comma-separated str, optional
        Measured confounders for the propensity score, the balance checks and the covariance
        adjustment. Optional when ``formula`` is given.
    progress : callable(done, total), optional
        Called while resampling (the CLI passes a progress bar).
    source : dict, optional
        Description of the input (file name, SHA-256), stored on the result.
    command : str, optional
        The command line that asked for the analysis; kept in ``result.run`` (``run.json``),
        not in ``results.json``, whose bytes must not depend on the output folder.
    **options
        Any other field of :class:`stratagap.spec.AnalysisSpec` (``estimand="ate"``,
        ``n_strata=5``, ``resamples=10000``, ``seed=2026``, ``alpha=0.05``, ...).

    Returns
    -------
    AnalysisResult
        Frozen; ``to_dict()`` is what ``results.json`` holds.
    """
    started = time.perf_counter()
    clock = _StageClock()
    if isinstance(table, (str, Path)):
        source = source or {"file": str(table)}
        table = _data.read_table(table)
    if not isinstance(table, pd.DataFrame):
        raise InputError(f"`table` must be a pandas DataFrame or a file path; got {type(table).__name__}")
    spec = AnalysisSpec(exposure=exposure, outcome=outcome, covariates=covariates, **options)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", StratagapWarning)
        parts = _run(table, spec, progress, clock)
    seen, recorded = set(), []
    for w in caught:
        if not issubclass(w.category, StratagapWarning):
            continue
        key = (w.category.__name__, str(w.message))
        if key not in seen:
            seen.add(key)
            recorded.append({"kind": w.category.__name__, "message": str(w.message)})
            # recorded in the result, and raised again for whoever called analyze (notebooks)
            warnings.warn(str(w.message), w.category, stacklevel=2)
    clock.lap("result")
    run = {"seconds": round(time.perf_counter() - started, 3), "versions": versions(),
           "command": command, "stages": clock.to_dict()}
    return AnalysisResult(spec=spec, source=source or {}, warnings=tuple(recorded),
                          cautions=CAUTIONS, run=run, **parts)


def _run(table: pd.DataFrame, spec: AnalysisSpec, progress, clock) -> dict:
    _clusters.check(table, spec)
    prepared = _data.prepare(
        table, exposure=spec.exposure, outcome=spec.outcome,
        covariates=list(spec.covariates) if spec.covariates else None,
        exposed_value=spec.exposed_value, outcome_type=spec.outcome_type,
        outcome_event=spec.outcome_event, formula=spec.formula, missing=spec.missing,
        strata_column=spec.strata_column, negative_control=spec.negative_control,
        censoring_weights=spec.censoring_weights, pool_rare_levels=spec.pool_rare_levels,
        terms=spec.terms, cluster=spec.cluster, time=spec.time, person_time=spec.person_time)
    clusters = _clusters.structure(table, spec, prepared)  # None without `cluster`
    clock.lap("data")
    binary = prepared.outcome_type == "binary"
    if spec.measure != "difference" and not binary and prepared.followup is None:
        raise InputError(f"`measure={spec.measure}` needs a binary outcome; "
                         f"{spec.outcome!r} is continuous: use `measure=difference`")
    crude = None if prepared.followup is not None else _effects.crude(  # follow-up: own crude
        prepared.y, prepared.t, prepared.outcome_type, alpha=spec.alpha,
        measure=spec.measure if prepared.outcome_type == "binary" else "difference")
    clock.lap("effects")

    cluster_design = None
    matching = None
    if clusters is not None and clusters.level == "cluster":  # score, overlap, strata of clusters
        propensity, overlap, strata, cluster_design = _clusters.design(prepared, spec, clusters)
        keep = np.asarray(overlap.keep, dtype=bool)
        clock.lap("strata")
    else:
        propensity = _scores.fit_propensity(prepared.X, prepared.t, prepared.design_names,
                                            method=spec.score_model, folds=spec.folds, seed=spec.seed)
        clock.lap("scores")
        overlap = _overlap.apply_overlap(propensity.score, prepared.t, estimand=spec.estimand,
                                         rule=spec.trim)
        clock.lap("overlap")
        keep = np.asarray(overlap.keep, dtype=bool)
        user = None if prepared.user_strata is None else prepared.user_strata[keep]
        if spec.design == "match":  # matched sets built on the score are the strata from here on
            matching, strata = _matching.matched_design(
                propensity.score, propensity.logit, prepared.t, keep, table=table,
                row_ids=prepared.row_ids, per_exposed=spec.per_exposed, caliper_sd=spec.caliper_sd,
                same_value_on=spec.same_value_on)
            overlap = dataclasses.replace(overlap, estimand_label=_matching.population_label(
                overlap.estimand_label, matching))
        else:
            strata = _strata.make_strata(propensity.score[keep], prepared.t[keep],
                                         estimand=spec.estimand, n_strata=spec.n_strata,
                                         method=spec.strata_method,
                                         min_per_group=spec.min_per_group, user_labels=user,
                                         logit=propensity.logit[keep],
                                         # Imbens & Rubin 2015, ch. 13: a new block needs >= K + 2
                                         min_block=len(prepared.design_names) + 2)
        clock.lap("strata")
    # Rows analysed: kept by the overlap rule and in a stratum holding both groups.
    in_stratum = np.asarray(strata.labels) >= 0
    used = np.flatnonzero(keep)[in_stratum]
    labels = np.asarray(strata.labels)[in_stratum]
    t, y, X = prepared.t[used], prepared.y[used], prepared.X[used]
    population = overlap.estimand_label

    terms = [dataclasses.replace(term, values=None if term.values is None else term.values[used])
             for term in prepared.terms]
    weights = _strata.unit_weights(labels, t, spec.estimand)
    if matching is None:
        balance = _balance.balance_table(X, t, terms, weights_after=weights,
                                         logit=propensity.logit[used])
    else:  # before: every unit offered to the matching; after: the matched sample
        balance = _matching.matched_balance(prepared, keep, used, weights, propensity.logit)
    balance = dataclasses.replace(balance, higher_order=higher_order_balance(
        terms, t, labels, estimand=spec.estimand, seed=spec.seed))
    clock.lap("balance")

    layout = StratumLayout.build(labels, t, spec.estimand)  # one layout of the analysed rows
    design = dict(propensity=propensity, overlap=overlap, strata=strata, matching=matching,
                  balance=balance, keep=keep, used=used, labels=labels, t=t, y=y)
    if prepared.followup is not None:  # time to an event, or events over person-time
        context = _followup.FollowupContext(
            spec=spec, prepared=prepared, used=used, labels=labels, t=t, y=y, X=X,
            followup=prepared.followup[used], weights=weights, layout=layout,
            population=population, propensity=propensity, overlap=overlap, strata=strata,
            balance=balance, terms=terms, progress=progress, names=prepared.design_names,
            n_linear=prepared.n_linear)
        outcome_parts = _followup.followup_parts(context)
        clock.lap("followup")
        return _assemble(spec, prepared, design, outcome_parts, clock)
    tests, draws = _tests(spec, y, t, X, labels, layout, binary, progress)
    clock.lap("tests")
    headline_measure = "difference" if spec.measure == "difference" else spec.measure
    adjusted = _effects.stratified_regression(
        y, t, X, labels, estimand=spec.estimand, measure=headline_measure, alpha=spec.alpha,
        interaction_min_extra=spec.interaction_min_extra, population=population,
        names=prepared.design_names, n_linear=prepared.n_linear)
    plain = _effects.plain_stratified_difference(y, t, labels, estimand=spec.estimand,
                                                 alpha=spec.alpha, population=population)
    constant = None
    if not binary:
        # the shuffles drawn for the tests serve the inversion too
        constant = _effects.constant_effect(y, t, X, labels, estimand=spec.estimand,
                                            alpha=spec.alpha, resamples=spec.resamples,
                                            seed=spec.seed, engine=spec.engine,
                                            batch_size=spec.batch_size, population=population,
                                            draws=draws, layout=layout)
    mh = _effects.mantel_haenszel(y, t, labels, alpha=spec.alpha) if binary else None
    risk_ratio = None
    if binary:
        risk_ratio = adjusted if headline_measure == "rr" else _effects.stratified_regression(
            y, t, X, labels, estimand=spec.estimand, measure="rr", alpha=spec.alpha,
            interaction_min_extra=spec.interaction_min_extra, population=population,
            names=prepared.design_names, n_linear=prepared.n_linear)
    clock.lap("effects")

    cross = _crosscheck.cross_checks(y, t, X, estimand=spec.estimand, alpha=spec.alpha,
                                     outcome_type=prepared.outcome_type, measure=spec.measure,
                                     truncate=spec.truncate_weights,
                                     score=propensity.score[used], estimand_label=population,
                                     censoring_weights=None if prepared.censoring_weights is None
                                     else prepared.censoring_weights[used],
                                     censoring_score=None if prepared.censoring_score is None
                                     else prepared.censoring_score[used],
                                     n_linear=prepared.n_linear)
    cross = _crosscheck.compare_with_headline(cross, adjusted)
    if prepared.censoring_weights is not None:
        warnings.warn("Censoring weights enter the cross-check row 'IPW x censoring weights'; the "
                      "stratified headline and the permutation test use the complete cases "
                      "unweighted.", MissingDataWarning)
    clock.lap("cross_checks")
    heterogeneity = _heterogeneity.heterogeneity_across_strata(adjusted.per_stratum, y, t, labels,
                                                               binary=binary)
    clock.lap("heterogeneity")

    sensitivity = _sensitivity.sensitivity_analysis(
        # benchmarks swap one covariate's column: the linear design, one column per covariate
        tests["values"], t, labels, X[:, :prepared.n_linear], y, terms, test=tests["main"],
        statistic="sum" if spec.statistic == "sum" else "mean_difference",
        estimand=spec.estimand, alternative=spec.alternative, alpha=spec.alpha,
        gammas=spec.gamma_grid, adjusted=adjusted, risk_ratio=risk_ratio, binary=binary,
        seed=spec.seed, measure=spec.measure)
    clock.lap("sensitivity")
    negative = None if prepared.negative_control is None else _sensitivity.negative_control_check(
        prepared.negative_control[used], t, X, labels, column=spec.negative_control,
        names=prepared.design_names, estimand=spec.estimand, alpha=spec.alpha,
        engine=spec.engine, resamples=spec.resamples, seed=spec.seed,
        batch_size=spec.batch_size, interaction_min_extra=spec.interaction_min_extra,
        n_linear=prepared.n_linear)
    clock.lap("negative_control")
    cluster_parts = {}
    if clusters is not None:  # cluster-level test and bounds, cluster-robust intervals
        cluster_parts = _clusters.finish(
            clusters, spec, design_details=cluster_design, used=used, y=y, t=t, X=X,
            labels=labels, names=prepared.design_names, tests=tests, adjusted=adjusted,
            plain=plain, risk_ratio=risk_ratio, sensitivity=sensitivity,
            score=propensity.score[used], terms=terms, binary=binary, progress=progress)
        clock.lap("clusters")
    test_set = PermutationTests(main=tests["main"], statistic_kind=spec.statistic,
                                statistic_label=TEST_LABELS[spec.statistic],
                                studentized=tests.get("studentized"),
                                sum_statistic=tests.get("sum"))
    outcome_parts = dict(
        tests=test_set, crude=crude, adjusted=adjusted, plain=plain, constant_effect=constant,
        mantel_haenszel=mh, risk_ratio=risk_ratio, cross_checks=cross,
        heterogeneity=heterogeneity, sensitivity=sensitivity, negative_control=negative)
    outcome_parts.update(cluster_parts)  # the cluster-level test and bounds, the CR2 intervals
    return _assemble(spec, prepared, design, outcome_parts, clock)


def _assemble(spec, prepared, design: dict, outcome_parts: dict, clock) -> dict:
    """The result's fields: the study design's stages, the outcome's, the flow and the verdict."""
    propensity, overlap, strata, matching = (design[k] for k in (
        "propensity", "overlap", "strata", "matching"))
    keep, used, labels, t = (design[k] for k in ("keep", "used", "labels", "t"))
    flow = ParticipantFlow.from_stages(prepared.flow, trimmed_by_group=overlap.set_aside,
                                       strata_set_aside_by_group=getattr(strata, "set_aside", {})
                                       if matching is None else {},
                                       t_analysed=t, not_matched_by_group=None
                                       if matching is None else strata.set_aside,
                                       followup_by_step=None if prepared.followup is None
                                       else _followup.flow_by_step(
                                           prepared, keep, used, spec.time or spec.person_time,
                                           matched=matching is not None))
    parts = dict(
        prepared_summary=_prepared_summary(prepared, used), flow=flow, propensity=propensity,
        overlap=overlap, strata=strata, balance=design["balance"], matching=matching,
        arrays={"score": propensity.score, "t_all": prepared.t, "keep": keep, "used": used,
                "labels": labels, "t": t, "y": design["y"],
                "row_ids": prepared.row_ids,
                "matched_sets": None if matching is None else _matching.matched_sets_rows(
                    matching, prepared.t, prepared.row_ids, keep),
                # covariate columns of the analysed rows, for the baseline table
                "raw": prepared.raw.iloc[used].reset_index(drop=True)},
    )
    if prepared.followup is not None:  # follow-up time or person-time of the analysed rows
        parts["arrays"]["followup"] = prepared.followup[used]
    parts.update(outcome_parts)
    parts["verdict"] = write_verdict(spec=spec, **{k: parts[k] for k in (
        "crude", "adjusted", "tests", "balance", "sensitivity", "cross_checks",
        "negative_control", "overlap")})
    clock.lap("verdict")
    return parts


def _tests(spec, y, t, X, labels, layout, binary, progress):
    """The default test, its studentized companion and (binary outcomes) the MH sum test.

    Returns ``(tests, draws)``: the tests (a dict) and the
    :class:`stratagap.inference.SharedDraws` they used. The Monte Carlo engine draws the
    shuffles once for the default statistic, its studentized companion and (continuous
    outcomes) the residualized exposure of the constant-effect inversion, which is given the
    same ``draws``; every result is bit-identical to separate runs.
    """
    common = dict(estimand=spec.estimand, alternative=spec.alternative, engine=spec.engine,
                  resamples=spec.resamples, seed=spec.seed, batch_size=spec.batch_size,
                  layout=layout)
    if spec.statistic in ("adjusted", "studentized"):
        values = _permutation.residualize(y, X, labels)  # Rosenbaum 2002: fixed under the sharp null
    else:
        values = y
    name = {"adjusted": "mean_difference", "difference": "mean_difference",
            "studentized": "studentized", "sum": "sum"}[spec.statistic]
    companion = spec.statistic == "adjusted" and min(layout.n1.min(), layout.n0.min()) >= 2
    # columns drawn in the same pass as the main test's (the inversion's r_t = residualized t)
    columns = [values] if binary else [values, _permutation.residualize(t.astype(float), X,
                                                                         labels)]
    draws = _permutation.shared_draws(t, labels, columns=columns,
                                      studentized=[values] if companion else [])
    main = _permutation.stratified_test(values, t, labels, statistic=name, progress=progress,
                                        draws=draws, **common)
    out = {"main": main, "values": values,
           "adjusted": spec.statistic in ("adjusted", "studentized")}
    if companion:  # within-group variances need 2 units
        out["studentized"] = _permutation.stratified_test(values, t, labels,
                                                          statistic="studentized",
                                                          draws=draws, **common)
    elif spec.statistic == "adjusted":
        warnings.warn("The studentized (weak-null) companion test was not run: some strata "
                      "hold fewer than 2 units of a group (e.g. matched pairs).", StrataWarning)
    if binary and spec.statistic != "sum":
        out["sum"] = _permutation.stratified_test(y, t, labels, statistic="sum", **common)
    return out, draws


def _prepared_summary(prepared, used) -> PreparedSummary:
    return PreparedSummary(outcome_type=prepared.outcome_type,
                           exposure_levels=dict(prepared.exposure_levels),
                           outcome_levels=getattr(prepared, "outcome_levels", None),
                           covariates=list(prepared.covariates),
                           design_columns=list(prepared.design_names), n_used=int(len(used)),
                           covariate_terms=[f.to_dict() for f in prepared.forms])


class _StageClock:
    """Wall (``time.perf_counter``) and CPU (``time.process_time``, all threads of the process)
    seconds per stage, for ``run.json``: ``lap(name)`` charges the time since the previous lap
    to ``name`` (a name may recur: "effects" is charged before and after the tests)."""

    def __init__(self):
        self._stages = {}
        self._wall, self._cpu = time.perf_counter(), time.process_time()

    def lap(self, stage: str) -> None:
        wall, cpu = time.perf_counter(), time.process_time()
        spent = self._stages.setdefault(stage, {"wall": 0.0, "cpu": 0.0})
        spent["wall"] += wall - self._wall
        spent["cpu"] += cpu - self._cpu
        self._wall, self._cpu = wall, cpu

    def to_dict(self) -> dict:
        return {name: {k: round(v, 4) for k, v in spent.items()}
                for name, spent in self._stages.items()}
