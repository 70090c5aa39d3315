"""The cross-checks' inputs: the checks of the analysed arrays, and the outcome models' columns."""

from __future__ import annotations

import numpy as np

from .._base.checks import check_alpha
from ..errors import InputError
from ._within_strata import SPLINE_UNITS_PER_COLUMN

__all__ = ["check_inputs", "outcome_columns", "MEASURES"]

MEASURES = ("difference", "rr", "or")

def check_inputs(y, t, X, estimand, alpha, outcome_type, measure, truncate=None, score=None):
    try:
        y = np.asarray(y, dtype=float).ravel()
    except (TypeError, ValueError):
        raise InputError("`y` must be numeric; recode the outcome as numbers (0/1 for a binary one)") from None
    n = y.size
    t_arr = np.asarray(t).ravel()
    if t_arr.size != n:
        raise InputError(f"`t` has {t_arr.size} values but `y` has {n}; pass arrays of the analysed rows")
    if not np.all(np.isin(t_arr, (0, 1))):
        raise InputError("`t` must be coded 1 = exposed, 0 = reference; recode the exposure")
    t_arr = t_arr.astype(np.int8)
    n1 = int(t_arr.sum())
    if min(n1, n - n1) < 2:
        raise InputError(
            f"`t` has {n1} exposed and {n - n1} reference rows; the cross-checks need at least 2 "
            "in each group"
        )
    X = np.asarray(X, dtype=float)
    if X.ndim == 1:
        X = X[:, None]
    if X.ndim != 2 or X.shape[0] != n:
        raise InputError(f"`X` must be an (n, p) design with n = {n} rows, got shape {X.shape}")
    if not (np.all(np.isfinite(y)) and np.all(np.isfinite(X))):
        raise InputError("`y` and `X` must be finite (no NaN/inf); drop or impute those rows first")
    est = str(estimand).lower()
    if est not in ("ate", "att"):
        raise InputError(f"`estimand` must be 'ate' or 'att', got {estimand!r}")
    if outcome_type not in ("binary", "continuous"):
        raise InputError(f"`outcome_type` must be 'binary' or 'continuous', got {outcome_type!r}")
    if outcome_type == "binary" and not np.all(np.isin(y, (0.0, 1.0))):
        raise InputError("`y` is declared binary but has values other than 0/1; recode it or use outcome_type='continuous'")
    if measure not in MEASURES:
        raise InputError(f"`measure` must be one of {MEASURES}, got {measure!r}")
    if measure != "difference" and outcome_type != "binary":
        raise InputError(f"`measure`={measure!r} needs a binary outcome; use measure='difference' for a continuous one")
    alpha = check_alpha(alpha)
    if truncate is not None:
        try:
            lo, hi = (float(v) for v in truncate)
        except (TypeError, ValueError):
            raise InputError(f"`truncate` must be a pair of percentiles (lo, hi), e.g. (1, 99); got {truncate!r}") from None
        if not (0 <= lo < hi <= 100):
            raise InputError(f"`truncate` percentiles must satisfy 0 <= lo < hi <= 100, got {truncate!r}; e.g. (1, 99)")
        truncate = (lo, hi)
    if score is not None:
        score = np.asarray(score, dtype=float).ravel()
        if score.size != n or not np.all((score > 0) & (score < 1)):
            raise InputError(f"`score` must hold {n} propensity scores strictly between 0 and 1")
    return y, t_arr, X, est, float(alpha), truncate, score


def outcome_columns(X, t, n_linear, notes):
    """The outcome models' columns: the spline design when each group has the units for it."""
    p = X.shape[1]
    if n_linear is None or n_linear >= p:
        return X
    smaller = int(min(t.sum(), len(t) - t.sum()))
    if smaller >= SPLINE_UNITS_PER_COLUMN * p:
        return X
    notes.append(f"the outcome models of AIPW and standardization use linear terms: the smaller "
                 f"group has {smaller:,} units, fewer than {SPLINE_UNITS_PER_COLUMN} per column "
                 f"of the spline design ({p} columns)")
    return X[:, :n_linear]
