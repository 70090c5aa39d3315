"""Follow-up outcomes: the time to an event (``time``) and events over person-time (``person_time``).

With ``time`` the outcome column is the event indicator (1 = event, 0 = censored) and the
outcome type is "time-to-event"; with ``person_time`` the outcome column is a count of events
per person and the outcome type is "rate". This module checks those columns and codes them; the
follow-up column itself travels beside ``y`` as ``PreparedData.followup``.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from ..errors import InputError
from ._coding import _fmt, _same, _value_list

__all__ = ["followup_column", "check_followup_column", "code_event", "code_count",
           "set_aside_totals", "AGGREGATE_RATIO", "AGGREGATE_EVENTS"]

#: A row whose person-time is this many times the median, holding at least AGGREGATE_EVENTS
#: events, looks like the sum of many people (common practice: one person per row).
AGGREGATE_RATIO = 100.0
AGGREGATE_EVENTS = 10


def followup_column(time, person_time):
    """``(column, parameter, outcome type)`` of the follow-up, or ``(None, None, None)``."""
    if time is not None and person_time is not None:
        raise InputError("`time` and `person_time` exclude each other: choose one")
    if time is not None:
        return time, "time", "time-to-event"
    if person_time is not None:
        return person_time, "person_time", "rate"
    return None, None, None


def check_followup_column(table: pd.DataFrame, col, arg) -> None:
    """Numbers, never missing, finite and > 0 (checked on every row of the file)."""
    s = table[col]
    what = "follow-up time" if arg == "time" else "person-time"
    if pd.api.types.is_datetime64_any_dtype(s) or isinstance(s.dtype, pd.PeriodDtype):
        raise InputError(f"`{arg}` column '{col}' holds dates; give the {what} as a number "
                         "(e.g. days from entry to the event or the end of follow-up)")
    if pd.api.types.is_bool_dtype(s) or not pd.api.types.is_numeric_dtype(s):
        shown = _value_list(s.dropna().value_counts().head(3)) if s.notna().any() else "empty"
        raise InputError(f"`{arg}` column '{col}' is not numeric ({shown}); the {what} must be "
                         "a positive number on every row")
    values = s.to_numpy(dtype=np.float64, na_value=np.nan)
    missing = int(np.isnan(values).sum())
    if missing:
        raise InputError(f"`{arg}` column '{col}' is missing on {missing:,} row(s); every row needs "
                         f"its {what}: fill them or remove those rows from the file")
    bad = ~np.isfinite(values) | (values <= 0)
    if bad.any():
        low = values[bad]
        raise InputError(f"`{arg}` column '{col}' has {int(bad.sum()):,} value(s) that are not "
                         f"positive and finite (e.g. {_fmt(low[0])}); the {what} must be > 0 "
                         "(an event at time 0 cannot be compared: start follow-up before it)")


def code_event(s: pd.Series, col, event) -> tuple[np.ndarray, dict]:
    """The 0/1 event indicator of a time-to-event outcome, and its two labels.

    0/1 and True/False need no flag (1/True = event); two text values need ``outcome_event``.
    Codes beyond two (0/1/2 for competing events) are refused by name: they need a
    competing-risks analysis, which this tool does not do.
    """
    counts = s.value_counts(sort=False)
    counts = counts[counts > 0]
    uniq = list(counts.index)
    is_bool = pd.api.types.is_bool_dtype(s) or (bool(uniq) and all(isinstance(u, (bool, np.bool_))
                                                                     for u in uniq))
    numeric = pd.api.types.is_numeric_dtype(s) and not is_bool
    if len(uniq) > 2 or (numeric and event is None and not {float(u) for u in uniq} <= {0.0, 1.0}):
        raise InputError(f"`outcome` column '{col}' must be the event indicator with `time` (1 = "
                         f"event, 0 = censored); it holds (value: rows) {_value_list(counts)}; codes such as "
                         "0/1/2 (competing risks) are not supported: recode to 1 for the event "
                         "of interest and 0 otherwise")
    if event is not None:
        match = [u for u in uniq if _same(u, event)]
        if not match:
            raise InputError(f"`outcome_event` {event!r} is not one of the values of '{col}' "
                             f"({_value_list(counts)}); pass one of them")
        y = (s == match[0]).to_numpy(dtype=np.float64)
        ev = match[0]
    elif is_bool:
        ev, y = True, s.to_numpy(dtype=bool).astype(np.float64)
    elif numeric:
        ev, y = 1, s.to_numpy(dtype=np.float64)
    else:
        shown = ", ".join(sorted(_fmt(u) for u in uniq))
        raise InputError(f"`outcome` column '{col}' has the values {shown}; say which one is the "
                         "event with `outcome_event`")
    if not y.any():
        raise InputError(f"`outcome` column '{col}' has no events in the analysed rows (all "
                         "censored); a time-to-event comparison needs events")
    other = [u for u in uniq if not _same(u, ev)]
    return y, {"event": _fmt(ev), "non_event": _fmt(other[0]) if other else "0"}


def code_count(s: pd.Series, col) -> np.ndarray:
    """Event counts: numbers, whole, >= 0, not all 0."""
    if pd.api.types.is_bool_dtype(s) or not pd.api.types.is_numeric_dtype(s):
        raise InputError(f"`outcome` column '{col}' must be an event count with `person_time` "
                         f"(whole numbers >= 0); it has {_value_list(s.value_counts().head(3))}")
    y = s.to_numpy(dtype=np.float64)
    bad = (y < 0) | (y != np.round(y))
    if bad.any():
        raise InputError(f"`outcome` column '{col}' has {int(bad.sum()):,} count(s) that are "
                         f"negative or fractional (e.g. {_fmt(y[bad][0])}); with `person_time` it "
                         "must count events per person (0, 1, 2, ...)")
    if not y.any():
        raise InputError(f"`outcome` column '{col}' has no events in the analysed rows; a rate "
                         "comparison needs events")
    return y


def check_one_person_per_row(count: np.ndarray, person_time: np.ndarray, col, count_col) -> None:
    """Refuse rows that look like the sum of many people (see AGGREGATE_RATIO)."""
    median = float(np.median(person_time))
    big = (person_time > AGGREGATE_RATIO * median) & (count >= AGGREGATE_EVENTS)
    if big.any():
        raise InputError(f"`person_time` column '{col}': {int(big.sum()):,} row(s) hold more than "
                         f"{AGGREGATE_RATIO:g} times the median person-time with "
                         f"{AGGREGATE_EVENTS} or more events in '{count_col}': they look like "
                         "totals of many people; give one person per row")


def set_aside_totals(outcome: pd.Series, followup: pd.Series, group: np.ndarray,
                     rows: np.ndarray, event=None) -> dict:
    """Events and follow-up of the rows set aside for missing values, by exposure group.

    The follow-up column is never missing (checked on every row), so its sum is known for
    every set-aside row whose group is recorded; events only where the outcome is recorded
    (those rows are counted in ``outcome_missing``). ``event`` is the event label of a
    time-to-event outcome (``outcome_levels["event"]``, compared as the coding compares it);
    None sums the counts of a rate outcome. Rows whose group is not recorded are in neither.

    Returns
    -------
    dict
        ``{"events", "person_time", "outcome_missing"}``, each ``{"exposed", "reference"}``.
    """
    values = outcome[rows]
    recorded = values.notna().to_numpy()
    if event is None:
        counts = values.to_numpy(dtype=np.float64, na_value=0.0)
    else:
        events = [u for u in pd.unique(values.dropna()) if _same(u, event)]
        counts = values.isin(events).to_numpy(dtype=np.float64)
    time = followup[rows].to_numpy(dtype=np.float64)
    g = group[rows]
    out = {"events": {}, "person_time": {}, "outcome_missing": {}}
    for name, code in (("exposed", 1), ("reference", 0)):
        mine = g == code
        # exact sums (math.fsum): these rows are in input order, and the result must not
        # depend on it
        out["events"][name] = int(round(math.fsum(counts[mine & recorded])))
        out["person_time"][name] = math.fsum(time[mine])
        out["outcome_missing"][name] = int(np.sum(mine & ~recorded))
    return out
