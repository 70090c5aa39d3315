"""Events and person-time by group at each step of the participant flow, in the baseline table
and in the summary, for rate and time-to-event outcomes, through stratagap.analyze.

Outside value: pandas groupby sums on the input table itself. The rows that each step sets
aside are found here from the input (missing values; given strata holding one group); only
the overlap rule's choice of rows is taken from the result (``arrays["keep"]``, mapped to the
input by ``arrays["row_ids"]``), and its sums are still recomputed from the input.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import stratagap
from stratagap.render.report.flow import flow_steps
from stratagap.render.summary import render_summary

sys.path.insert(0, str(Path(__file__).resolve().parent))
from calibration.rates_scenario import make_rate_data  # noqa: E402

RATE = dict(exposure="shift", exposed_value="nights", outcome="spells", person_time="years",
            covariates=["age_z", "smoker"], resamples=99, seed=3, trim="crump",
            strata_column="site")


def _rate_input() -> pd.DataFrame:
    """The invented sick-leave data with missing values, a site of day workers only (set aside
    as a stratum lacking a group) and a few extreme scores (for the overlap rule)."""
    d = make_rate_data(n=900, seed=21)
    rng = np.random.default_rng(5)
    nights = d["shift"] == "nights"
    d["site"] = rng.integers(0, 3, len(d))
    d.loc[(d["site"] == 2) & nights, "site"] = 1  # site 2: reference units only
    d["spells"] = d["spells"].astype(float)
    d.loc[rng.random(len(d)) < 0.04, "age_z"] = np.nan
    d.loc[rng.random(len(d)) < 0.03, "spells"] = np.nan
    d.loc[rng.random(len(d)) < 0.02, "shift"] = None
    return d


def _sums(rows: pd.DataFrame, event: str, time: str, exposure: str, exposed) -> dict:
    """pandas groupby of the input rows: events and follow-up by group."""
    group = np.where(rows[exposure] == exposed, "exposed", "reference")
    by = rows.assign(_g=group).groupby("_g")[[event, time]].sum()
    by = by.reindex(["exposed", "reference"], fill_value=0.0)
    return {"events": {g: int(by.loc[g, event]) for g in by.index},
            "person_time": {g: float(by.loc[g, time]) for g in by.index}}


def _assert_step(step: dict, expected: dict):
    assert step["events"] == expected["events"]
    for g in ("exposed", "reference"):
        assert step["person_time"][g] == pytest.approx(expected["person_time"][g], rel=1e-12)


@pytest.fixture(scope="module")
def rate():
    data = _rate_input()
    with pytest.warns(stratagap.StratagapWarning):
        return data, stratagap.analyze(data, **RATE)


def test_rate_flow_steps_match_pandas_groupby_on_the_input(rate):
    data, res = rate
    block = res.to_dict()["flow"]["followup_by_step"]
    assert block["column"] == "years"
    args = ("spells", "years", "shift", "nights")
    analysed_cols = ["shift", "spells", "age_z", "smoker", "site"]
    complete = data.dropna(subset=analysed_cols)
    _assert_step(block["complete_cases"], _sums(complete, *args))
    # set aside for missing values: rows whose group is recorded; events where counted
    aside = data[data[analysed_cols].isna().any(axis=1) & data["shift"].notna()]
    expected = _sums(aside.fillna({"spells": 0.0}), *args)
    _assert_step(block["set_aside_missing"], expected)
    missing_outcome = aside[aside["spells"].isna()]
    assert block["set_aside_missing"]["outcome_missing"] == {
        "exposed": int((missing_outcome["shift"] == "nights").sum()),
        "reference": int((missing_outcome["shift"] != "nights").sum())}
    # the overlap rule's rows, from the result; their sums from the input
    keep, row_ids = res.arrays["keep"], res.arrays["row_ids"]
    trimmed = data.iloc[row_ids[~keep]]
    assert len(trimmed) == sum(res.to_dict()["flow"]["trimmed_by_group"].values()) > 0
    _assert_step(block["trimmed"], _sums(trimmed, *args))
    kept = data.iloc[row_ids[keep]]
    one_group = kept.groupby("site")["shift"].transform("nunique") < 2
    assert one_group.any()
    _assert_step(block["strata_set_aside"], _sums(kept[one_group], *args))
    _assert_step(block["analysed"], _sums(kept[~one_group], *args))
    # the analysed step is the followup block's own totals
    f = res.to_dict()["followup"]
    assert block["analysed"]["events"] == {g: int(v) for g, v in f["events_by_group"].items()}


def test_rate_flow_boxes_and_exits_show_events_and_person_time(rate):
    _, res = rate
    d = res.to_dict()
    block = d["flow"]["followup_by_step"]
    steps = flow_steps(d["flow"])
    missing, = steps[0]["exits"]
    ev = block["set_aside_missing"]["events"]
    assert f"events: exposed {ev['exposed']:,}, reference {ev['reference']:,}" in " ".join(
        missing["lines"])
    assert any(line.startswith("events not known (outcome missing)") for line in missing["lines"])
    titles = [e["title"] for e in steps[1]["exits"]]
    assert titles == ["Set aside by the overlap rule (trimming)",
                      "Set aside: strata lacking one group"]
    lacking = steps[1]["exits"][1]["lines"][-1]
    pt = block["strata_set_aside"]["person_time"]
    assert lacking == (f"events: exposed 0, reference "
                       f"{block['strata_set_aside']['events']['reference']:,}; person-time "
                       f"(years): exposed 0.0, reference {pt['reference']:,.1f}")
    assert "person-time (years)" in steps[1]["detail"] and "person-time (years)" in steps[2]["detail"]
    assert all("key" not in e for s in steps for e in s["exits"])


def test_rate_baseline_table_and_summary(rate, tmp_path):
    data, res = rate
    d = res.to_dict()
    analysed = d["flow"]["followup_by_step"]["analysed"]
    table = res.tables.baseline.set_index("characteristic")
    assert table.loc["Events", "exposed"] == f"{analysed['events']['exposed']:,}"
    assert table.loc["Person-time (years)", "reference"] == \
        f"{analysed['person_time']['reference']:,.1f}"
    assert "Crude rate" in table.index
    text = render_summary(d, width=200)
    assert f"analysed rows, events: exposed {analysed['events']['exposed']:,}" in text
    assert "complete cases (before trimming and strata), events:" in text
    from stratagap.render.files import write_result
    write_result(res, tmp_path)
    csv = pd.read_csv(tmp_path / "baseline.csv")
    assert "Person-time (years)" in set(csv["characteristic"])
    assert "Events" in (tmp_path / "baseline.md").read_text()
    html = (tmp_path / "report.html").read_text(encoding="utf-8")
    assert "events not known (outcome missing)" in html


def _cohort(n=240, seed=4):
    rng = np.random.default_rng(seed)
    age = rng.normal(50, 10, n)
    sev = rng.normal(size=n)
    t = (rng.random(n) < 1 / (1 + np.exp(-(-0.5 + 0.04 * (age - 50) + 0.8 * sev)))).astype(int)
    haz = 0.03 * np.exp(0.03 * (age - 50) + 0.6 * sev + 0.3 * t)
    ev = rng.exponential(1 / haz)
    cens = rng.uniform(10, 40, n)
    df = pd.DataFrame({"grp": np.where(t == 1, "yes", "no"), "age": age, "sev": sev,
                       "months": np.round(np.minimum(ev, cens), 2) + 0.01,
                       "status": np.where(ev <= cens, "died", "alive")})
    df.loc[rng.random(n) < 0.05, "sev"] = np.nan
    df.loc[rng.random(n) < 0.04, "status"] = None
    return df


def test_time_to_event_flow_and_baseline_match_pandas_groupby():
    data = _cohort()
    res = stratagap.analyze(data, exposure="grp", exposed_value="yes", outcome="status",
                            outcome_event="died", time="months", covariates=["age", "sev"],
                            resamples=99, seed=1)
    d = res.to_dict()
    block = d["flow"]["followup_by_step"]
    coded = data.assign(death=(data["status"] == "died").astype(int))
    args = ("death", "months", "grp", "yes")
    complete = coded.dropna(subset=["grp", "status", "age", "sev"])
    _assert_step(block["complete_cases"], _sums(complete, *args))
    _assert_step(block["set_aside_missing"], _sums(coded.drop(complete.index), *args))
    keep, row_ids = res.arrays["keep"], res.arrays["row_ids"]
    _assert_step(block["analysed"], _sums(coded.iloc[row_ids[keep]], *args))
    f = d["followup"]
    assert block["analysed"]["events"] == f["events_by_group"]
    table = res.tables.baseline.set_index("characteristic")
    n1 = d["flow"]["analysed_by_group"]["exposed"]
    e1 = block["analysed"]["events"]["exposed"]
    assert table.loc["Events", "exposed"] == f"{e1:,} ({100 * e1 / n1:.1f} %)"
    assert table.loc["Person-time (months)", "summary"] == "sum of 'months'"
    text = render_summary(d, width=200)
    assert "person-time (months): exposed" in text


def test_rate_flow_counts_do_not_depend_on_the_row_order(rate):
    data, res = rate
    shuffled = data.sample(frac=1.0, random_state=7).reset_index(drop=True)
    with pytest.warns(stratagap.StratagapWarning):
        again = stratagap.analyze(shuffled, **RATE)
    assert again.to_dict()["flow"] == res.to_dict()["flow"]
