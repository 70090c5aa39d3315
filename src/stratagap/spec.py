"""The analysis specification: every choice that shapes a result, checked once, in one place.

The CLI and a TOML analysis file both build an :class:`AnalysisSpec`; :func:`stratagap.analyze`
takes the same fields as keywords. Every default is the one the documentation defends, and the
spec is written into ``results.json`` so that a run can be reviewed and repeated.
"""

from __future__ import annotations

import dataclasses
import difflib
import math
import sys
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ._base.checks import check_alpha
from .errors import InputError
from ._base.rng import check_seed

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

__all__ = ["AnalysisSpec", "load_spec_file"]

ESTIMANDS = ("ate", "att")
ALTERNATIVES = ("two-sided", "greater", "less")
ENGINES = ("auto", "monte_carlo", "exact", "normal")
#: Test statistics. "adjusted" is the default: covariance-adjusted (residuals of an outcome
#: model on the covariates with stratum effects, never the exposure), estimand-weighted
#: stratified difference of means, a test of the sharp null (Rosenbaum 2002).
STATISTICS = ("adjusted", "difference", "studentized", "sum")
MEASURES = ("difference", "rr", "or")
TRIM_RULES = ("auto", "none", "common", "crump")
SCORE_MODELS = ("logistic", "boosting")
STRATA_METHODS = ("quantile", "adaptive")
MISSING_POLICIES = ("drop", "error", "indicator")
OUTCOME_TYPES = ("auto", "binary", "continuous")
#: How continuous covariates enter every model: a natural cubic spline each, or one linear term.
TERMS = ("spline", "linear")
CLUSTER_LEVELS = ("auto", "cluster", "unit")
MAX_RESAMPLES = 10_000_000
DESIGNS = ("strata", "match")
MATCHING_FIELDS = ("design", "per_exposed", "caliper_sd", "same_value_on")
#: Follow-up outcomes: with `time` the outcome is an event indicator (time-to-event); with
#: `person_time` it is an event count (rate). Omitted from results.json when unset.
FOLLOWUP_FIELDS = ("time", "horizon", "person_time")


@dataclass(frozen=True)
class AnalysisSpec:
    """All settings of one analysis. See ``docs/results.md`` for what each one changes."""

    exposure: str
    outcome: str
    covariates: tuple[str, ...] | None = None
    formula: str | None = None
    terms: str = "spline"
    exposed_value: str | None = None
    outcome_type: str = "auto"
    outcome_event: str | None = None
    estimand: str | None = None  # None: "ate", or "att" with design="match"
    n_strata: int = 5
    strata_method: str = "quantile"
    strata_column: str | None = None
    design: str = "strata"  # or "match": matched sets built on the score (stratify/matching.py)
    per_exposed: int = 1
    caliper_sd: float = 0.2  # pooled SDs of the logit of the score (Austin 2011)
    same_value_on: tuple[str, ...] | None = None
    min_per_group: int = 3
    trim: str = "auto"
    score_model: str = "logistic"
    folds: int = 5
    statistic: str = "adjusted"
    alternative: str = "two-sided"
    engine: str = "auto"
    resamples: int = 10_000
    seed: int = 2026
    alpha: float = 0.05
    measure: str = "difference"
    gamma_grid: tuple[float, ...] = (1.0, 1.1, 1.25, 1.5, 1.75, 2.0, 2.5, 3.0, 4.0, 5.0)
    missing: str = "drop"
    censoring_weights: bool = False
    pool_rare_levels: bool = False
    negative_control: str | None = None
    truncate_weights: tuple[float, float] | None = None
    interaction_min_extra: int = 2
    batch_size: int | None = None
    #: the assigned unit (hospital, clinic, region): see stratagap.data._clusters
    cluster: str | None = None
    cluster_level: str = "auto"
    #: follow-up outcomes (stratagap._followup_wiring): time to an event, or events over person-time
    time: str | None = None
    horizon: float | None = None
    person_time: str | None = None
    data_path: str | None = field(default=None, compare=False)

    def __post_init__(self):
        _check(self)

    def replace(self, **changes) -> "AnalysisSpec":
        return dataclasses.replace(self, **changes)

    def to_dict(self) -> dict:
        out = dataclasses.asdict(self)
        for key in ("covariates", "gamma_grid", "truncate_weights", "same_value_on"):
            if out[key] is not None:
                out[key] = list(out[key])
        if self.design == "strata":  # the matching settings shape only a matched design
            for key in MATCHING_FIELDS:
                del out[key]
        if out["cluster"] is None:  # results without --cluster keep their keys
            del out["cluster"], out["cluster_level"]
        for key in FOLLOWUP_FIELDS:  # results of mean and risk outcomes keep their keys
            if out[key] is None:
                del out[key]
        return out


def _choice(value, allowed, flag):
    if value not in allowed:
        raise InputError(f"`{flag}` must be one of {', '.join(allowed)}; got {value!r}")


def _int_in(value, lo, hi, flag, hint=""):
    if isinstance(value, (bool, np.bool_)):
        raise InputError(f"`{flag}` must be a whole number; got {value!r}{hint}")
    if isinstance(value, bool) or not isinstance(value, int):
        try:
            as_float = float(value)
        except (TypeError, ValueError):
            raise InputError(f"`{flag}` must be a whole number; got {value!r}{hint}") from None
        if not as_float.is_integer():
            raise InputError(f"`{flag}` must be a whole number; got {value!r}{hint}")
        value = int(as_float)
    if not lo <= value <= hi:
        raise InputError(f"`{flag}` must lie in [{lo:,}, {hi:,}]; got {value:,}{hint}")
    return value


def _check(spec: AnalysisSpec) -> None:
    set_ = object.__setattr__
    for name, flag in (("exposure", "exposure"), ("outcome", "outcome")):
        value = getattr(spec, name)
        if not isinstance(value, str) or not value:
            raise InputError(f"`{flag}` names a column of the data file; got {value!r}")
    if spec.covariates is not None:
        covs = spec.covariates
        if isinstance(covs, str):
            covs = [c.strip() for c in covs.split(",") if c.strip()]
        set_(spec, "covariates", tuple(covs))
    if not spec.covariates and not spec.formula:
        raise InputError("`covariates` is empty: name the measured confounders (A,B,C) or give `formula`")
    if spec.exposed_value is not None:
        set_(spec, "exposed_value", str(spec.exposed_value))
    _check_design(spec, set_)
    _choice(spec.estimand, ESTIMANDS, "estimand")
    _choice(spec.alternative, ALTERNATIVES, "alternative")
    _choice(spec.engine, ENGINES, "engine")
    _choice(spec.statistic, STATISTICS, "statistic")
    _choice(spec.measure, MEASURES, "measure")
    _choice(spec.trim, TRIM_RULES, "trim")
    _choice(spec.score_model, SCORE_MODELS, "score_model")
    _choice(spec.strata_method, STRATA_METHODS, "strata_method")
    _choice(spec.missing, MISSING_POLICIES, "missing")
    _choice(spec.outcome_type, OUTCOME_TYPES, "outcome_type")
    _choice(spec.terms, TERMS, "terms")
    _choice(spec.cluster_level, CLUSTER_LEVELS, "cluster_level")
    if spec.cluster is not None and (not isinstance(spec.cluster, str) or not spec.cluster):
        raise InputError(f"`cluster` names the column of the assigned unit; got {spec.cluster!r}")
    if spec.cluster is not None and spec.statistic in ("studentized", "sum"):
        raise InputError(f"`statistic={spec.statistic}` is not available with `cluster`; "
                         "use adjusted (default) or difference")
    if spec.cluster is not None and spec.design == "match":
        raise InputError("`cluster` and `design=match` exclude each other: matching pairs units, "
                         "while exposure was assigned to clusters; use the default strata design")
    set_(spec, "n_strata", _int_in(spec.n_strata, 1, 1000, "n_strata"))
    set_(spec, "min_per_group", _int_in(spec.min_per_group, 1, 10_000, "min_per_group"))
    set_(spec, "folds", _int_in(spec.folds, 2, 50, "folds"))
    set_(spec, "interaction_min_extra", _int_in(spec.interaction_min_extra, 0, 1000, "interaction_min_extra"))
    set_(spec, "resamples", _int_in(spec.resamples, 1, MAX_RESAMPLES, "resamples",
                                     "; 10,000 is the default and plenty for p-values near 0.05"))
    if spec.batch_size is not None:
        set_(spec, "batch_size", _int_in(spec.batch_size, 1, MAX_RESAMPLES, "batch_size"))
    set_(spec, "seed", check_seed(spec.seed, "seed"))
    set_(spec, "alpha", check_alpha(spec.alpha, "analysis"))
    grid = spec.gamma_grid
    if isinstance(grid, str):
        grid = [g for g in grid.split(",") if g.strip()]
    try:
        grid = tuple(sorted({float(g) for g in grid}))
    except (TypeError, ValueError):
        raise InputError(f"`gamma_grid` must be numbers >= 1 separated by commas; got {spec.gamma_grid!r}") from None
    if not grid or grid[0] < 1 or not all(math.isfinite(g) and g <= 1e6 for g in grid):
        raise InputError(f"`gamma_grid` values must be finite numbers in [1, 1e6], e.g. 1,1.5,2,3; got {spec.gamma_grid!r}")
    set_(spec, "gamma_grid", grid)
    if spec.truncate_weights is not None:
        tw = spec.truncate_weights
        if isinstance(tw, str):
            tw = tw.split(",")
        try:
            lo, hi = (float(v) for v in tw)
        except (TypeError, ValueError):
            raise InputError(f"`truncate_weights` takes two percentiles LO,HI such as 1,99; got {spec.truncate_weights!r}") from None
        if not (0 <= lo < hi <= 100):
            raise InputError(f"`truncate_weights` needs 0 <= LO < HI <= 100; got {lo},{hi}")
        set_(spec, "truncate_weights", (lo, hi))
    if spec.strata_column is not None and spec.strata_method == "adaptive":
        raise InputError("`strata_column` and `strata_method=adaptive` exclude each other: choose one")
    if spec.measure != "difference" and spec.outcome_type == "continuous":
        raise InputError(f"`measure={spec.measure}` needs a binary outcome; use `measure=difference`")
    _check_followup(spec, set_)


def _check_design(spec, set_) -> None:
    _choice(spec.design, DESIGNS, "design")
    if spec.estimand is None:
        set_(spec, "estimand", "att" if spec.design == "match" else "ate")
    set_(spec, "per_exposed", _int_in(spec.per_exposed, 1, 100, "per_exposed"))
    try:
        caliper = float(spec.caliper_sd)
    except (TypeError, ValueError):
        caliper = math.nan
    if not (math.isfinite(caliper) and caliper > 0):
        raise InputError(f"`caliper_sd` must be a positive number of pooled SDs of the logit of "
                         f"the score (0.2 is the usual choice); got {spec.caliper_sd!r}")
    set_(spec, "caliper_sd", caliper)
    cols = spec.same_value_on
    if isinstance(cols, str):
        cols = [c.strip() for c in cols.split(",") if c.strip()]
    set_(spec, "same_value_on", tuple(cols) if cols else None)
    if spec.design == "match":
        if spec.estimand == "ate":
            raise InputError("`estimand=ate` does not go with `design=match`: matched sets "
                             "estimate the effect in the matched exposed units; use "
                             "`estimand=att` or `design=strata`")
        if spec.strata_column is not None:
            raise InputError("`strata_column` and `design=match` exclude each other: give "
                             "ready-made matched sets or let the tool build them, not both")
        if spec.strata_method != "quantile":
            raise InputError(f"`strata_method={spec.strata_method}` and `design=match` exclude "
                             "each other: the matched sets are the strata")


def _check_followup(spec, set_) -> None:
    """The follow-up fields, and what they do not (yet) combine with."""
    for name in ("time", "person_time"):
        value = getattr(spec, name)
        if value is not None and (not isinstance(value, str) or not value):
            raise InputError(f"`{name}` names a column of the data file; got {value!r}")
    if spec.time is not None and spec.person_time is not None:
        raise InputError("`time` and `person_time` exclude each other: `time` makes the outcome an "
                         "event indicator (time to event), `person_time` an event count (rate)")
    if spec.horizon is not None:
        if spec.time is None:
            raise InputError("`horizon` needs `time`: it is the follow-up time at which the "
                             "time-to-event headline is read")
        try:
            horizon = float(spec.horizon)
        except (TypeError, ValueError):
            horizon = math.nan
        if isinstance(spec.horizon, bool) or not (math.isfinite(horizon) and horizon > 0):
            raise InputError(f"`horizon` must be a positive number in the units of the `time` "
                             f"column; got {spec.horizon!r}")
        set_(spec, "horizon", horizon)
    column = spec.time if spec.time is not None else spec.person_time
    if column is None:
        return
    flag = "time" if spec.time is not None else "person_time"
    if column in (spec.exposure, spec.outcome):
        raise InputError(f"`{flag}` '{column}' is also the exposure or the outcome; with `{flag}` "
                         "the outcome is the event " + ("indicator" if flag == "time" else "count"))
    refused = {"measure": spec.measure != "difference",
               "statistic": spec.statistic not in ("adjusted", "difference"),
               "outcome_type": spec.outcome_type != "auto",
               "censoring_weights": spec.censoring_weights, "cluster": spec.cluster is not None,
               "design": spec.design == "match"}
    fixes = {"measure": "drop it (ratios are reported beside the difference)",
             "statistic": "use adjusted (default) or difference",
             "outcome_type": "drop it (the outcome type follows from `" + flag + "`)",
             "censoring_weights": "drop it (censored follow-up is part of the outcome)",
             "cluster": "drop it", "design": "use the default strata design"}
    for name, bad in refused.items():
        if bad:
            value = getattr(spec, name)
            raise InputError(f"`{name}={value}` is not available with `{flag}`; {fixes[name]}")


#: Keys accepted in a TOML analysis file (the [analysis] table or the top level), mapped to fields.
_TOML_KEYS = {f.name.replace("_", "-"): f.name for f in dataclasses.fields(AnalysisSpec)}
_TOML_KEYS.update({"strata": "n_strata", "data": "data_path"})


def load_spec_file(path: str | Path) -> dict:
    """Read a TOML analysis file into a dict of :class:`AnalysisSpec` field values.

    Keys are the long command-line option names (``exposure``, ``exposed-value``, ``strata``,
    ``gamma-grid`` ...), either at the top level or in an ``[analysis]`` table. A relative
    ``data`` path is taken relative to the TOML file.
    """
    path = Path(path)
    if not path.is_file():
        raise InputError(f"`spec` file {str(path)!r} does not exist; give the path of a TOML analysis file")
    try:
        raw = tomllib.loads(path.read_text(encoding="utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise InputError(f"`spec` file {path.name!r} is not valid TOML ({str(exc).splitlines()[0]}); fix the file") from None
    raw = raw.get("analysis", raw)
    out = {}
    for key, value in raw.items():
        norm = key.replace("_", "-")
        if norm not in _TOML_KEYS:
            close = difflib.get_close_matches(norm, list(_TOML_KEYS), n=3)
            hint = f"did you mean {', '.join(close)}?" if close else "use the long option names, e.g. exposure, outcome, covariates, strata"
            raise InputError(f"`spec` file {path.name!r}: unknown key {key!r}; {hint}")
        out[_TOML_KEYS[norm]] = value
    if "data_path" in out and not Path(out["data_path"]).is_absolute():
        out["data_path"] = str((path.parent / out["data_path"]).resolve())
    return out
