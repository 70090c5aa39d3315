"""``result.tables``: the result's tables as pandas DataFrames, built from ``to_dict()``."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from stratagap.render.tables import BALANCE_COLUMNS, CROSS_CHECK_COLUMNS, STRATA_COLUMNS, ResultTables

from test_report import handmade


class _FakeResult:
    """Has what ResultTables reads: to_dict() and arrays (counts every to_dict call)."""

    def __init__(self, view):
        self._view, self.arrays, self.calls = view, view.arrays, 0

    def to_dict(self):
        self.calls += 1
        return self._view.data


@pytest.fixture
def tables():
    return ResultTables(_FakeResult(handmade()))


def test_balance_frame_matches_rows(tables):
    df = tables.balance
    rows = tables._result.to_dict()["balance"]["rows"]
    assert list(df.columns[:len(BALANCE_COLUMNS)]) == BALANCE_COLUMNS
    assert len(df) == len(rows)
    np.testing.assert_array_equal(df.smd_after.to_numpy(), [r["smd_after"] for r in rows])
    assert df.flagged.tolist() == [False, True, False]


def test_strata_frame_joins_per_stratum_estimates(tables):
    df = tables.strata
    assert list(df.columns[:len(STRATA_COLUMNS)]) == STRATA_COLUMNS
    assert df.n.tolist() == [50, 48] and df.estimate.tolist() == [1.5, 2.5]
    assert df.model.tolist() == ["interactions", "main effects"]
    assert df.weight.tolist() == [0.51, 0.49]  # the strata table's weight, not overwritten


def test_cross_checks_frame(tables):
    df = tables.cross_checks
    assert list(df.columns[:len(CROSS_CHECK_COLUMNS)]) == CROSS_CHECK_COLUMNS
    assert df.method.tolist() == ["IPW (Hajek)", "AIPW"]
    assert df.estimand_kind.tolist() == ["marginal", "marginal"]


def test_baseline_frame(tables):
    df = tables.baseline
    assert isinstance(df, pd.DataFrame)
    assert df.characteristic.tolist() == ["Number of people", "age", "role", "role", "role"]
    assert df.level.tolist() == ["", "", "", "a", "b"]


def test_tables_are_cached_and_built_from_one_to_dict(tables):
    first = tables.balance
    assert tables.balance is first
    tables.strata, tables.cross_checks  # noqa: B018 - touch them
    assert tables._result.calls == 1


def test_empty_result_gives_empty_frames():
    view = handmade()
    view.data["balance"] = {"rows": []}
    view.data["strata"] = []
    view.data["cross_checks"] = []
    t = ResultTables(_FakeResult(view))
    assert t.balance.empty and list(t.balance.columns) == BALANCE_COLUMNS
    assert t.strata.empty and t.cross_checks.empty


def test_one_strata_join_behind_the_csv_the_table_and_the_report():
    from stratagap.render.files import strata_csv
    from stratagap.render.report._rows import strata_rows
    from stratagap.render.tables import strata_with_estimates
    data = handmade().data
    data["adjusted"] = dict(data["adjusted"], per_stratum=data["adjusted"]["per_stratum"][:1])
    rows = strata_with_estimates(data)
    # stratum 0 gains its estimate; stratum 1 (no estimate row) keeps only its own fields
    assert rows[0]["estimate"] == 1.5 and rows[0]["model"] == "interactions"
    assert rows[0]["weight"] == data["strata"][0]["weight"]  # the stratum's own field wins
    assert rows[1] == data["strata"][1]
    csv_lines = strata_csv(data).splitlines()
    assert csv_lines[0] == ",".join(STRATA_COLUMNS) and csv_lines[2].endswith(",,,,,")
    report = strata_rows(data)
    assert report[0]["ci"] == "-0.46 to 3.46" and report[1]["ci"] == "n/a"
    assert [r["stratum"] for r in report] == [0, 1]  # numbered as in results.json and strata.csv
    assert report[1]["estimate"] == "n/a" and report[1]["model"] == ""


def test_balance_column_variants_have_one_home():
    from stratagap.render import files
    from stratagap.stratify.balance import CSV_COLUMNS, TABLE_COLUMNS
    assert files.BALANCE_COLUMNS is CSV_COLUMNS and BALANCE_COLUMNS is TABLE_COLUMNS
    # the notebook table adds the term's kind after its level; balance.csv keeps its columns
    assert [c for c in TABLE_COLUMNS if c != "kind"] == CSV_COLUMNS
    assert TABLE_COLUMNS.index("kind") == CSV_COLUMNS.index("level") + 1
