"""Pipeline layer: the outcome stages of a follow-up outcome (time to an event, or a rate).

The study design (score, overlap, strata, balance) is the same for every outcome type and is
built by :mod:`stratagap.pipeline`; from the stratum layout on, a time-to-event outcome
(:mod:`stratagap._survival_wiring`) and a rate over person-time (:mod:`stratagap._rate_wiring`)
have tests, effects, cross-checks and sensitivity analyses of their own. Each returns the
result fields listed in :data:`OUTCOME_FIELDS`; the pipeline assembles the rest (flow, arrays,
verdict) as for any outcome.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable

import numpy as np

from . import sensitivity as _sensitivity
from ._base.layout import StratumLayout
from .spec import AnalysisSpec

__all__ = ["FollowupContext", "followup_parts", "flow_by_step", "OUTCOME_FIELDS"]

#: the AnalysisResult fields a follow-up outcome's wiring fills
OUTCOME_FIELDS = ("tests", "crude", "adjusted", "plain", "constant_effect", "mantel_haenszel",
                  "risk_ratio", "cross_checks", "heterogeneity", "sensitivity", "followup")


@dataclass(frozen=True, eq=False)
class FollowupContext:
    """What the outcome stages of a follow-up outcome start from: the analysed rows, stratified.

    ``used`` indexes the prepared arrays; every other array is of the analysed rows, in the
    same order: ``labels`` (strata 0..S-1), ``t``, ``y`` (event indicator or count), ``X``,
    ``followup`` (follow-up time or person-time) and ``weights`` (the estimand's unit weights).
    """

    spec: AnalysisSpec
    prepared: Any
    used: np.ndarray
    labels: np.ndarray
    t: np.ndarray
    y: np.ndarray
    X: np.ndarray
    followup: np.ndarray
    weights: np.ndarray
    layout: StratumLayout
    population: str
    propensity: Any
    overlap: Any
    strata: Any
    balance: Any
    terms: list
    progress: Callable | None
    names: list
    n_linear: int | None


def followup_parts(ctx: FollowupContext) -> dict:
    """The outcome fields of the result for a time-to-event or a rate outcome."""
    if ctx.prepared.outcome_type == "time-to-event":
        from ._survival_wiring import survival_parts as parts_of
    else:
        from ._rate_wiring import rate_parts as parts_of
    parts = parts_of(ctx)
    missing = [name for name in OUTCOME_FIELDS if name not in parts]
    if missing:  # pragma: no cover - a wiring error, not a user's
        raise RuntimeError(f"follow-up outcome stages left out {', '.join(missing)}")
    parts["negative_control"] = _negative_control(ctx)
    return parts


def _totals(events, time, t, rows) -> dict:
    """Events (whole numbers) and follow-up summed by group over the rows of a mask."""
    out = {"events": {}, "person_time": {}}
    for name, code in (("exposed", 1), ("reference", 0)):
        mine = rows & (t == code)
        out["events"][name] = int(round(float(events[mine].sum())))
        out["person_time"][name] = float(time[mine].sum())
    return out


def flow_by_step(prepared, keep, used, column: str, matched: bool = False) -> dict:
    """Events and person-time by group at each step of the participant flow.

    ``keep`` (kept by the overlap rule) and ``used`` (indices of the analysed rows) refer to
    the complete cases of ``prepared``; person-time is the sum of the follow-up column (the
    follow-up time of a time-to-event outcome, the person-time of a rate), in its own unit.
    The rows set aside for missing values come from the data stage, which saw them.
    """
    t, events, time = prepared.t, prepared.y, prepared.followup
    keep = np.asarray(keep, dtype=bool)
    analysed = np.zeros(t.size, dtype=bool)
    analysed[np.asarray(used)] = True
    return {"column": column,
            "set_aside_missing": prepared.flow.followup_set_aside,
            "complete_cases": _totals(events, time, t, np.ones(t.size, dtype=bool)),
            "trimmed": _totals(events, time, t, ~keep),
            "not_matched" if matched else "strata_set_aside": _totals(events, time, t,
                                                                      keep & ~analysed),
            "analysed": _totals(events, time, t, analysed)}


def _negative_control(ctx: FollowupContext):
    """The negative-control check does not involve the outcome: the same as for any outcome."""
    spec, prepared = ctx.spec, ctx.prepared
    if prepared.negative_control is None:
        return None
    return _sensitivity.negative_control_check(
        prepared.negative_control[ctx.used], ctx.t, ctx.X, ctx.labels,
        column=spec.negative_control, names=prepared.design_names, estimand=spec.estimand,
        alpha=spec.alpha, engine=spec.engine, resamples=spec.resamples, seed=spec.seed,
        batch_size=spec.batch_size, interaction_min_extra=spec.interaction_min_extra,
        n_linear=prepared.n_linear)
