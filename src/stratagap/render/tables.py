"""The result's tables as pandas DataFrames: ``result.tables.balance``, ``.strata``,
``.baseline`` and ``.cross_checks``.

Each is built from the result on first access (from ``to_dict()``, the same numbers that
``results.json`` and the report hold) and cached; nothing is recomputed. Column names are the
ones of ``balance.csv`` and ``strata.csv``.
"""

from __future__ import annotations

from functools import cached_property

import pandas as pd

from ..stratify.balance import TABLE_COLUMNS as BALANCE_COLUMNS

__all__ = ["ResultTables", "strata_with_estimates", "BALANCE_COLUMNS", "STRATA_COLUMNS"]

#: Columns of ``strata.csv`` and the leading columns of ``result.tables.strata``.
STRATA_COLUMNS = ["stratum", "score_low", "score_high", "n_exposed", "n_reference", "n", "weight",
                  "estimate", "se", "ci_low", "ci_high", "model"]
CROSS_CHECK_COLUMNS = ["method", "estimate", "se", "ci_low", "ci_high", "measure", "estimand",
                       "estimand_kind", "population", "se_method"]


def strata_with_estimates(data: dict) -> list[dict]:
    """The ``strata`` rows of a result dict, each joined with the headline's estimate for that
    stratum (the fields of ``adjusted.per_stratum`` that the stratum row lacks: ``estimate``,
    ``se``, ``ci_low``, ``ci_high``, ``model``, ...). A stratum without an estimate row keeps
    only its own fields. The one join behind ``strata.csv``, this table and the report."""
    per = {row["stratum"]: row for row in data["adjusted"]["per_stratum"]}
    return [{**row, **{k: v for k, v in per.get(row["stratum"], {}).items() if k not in row}}
            for row in data["strata"]]


def _frame(rows, columns) -> pd.DataFrame:
    rows = [dict(r) for r in rows or []]
    extra = [c for r in rows for c in r if c not in columns]
    keep = columns + [c for c in dict.fromkeys(extra) if not isinstance(rows[0].get(c), (list, dict))]
    return pd.DataFrame([{c: r.get(c) for c in keep} for r in rows], columns=keep)


class ResultTables:
    """Tables of one :class:`~stratagap.result.AnalysisResult` (see the module docstring).

    Examples
    --------
    >>> result.tables.balance.sort_values("smd_after")   # doctest: +SKIP
    """

    def __init__(self, result):
        self._result = result

    @cached_property
    def _data(self) -> dict:
        return self._result.to_dict()

    @cached_property
    def balance(self) -> pd.DataFrame:
        """One row per covariate (and dummy level): SMD, variance ratio and KS, before and after."""
        return _frame(self._data["balance"]["rows"], BALANCE_COLUMNS)

    @cached_property
    def strata(self) -> pd.DataFrame:
        """One row per stratum: score range, counts by group, weight and the stratum's effect."""
        return _frame(strata_with_estimates(self._data), STRATA_COLUMNS)

    @cached_property
    def baseline(self) -> pd.DataFrame:
        """Baseline characteristics by group with SMDs (see :func:`stratagap.render.report.baseline_table`)."""
        from .report.baseline import baseline_table
        return baseline_table(self._result)

    @cached_property
    def cross_checks(self) -> pd.DataFrame:
        """The cross-check estimators (IPW, augmented IPW, standardization), one row each."""
        return _frame(self._data["cross_checks"], CROSS_CHECK_COLUMNS)

    def __repr__(self) -> str:
        return "ResultTables(balance, strata, baseline, cross_checks)"
