"""Coding of column values: the exposure as t, the outcome as y, sort keys and value lists.

Values are compared by their text form as well as numerically, so ``exposed_value=2`` (text on
the command line) matches the integer 2 and the float 2.0 of a column with missing cells.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ._covariates import fmt as _fmt
from ..errors import InputError

def code_exposure(values: pd.Series, col, exposed_value):
    counts = values.value_counts(sort=False)
    counts = counts[counts > 0]  # a categorical lists unused categories too
    uniq = list(counts.index)
    if not uniq:
        raise InputError(f"`exposure` column '{col}' is missing in every row; check the column name or the file")
    if len(uniq) != 2:
        how = ("a two-group comparison needs exactly 2: recode the column to two groups or keep only the "
               "rows of two groups")
        raise InputError(f"`exposure` column '{col}' has {len(uniq)} value(s) ({_value_list(counts)}); {how}")
    if exposed_value is None:
        if pd.api.types.is_bool_dtype(values) or set(uniq) == {True, False} and all(isinstance(u, (bool, np.bool_)) for u in uniq):
            exp = True
        elif pd.api.types.is_numeric_dtype(values) and {float(u) for u in uniq} == {0.0, 1.0}:
            exp = [u for u in uniq if float(u) == 1.0][0]
        else:
            a, b = sorted(_fmt(u) for u in uniq)
            raise InputError(f"`exposure` column '{col}' has two values ({a}, {b}) but neither is marked as "
                             f"exposed; pass `exposed_value={a}` or `exposed_value={b}`")
    else:
        match = [u for u in uniq if _same(u, exposed_value)]
        if len(match) != 1:
            raise InputError(f"`exposed_value` {exposed_value!r} is not one of the two values of '{col}' "
                             f"({_value_list(counts)}); pass one of them")
        exp = match[0]
    ref = [u for u in uniq if u is not exp and not _same(u, exp)][0]
    mask = (values == exp).to_numpy()
    return mask, {"exposed": _fmt(exp), "reference": _fmt(ref)}


def code_outcome(s: pd.Series, col, outcome_type, event):
    if (outcome_type != "binary" and event is None and pd.api.types.is_float_dtype(s)
            and _more_than_two(s.to_numpy(dtype=np.float64))):
        return s.to_numpy(dtype=np.float64), "continuous", None  # fast path: no value counts
    counts = s.value_counts(sort=False)
    counts = counts[counts > 0]
    uniq = list(counts.index)
    is_bool = pd.api.types.is_bool_dtype(s) or (len(uniq) > 0 and all(isinstance(u, (bool, np.bool_)) for u in uniq))
    numeric = pd.api.types.is_numeric_dtype(s) and not is_bool
    if len(uniq) < 2:
        raise InputError(f"`outcome` column '{col}' is constant in the analysed rows ({_value_list(counts)}); "
                         "an outcome must vary: check the column or the missing values")
    if event is not None and outcome_type == "continuous":
        raise InputError("`outcome_event` applies to binary outcomes only; drop it or use `outcome_type=binary`")
    if outcome_type == "continuous" or (outcome_type == "auto" and event is None and len(uniq) > 2):
        if not (numeric or is_bool):
            raise InputError(f"`outcome` column '{col}' is not numeric ({_value_list(counts)}); a continuous "
                             "outcome must be numbers, and a binary one must have exactly 2 values")
        return s.to_numpy(dtype=np.float64), "continuous", None
    if len(uniq) != 2:
        raise InputError(f"`outcome` column '{col}' has {len(uniq)} values ({_value_list(counts)}); a binary "
                         "outcome needs exactly 2: recode it or use `outcome_type=continuous`")
    if event is not None:
        match = [u for u in uniq if _same(u, event)]
        if len(match) != 1:
            raise InputError(f"`outcome_event` {event!r} is not one of the values of '{col}' "
                             f"({_value_list(counts)}); pass one of them")
        ev = match[0]
    elif is_bool:
        ev = True
    elif numeric and {float(u) for u in uniq} == {0.0, 1.0}:
        ev = [u for u in uniq if float(u) == 1.0][0]
    else:
        a, b = sorted(_fmt(u) for u in uniq)
        alt = " or `outcome_type=continuous`" if numeric else ""
        raise InputError(f"`outcome` column '{col}' has two values ({a}, {b}); say which is the event with "
                         f"`outcome_event={a}` or `outcome_event={b}`{alt}")
    other = [u for u in uniq if not _same(u, ev)][0]
    y = (s == ev).to_numpy(dtype=np.float64)
    return y, "binary", {"event": _fmt(ev), "non_event": _fmt(other)}


def _more_than_two(a: np.ndarray) -> bool:
    other = a[a != a[0]]
    return other.size > 0 and bool(np.any(other != other[0]))


def canonical_order(frame: pd.DataFrame, cols) -> np.ndarray:
    """Stable, hash-free row order by the values of ``cols`` (numbers by value, others by text)."""
    packed, card = [], []
    for c in cols:  # pack consecutive keys into one int64 while their code ranges fit (speed)
        k = codes(frame[c])[0]
        m = int(k.max(initial=0)) + 1
        if packed and card[-1] * m < 2 ** 62:
            packed[-1], card[-1] = packed[-1] * m + k, card[-1] * m
        else:
            packed.append(k)
            card.append(m)
    return np.lexsort(packed[::-1])


def codes(s: pd.Series):
    """Dense codes of ``s`` and its sorted distinct values (numbers by value, others by text; missing last)."""
    if pd.api.types.is_numeric_dtype(s) and not pd.api.types.is_bool_dtype(s):
        arr = s.to_numpy(dtype=np.float64, na_value=np.nan)
        lev, codes = np.unique(arr, return_inverse=True)
        return codes.astype(np.int64), lev
    codes, uniques = pd.factorize(s, use_na_sentinel=True)
    text = np.array([_fmt(u) for u in uniques], dtype=object)  # one call per distinct value
    lev, rank = np.unique(text, return_inverse=True)
    out = np.where(codes < 0, len(lev), rank[np.maximum(codes, 0)]) if len(lev) else codes + 1
    return out.astype(np.int64), lev


def _value_list(counts: pd.Series, k: int = 10) -> str:
    items = sorted(((_fmt(v), int(n)) for v, n in counts.items()), key=lambda x: (-x[1], x[0]))
    text = ", ".join(f"{v}: {n}" for v, n in items[:k])
    return text + (f", ... and {len(items) - k} more" if len(items) > k else "") if items else "none"


def _same(u, v) -> bool:
    if _fmt(u) == _fmt(v) or str(u) == str(v):
        return True
    try:
        return float(u) == float(v)
    except (TypeError, ValueError):
        return False
