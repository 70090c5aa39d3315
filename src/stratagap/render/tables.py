"""The result's tables as pandas DataFrames: ``result.tables.balance``, ``.strata``,
``.baseline`` and ``.cross_checks``.

Each is built from the result on first access (from ``to_dict()``, the same numbers that
``results.json`` and the report hold) and cached; nothing is recomputed. Column names are the
ones of ``balance.csv`` and ``strata.csv``.
"""

from __future__ import annotations

from functools import cached_property

import pandas as pd

__all__ = ["ResultTables"]

BALANCE_COLUMNS = ["covariate", "level", "kind", "smd_before", "smd_after", "var_ratio_before",
                   "var_ratio_after", "ks_before", "ks_after", "flagged"]
STRATA_COLUMNS = ["stratum", "score_low", "score_high", "n_exposed", "n_reference", "n", "weight",
                  "estimate", "se", "ci_low", "ci_high", "model"]
CROSS_CHECK_COLUMNS = ["method", "estimate", "se", "ci_low", "ci_high", "measure", "estimand",
                       "estimand_kind", "population", "se_method"]


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
        return _frame((self._data.get("balance") or {}).get("rows"), BALANCE_COLUMNS)

    @cached_property
    def strata(self) -> pd.DataFrame:
        """One row per stratum: score range, counts by group, weight and the stratum's effect."""
        per = {r.get("stratum"): r for r in (self._data.get("adjusted") or {}).get("per_stratum") or []}
        rows = [{**row, **{k: v for k, v in per.get(row.get("stratum"), {}).items() if k not in row}}
                for row in self._data.get("strata") or []]
        return _frame(rows, STRATA_COLUMNS)

    @cached_property
    def baseline(self) -> pd.DataFrame:
        """Baseline characteristics by group with SMDs (see :func:`stratagap.render.report.baseline_table`)."""
        from .report.baseline import baseline_table
        return baseline_table(self._result)

    @cached_property
    def cross_checks(self) -> pd.DataFrame:
        """The cross-check estimators (IPW, augmented IPW, standardization), one row each."""
        return _frame(self._data.get("cross_checks"), CROSS_CHECK_COLUMNS)

    def __repr__(self) -> str:
        return "ResultTables(balance, strata, baseline, cross_checks)"
