"""Argument and array checks of the permutation engine (one-line InputError messages)."""

from __future__ import annotations

import numpy as np

from .._base.layout import stratum_codes as _codes
from ..errors import InputError

MAX_RESAMPLES = 10_000_000


def _clean(values, t, labels, *, columns_ok=True):
    """Check and clean the arrays; returns (V (n,k) for kept rows, t, codes, S, keep)."""
    t = np.asarray(t)
    labels = np.asarray(labels)
    if t.ndim != 1:
        raise InputError(f"`t` must be a 1-D array of 0/1 exposure labels, got shape {t.shape}")
    n = t.size
    if labels.shape != (n,):
        raise InputError(f"`labels` must have shape ({n},) like `t`, got {labels.shape}")
    v = np.asarray(values, dtype=float)
    if v.ndim == 1:
        v = v[:, None]
    if v.ndim != 2 or v.shape[0] != n or (not columns_ok and v.shape[1] != 1):
        raise InputError(f"`values` must have {n} rows like `t` (1-D, or 2-D with one column "
                         f"per value), got shape {np.shape(values)}")
    if not np.all((t == 0) | (t == 1)):
        raise InputError("`t` must hold only 0 (reference) and 1 (exposed); recode the exposure")
    if not np.issubdtype(labels.dtype, np.integer):
        raise InputError("`labels` must be integer stratum labels (-1 = set aside)")
    keep = labels >= 0
    if not np.all(np.isfinite(v[keep])):
        raise InputError("`values` must be finite in every analysed row; drop or impute "
                         "missing values first")
    uniq, codes = _codes(labels[keep])
    if uniq.size == 0:
        raise InputError("`labels`: no stratum left (every row is -1); nothing to test")
    tk = t[keep].astype(np.int64)
    n_s = np.bincount(codes, minlength=uniq.size)
    n1_s = np.bincount(codes, weights=tk, minlength=uniq.size)
    bad = np.flatnonzero((n1_s == 0) | (n1_s == n_s))
    if bad.size:
        raise InputError(f"`labels`: stratum {int(uniq[bad[0]])} has units of only one group; "
                         "every stratum needs at least 1 exposed and 1 reference unit "
                         "(merge strata or set it aside with label -1)")
    return v[keep], tk, codes.astype(np.int64), int(uniq.size), keep


def _check_estimand(estimand):
    if estimand not in ("ate", "att"):
        raise InputError(f"`estimand` must be 'ate' or 'att', got {estimand!r}")
    return estimand


def _check_choice(value, allowed, name):
    if value not in allowed:
        raise InputError(f"`{name}` must be one of {', '.join(allowed)}; got {value!r}")


def _check_resamples(resamples):
    if isinstance(resamples, (bool, np.bool_)) or not isinstance(resamples, (int, np.integer)) \
            or not 1 <= int(resamples) <= MAX_RESAMPLES:
        raise InputError(f"`resamples` must be an integer from 1 to {MAX_RESAMPLES:,}, got "
                         f"{resamples!r}; 10000 is a good default")
    return int(resamples)


def _check_batch(batch_size):
    if batch_size is None:
        return None
    if isinstance(batch_size, (bool, np.bool_)) or not isinstance(batch_size, (int, np.integer)) \
            or batch_size < 1:
        raise InputError(f"`batch_size` must be a positive integer or None, got {batch_size!r}")
    return int(batch_size)
