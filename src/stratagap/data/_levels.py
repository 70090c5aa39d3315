"""Categorical covariates with many levels: refuse, or pool the rare levels on request.

A categorical covariate with very many levels for the rows at hand adds one dummy per level to
every model; the weighting and outcome-model cross-checks then fit near-empty cells and
disagree with each other (seen: 200 levels on 388 rows gave 11.3 by AIPW and standardization
against 3.3 by IPW). The rule: more than min(50, max(n / 20, 10)) levels is refused (n / 20 and
50 from the issue that found it, common practice; the floor of 10, ours, keeps small studies
with a few categories), unless ``pool_rare_levels`` merges every level with fewer than
:data:`RARE_ROWS` rows into one level named :data:`POOLED_LEVEL`.
"""

from __future__ import annotations

import pandas as pd

from ..errors import DataWarning, InputError

__all__ = ["level_limit", "check_levels", "POOLED_LEVEL", "RARE_ROWS"]

POOLED_LEVEL = "(rare levels pooled)"
#: A level with fewer rows than this is rare.
RARE_ROWS = 10


def level_limit(n: int) -> int:
    """Most levels a categorical covariate may have in ``n`` rows."""
    return int(min(50, max(n // 20, 10)))


def check_levels(frame: pd.DataFrame, columns, *, pool: bool, is_categorical,
                 identifier_levels) -> pd.DataFrame:
    """``frame`` with rare levels pooled where asked; an :class:`InputError` where too many remain."""
    import warnings

    n = len(frame)
    limit = level_limit(n)
    out = frame
    for c in columns:
        s = frame[c]
        if not is_categorical(s) or pd.api.types.is_bool_dtype(s):
            continue
        counts = s.value_counts(dropna=True)
        if len(counts) <= limit or identifier_levels(len(counts), n):
            continue  # identifiers get their own message when the design is built
        if pool:
            rare = counts.index[counts < RARE_ROWS]
            if len(rare) >= 2:
                if out is frame:
                    out = frame.copy()
                pooled = s.astype(object).where(~s.isin(rare), POOLED_LEVEL)
                out[c] = pooled
                warnings.warn(f"covariate '{c}': {len(rare)} levels with fewer than {RARE_ROWS} rows "
                              f"were pooled into one level '{POOLED_LEVEL}' "
                              f"({int(counts[rare].sum())} rows)", DataWarning, stacklevel=3)
                counts = out[c].value_counts(dropna=True)
            if len(counts) <= limit:
                continue
            raise InputError(f"`covariates` column '{c}' still has {len(counts)} levels after pooling "
                             f"rare ones, more than {limit} for {n} rows; group its levels into fewer "
                             "categories")
        raise InputError(f"`covariates` column '{c}' has {len(counts)} levels, more than {limit} for "
                         f"{n} rows (estimates adjusting for it would rest on near-empty cells); group "
                         f"its levels, or pass `pool_rare_levels` to pool levels with fewer than "
                         f"{RARE_ROWS} rows")
    return out
