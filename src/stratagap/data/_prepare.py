"""Stage 1, data: read a table and turn the chosen columns into the arrays every later stage uses.

:func:`read_table` reads CSV, Parquet, Stata and SAS transport files (see ``_readers``).
:func:`prepare` checks the exposure, outcome and covariate columns, codes the exposure as
``t`` (1 = exposed), the outcome as ``y``, builds the covariate design ``X`` (numeric columns,
one-hot dummies with the first sorted level as reference, or a Wilkinson formula), applies the
missing-data policy, and puts the rows in a canonical order so results do not depend on row order.

References
----------
Groenwold RHH, White IR, Donders ART, et al. (2012). Missing covariate data in clinical research:
when and when not to use the missing-indicator method for analysis. CMAJ 184(11):1265-1269.
Hernán MA, Robins JM (2020). Causal Inference: What If. Chapman & Hall/CRC, §12.6.
"""

from __future__ import annotations

import difflib
import re
import warnings
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ..errors import DataWarning, InputError
from ._readers import read_table
from . import _coding
from . import _covariates as _design
from . import _followup
from ._missing_outcome import (GROUP_CODES, exposure_score_all_rows, missing_outcome,
                               observed_weights)
from . import _levels

__all__ = ["read_table", "prepare", "observed_weights", "PreparedData", "BalanceTerm", "Flow"]

BalanceTerm = _design.BalanceTerm
_GROUPS = GROUP_CODES
_FLAGS = {"censored", "censor", "cens", "event", "status", "death", "died", "dead"}
_DURATIONS = {"time", "days", "months", "years", "followup", "duration", "survival", "surv", "tte"}


@dataclass(frozen=True)
class Flow:
    """Row counts of the data stage: from the file to the complete cases.

    The later stages' counts (trimmed, set aside, analysed) join these in the result's
    participant flow (:class:`stratagap.result.ParticipantFlow`). ``dropped_missing_by_column`` counts, per analysed column, the rows it was missing in (a row
    missing two columns counts in both); ``dropped_missing_by_group`` counts each dropped row once
    by its exposure group ("unknown" when the exposure itself is missing).
    """

    rows_read: int
    dropped_missing_by_column: dict
    dropped_missing_by_group: dict
    missing_outcome_by_group: dict
    rows_used: int
    used_by_group: dict = field(default_factory=dict)
    missing_policy: str = "drop"
    missing_outcome_p_value: float | None = None
    negative_control_missing: int = 0
    #: follow-up outcomes: events and follow-up of the rows set aside for missing values
    #: (:func:`._followup.set_aside_totals`); joins the flow's ``followup_by_step``, not to_dict
    followup_set_aside: dict | None = None

    def to_dict(self) -> dict:
        p = self.missing_outcome_p_value
        return {
            "rows_read": int(self.rows_read),
            "dropped_missing_by_column": {str(k): int(v) for k, v in self.dropped_missing_by_column.items()},
            "dropped_missing_by_group": {str(k): int(v) for k, v in self.dropped_missing_by_group.items()},
            "missing_outcome_by_group": {
                str(g): {"n": int(d["n"]), "share": _jsonf(d["share"])}
                for g, d in self.missing_outcome_by_group.items()},
            "missing_outcome_p_value": _jsonf(p),
            "negative_control_missing": int(self.negative_control_missing),
            "rows_used": int(self.rows_used),
            "used_by_group": {str(k): int(v) for k, v in self.used_by_group.items()},
            "missing_policy": self.missing_policy,
        }


@dataclass(frozen=True, eq=False)
class PreparedData:
    """The analysed rows, coded; arrays follow the conventions of ``docs/architecture.md``.

    ``negative_control`` keeps NaN for rows missing it: those rows stay in the main analysis.
    ``censoring_weights`` (only with ``censoring_weights=True``) are 1 / P(outcome observed |
    covariates, exposure) for the analysed rows. ``row_ids`` are the rows' 0-based
    positions in the input table.
    """

    t: np.ndarray
    y: np.ndarray
    X: np.ndarray
    design_names: list
    terms: list
    outcome_type: str
    exposure_levels: dict
    flow: Flow
    covariates: list
    raw: pd.DataFrame
    user_strata: np.ndarray | None
    negative_control: np.ndarray | None
    outcome_levels: dict | None
    censoring_weights: np.ndarray | None = None
    censoring_score: np.ndarray | None = None
    exposure: str = ""
    outcome: str = ""
    formula: str | None = None
    reference_levels: dict = field(default_factory=dict)
    dropped_design_columns: list = field(default_factory=list)
    strata_levels: list | None = None
    row_ids: np.ndarray | None = None
    #: the first ``n_linear`` columns of ``X`` are the linear design; spline columns follow
    n_linear: int | None = None
    #: how each continuous covariate entered (``SplineTerm``: spline with knots, or linear)
    forms: tuple = ()
    #: follow-up time ("time-to-event") or person-time ("rate") of the analysed rows, else None
    followup: np.ndarray | None = None

    def to_dict(self) -> dict:
        """JSON-ready summary (no per-row arrays)."""
        return {
            "exposure": self.exposure, "outcome": self.outcome, "outcome_type": self.outcome_type,
            "exposure_levels": dict(self.exposure_levels),
            "outcome_levels": None if self.outcome_levels is None else dict(self.outcome_levels),
            "covariates": list(self.covariates), "formula": self.formula,
            "design_names": list(self.design_names), "terms": [t.to_dict() for t in self.terms],
            "reference_levels": dict(self.reference_levels),
            "dropped_design_columns": list(self.dropped_design_columns),
            "strata_levels": None if self.strata_levels is None else list(self.strata_levels),
            "censoring_weights": self.censoring_weights is not None,
            "flow": self.flow.to_dict(),
            "covariate_terms": [f.to_dict() for f in self.forms],
        }


def prepare(table, *, exposure, outcome, covariates, exposed_value=None, outcome_type="auto",
            formula=None, missing="drop", strata_column=None, negative_control=None,
            outcome_event=None, censoring_weights=False, pool_rare_levels=False,
            terms="spline", cluster=None, time=None, person_time=None) -> PreparedData:
    """Check and code the analysed columns of ``table``.

    Parameters
    ----------
    table : pandas.DataFrame
        The input table; it is not modified.
    exposure, outcome : str
        Column names. The exposure must have exactly two values: 0/1 and True/False need no
        flag (1/True = exposed); otherwise ``exposed_value`` names the exposed value.
    covariates : list of str, comma-separated str, or None
        Covariate columns; may be None when ``formula`` is given (its variables are used).
    exposed_value : optional
        The exposure value meaning "exposed" (compared also by string and numeric value).
    outcome_type : {"auto", "binary", "continuous"}
        "auto": two values -> binary (0/1, True/False, or ``outcome_event``), numeric -> continuous.
    formula : str, optional
        Wilkinson right-hand side for the design, e.g. ``"age + I(age**2) + C(edu) + a:b"``
        (formulaic); no intercept column is kept in ``X``.
    missing : {"drop", "error", "indicator"}
        Policy for missing covariates: complete cases; an error; or the missing-indicator
        method (numeric filled with 0 plus ``<col>__missing``, categoricals get "(missing)").
        Rows missing the exposure, the outcome or the strata column are always dropped.
    strata_column : str, optional
        User-given strata, coded 0..S-1 by sorted value.
    negative_control : str, optional
        A numeric negative-control outcome; rows missing it are kept (NaN).
    outcome_event : optional
        For a binary outcome whose two values are not 0/1 or True/False: the event value.
    censoring_weights : bool
        Also compute inverse-probability-of-censoring weights for the analysed rows.
    pool_rare_levels : bool
        Pool the levels of a categorical covariate with fewer than 10 rows into one level;
        without it a covariate with too many levels is refused (:mod:`._levels`).
    terms : {"spline", "linear"}, default "spline"
        How continuous covariates enter ``X``: a natural cubic spline each (knots by Harrell's
        quantile rule, see :mod:`stratagap.data._splines`; the spline columns follow the linear
        design, whose width is ``n_linear``), or one linear column each. ``formula`` overrides.
    cluster : str, optional
        The cluster column (checked by the caller): it joins the canonical sort key, so rows
        tied on every analysed column keep their clusters whatever the input order.
    time, person_time : str, optional
        A follow-up column (at most one; see :mod:`._followup`). With ``time`` the outcome is
        the 0/1 event indicator and ``outcome_type`` becomes "time-to-event"; with
        ``person_time`` it is an event count and ``outcome_type`` becomes "rate". The column's
        values for the analysed rows are ``PreparedData.followup``.

    Returns
    -------
    PreparedData

    Raises
    ------
    InputError
        For every ill-posed input; the message names the column or argument and the fix.
    """
    if not isinstance(table, pd.DataFrame):
        raise InputError(f"`table` must be a pandas DataFrame, got {type(table).__name__}; use read_table(path)")
    dup = sorted({str(c) for c in table.columns[table.columns.duplicated()]})
    if dup:
        raise InputError(f"the table has duplicate column names ({', '.join(dup)}); rename them so each is unique")
    if len(table) == 0:
        raise InputError("the table has no rows; check the input file or the row filter")
    if terms not in ("spline", "linear"):
        raise InputError(f"`terms` must be 'spline' or 'linear'; got {terms!r}")
    if missing not in ("drop", "error", "indicator"):
        raise InputError(f"`missing` must be drop, error or indicator, got {missing!r}")
    if outcome_type not in ("auto", "binary", "continuous"):
        raise InputError(f"`outcome_type` must be auto, binary or continuous, got {outcome_type!r}")
    covariates = _covariate_list(table, covariates, formula)
    formula = _design.clean_formula(formula)
    follow_col, follow_arg, follow_type = _followup.followup_column(time, person_time)
    names = {"exposure": exposure, "outcome": outcome, "strata_column": strata_column,
             "negative_control": negative_control, follow_arg: follow_col}
    for arg, col in names.items():
        if col is not None:
            _need(table, col, arg)
    for col in covariates:
        if col in (exposure, outcome):
            raise InputError(f"`covariates` includes '{col}', which is the {'exposure' if col == exposure else 'outcome'}; remove it")
    if exposure == outcome:
        raise InputError(f"`exposure` and `outcome` are the same column '{exposure}'; choose two different columns")
    for arg, col in (("strata_column", strata_column), ("negative_control", negative_control),
                     (follow_arg, follow_col)):
        if col is not None and col in (exposure, outcome, *covariates):
            raise InputError(f"`{arg}` '{col}' is also the exposure, outcome or a covariate; choose another column")
    if negative_control is not None and not pd.api.types.is_numeric_dtype(table[negative_control]):
        raise InputError(f"`negative_control` column '{negative_control}' is not numeric; "
                         "a negative-control outcome must be numbers (0/1 for a binary one)")
    for arg, cols in (("exposure", [exposure]), ("outcome", [outcome]), ("covariates", covariates),
                      ("negative_control", [negative_control] if negative_control else [])):
        for col in cols:
            _check_column_type(table[col], col, arg)
    if follow_col is None:
        _warn_time_to_event(table, outcome)
    else:
        _followup.check_followup_column(table, follow_col, follow_arg)

    n_read = len(table)
    ex = table[exposure]
    known = ex.notna().to_numpy()
    exposed, levels = _coding.code_exposure(ex[known], exposure, exposed_value)
    group = np.full(n_read, -1, dtype=np.int8)  # 1 exposed, 0 reference, -1 exposure missing
    group[known] = exposed

    miss = {c: table[c].isna().to_numpy() for c in dict.fromkeys([exposure, outcome, *covariates])}
    if strata_column is not None:
        miss[strata_column] = table[strata_column].isna().to_numpy()
    if missing == "error":
        bad = {c: int(miss[c].sum()) for c in covariates if miss[c].any()}
        if bad:
            listed = ", ".join(f"'{c}': {k}" for c, k in bad.items())
            raise InputError(f"`missing=error`: covariates have missing values ({listed}); "
                             "fill them, or use `missing=drop` (complete cases) or `missing=indicator`")
    drop_cols = [c for c in miss if missing != "indicator" or c not in covariates]
    dropped = np.zeros(n_read, bool)
    for c in drop_cols:
        dropped |= miss[c]
    by_column = {c: int(miss[c].sum()) for c in drop_cols}
    by_group = {g: int(np.sum(dropped & (group == code))) for g, code in _GROUPS.items()}
    miss_out, p_out = missing_outcome(group, miss[outcome])
    if dropped.all():
        worst = sorted(by_column, key=lambda c: -by_column[c])[:3]
        listed = ", ".join(f"'{c}' ({by_column[c]} rows)" for c in worst)
        raise InputError(f"no rows are left after dropping rows with missing values; most were removed by "
                         f"{listed}: check these columns or use `missing=indicator` for covariates")

    # Candidate rows: everything known except possibly the outcome (they feed the censoring model).
    cand_mask = ~np.logical_or.reduce([miss[c] for c in drop_cols if c != outcome])
    cols = list(dict.fromkeys([exposure, outcome, *covariates,
                               *(c for c in (strata_column, negative_control, follow_col) if c)]))
    extra = [cluster] if cluster is not None and cluster not in cols else []
    cand = table.loc[cand_mask, cols + extra].copy()
    cand["__row__"] = np.flatnonzero(cand_mask)
    cand["__t__"] = group[cand_mask]
    order = _coding.canonical_order(cand, ["__t__", *cols, *extra])
    cand = cand.iloc[order].reset_index(drop=True)
    filled, formula_used = _design.fill_missing(cand, covariates, formula, missing)
    filled = _levels.check_levels(filled, covariates, pool=pool_rare_levels,
                                  is_categorical=_design.is_categorical,
                                  identifier_levels=_design.identifier_levels)
    keep = cand[outcome].notna().to_numpy()

    cw = cs = None
    if censoring_weights:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            Xc = _design.build(filled, covariates, formula_used, cand["__t__"].to_numpy(), terms).X
        cw = observed_weights(Xc, cand["__t__"].to_numpy(), keep)[keep]
        cs = exposure_score_all_rows(Xc, cand["__t__"].to_numpy())
        cs = None if cs is None else cs[keep]

    work = filled.loc[keep].reset_index(drop=True)
    raw = cand.loc[keep, cols].reset_index(drop=True)
    t = work["__t__"].to_numpy().astype(np.int8)
    n1 = int(t.sum())
    if n1 == 0 or n1 == len(t):
        only = "exposed" if n1 else "reference"
        raise InputError(f"`exposure` '{exposure}': after dropping rows with missing values only the {only} "
                         f"group ({levels[only]}) remains ({len(t)} rows); check the missing values")
    followup = None
    if follow_type is None:
        y, out_type, out_levels = _coding.code_outcome(work[outcome], outcome, outcome_type,
                                                       outcome_event)
    else:
        y, out_type, out_levels, followup = _code_followup(work, outcome, outcome_event,
                                                           follow_col, follow_type)
    if out_type == "binary" and len(set(zip(y.tolist(), t.tolist()))) == 2:
        raise InputError(f"`outcome` column '{outcome}' is the exposure recoded (its two values match "
                         "the groups exactly); choose the outcome column")
    design = _design.build(work, covariates, formula_used, t, terms)

    strata = strata_levels = None
    if strata_column is not None:
        strata, strata_levels = _coding.codes(work[strata_column])
        strata_levels = [_fmt(v) for v in strata_levels]
    nc = None
    if negative_control is not None:
        nc = work[negative_control].to_numpy(dtype=np.float64, na_value=np.nan)

    set_aside = None
    if follow_col is not None:
        set_aside = _followup.set_aside_totals(
            table[outcome], table[follow_col], group, dropped,
            event=None if out_levels is None else out_levels["event"])
    flow = Flow(rows_read=n_read, dropped_missing_by_column=by_column, dropped_missing_by_group=by_group,
                missing_outcome_by_group=miss_out, rows_used=len(t),
                used_by_group={"exposed": n1, "reference": len(t) - n1}, missing_policy=missing,
                missing_outcome_p_value=p_out,
                negative_control_missing=0 if nc is None else int(np.isnan(nc).sum()),
                followup_set_aside=set_aside)
    return PreparedData(
        t=t, y=y, X=design.X, design_names=design.names, terms=design.terms, outcome_type=out_type,
        exposure_levels=levels, flow=flow, covariates=design.covariates, raw=raw, user_strata=strata,
        negative_control=nc, outcome_levels=out_levels, censoring_weights=cw, censoring_score=cs, exposure=exposure,
        outcome=outcome, formula=formula_used, reference_levels=design.reference_levels,
        dropped_design_columns=design.dropped, strata_levels=strata_levels,
        row_ids=work["__row__"].to_numpy().astype(np.int64), n_linear=design.n_linear,
        forms=design.forms, followup=followup)


def _code_followup(work, outcome, outcome_event, follow_col, follow_type):
    """``(y, outcome type, outcome levels, follow-up)`` of a time-to-event or rate outcome."""
    followup = work[follow_col].to_numpy(dtype=np.float64)
    if follow_type == "time-to-event":
        y, levels = _followup.code_event(work[outcome], outcome, outcome_event)
        return y, follow_type, levels, followup
    if outcome_event is not None:
        raise InputError("`outcome_event` names the event value of an indicator; with "
                         "`person_time` the outcome is a count: drop `outcome_event`")
    y = _followup.code_count(work[outcome], outcome)
    _followup.check_one_person_per_row(y, followup, follow_col, outcome)
    return y, follow_type, None, followup


# ---------------------------------------------------------------------------------------------
def _covariate_list(table, covariates, formula) -> list:
    if isinstance(covariates, str):
        covariates = [c.strip() for c in covariates.split(",") if c.strip()]
    covariates = list(dict.fromkeys(covariates or []))
    for col in covariates:
        _need(table, col, "covariates")
    if formula is None:
        if not covariates:
            raise InputError("`covariates` is empty; name at least one covariate column or give `formula`")
        return covariates
    variables = _design.formula_variables(formula)
    for var in variables:
        _need(table, var, "formula")
    unused = [c for c in covariates if c not in variables]
    if unused:
        raise InputError(f"`covariates` names {', '.join(map(repr, unused))}, which the `formula` does not use; "
                         "add them to the formula or remove them from `covariates`")
    return covariates + [v for v in variables if v not in covariates]


def _need(table, col, arg) -> None:
    if col in table.columns:
        return
    close = difflib.get_close_matches(str(col), [str(c) for c in table.columns], n=3, cutoff=0.6)
    hint = f"; did you mean {' or '.join(map(repr, close))}?" if close else "; check the spelling"
    raise InputError(f"`{arg}`: column '{col}' is not in the table{hint}")


def _check_column_type(s: pd.Series, col, arg) -> None:
    if pd.api.types.is_datetime64_any_dtype(s) or isinstance(s.dtype, pd.PeriodDtype):
        what = "time-to-event outcomes are out of scope" if arg == "outcome" else "convert it to a number (e.g. age or year)"
        raise InputError(f"`{arg}` column '{col}' holds dates/times; {what}")
    if pd.api.types.is_float_dtype(s):
        k = int(np.isinf(s.to_numpy(dtype=float, na_value=np.nan)).sum())
        if k:
            raise InputError(f"`{arg}` column '{col}' has {k} infinite value(s) (inf/-inf); "
                             "replace them with valid numbers or leave the cells empty (missing)")


def _warn_time_to_event(table, outcome) -> None:
    def tokens(name):
        low = str(name).lower()
        return set(re.split(r"[^a-z0-9]+", low)) | {low.replace("_", "").replace("-", "")}

    out = tokens(outcome)
    others = [tokens(c) for c in table.columns if c != outcome]
    s = table[outcome].dropna()
    dateish = "date" in str(outcome).lower()
    if pd.api.types.is_integer_dtype(s) and len(s) and s.min() >= 19000101 and s.max() <= 21001231:
        dateish |= bool(((s // 100 % 100).between(1, 12) & (s % 100).between(1, 31)).all())
    if ((out & _DURATIONS and any(o & _FLAGS for o in others))
            or (out & _FLAGS and any(o & _DURATIONS for o in others)) or dateish):
        warnings.warn(f"`outcome` '{outcome}' looks like part of a time-to-event outcome (a date, or a "
                      "duration with a censoring flag); time-to-event outcomes are out of scope: censoring "
                      "is not handled", DataWarning, stacklevel=3)


_fmt = _design.fmt


def _jsonf(x):
    return None if x is None or not np.isfinite(x) else float(x)
