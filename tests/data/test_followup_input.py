"""Follow-up outcomes (issue 13, "Bad input"): every ill-posed time-to-event or rate question is
refused with one line that names the column or option and the fix; the CLI exits 2 and writes
nothing. The statistics of these outcomes are tested beside their own modules."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from stratagap import InputError
from stratagap.cli import main
from stratagap.data import prepare
from stratagap.spec import AnalysisSpec


def cohort(n=300, seed=5) -> pd.DataFrame:
    """Invented cohort: night-shift work, age, days to a first sick leave, sick-leave spells."""
    rng = np.random.default_rng(seed)
    age = rng.normal(40, 10, n)
    night = (rng.random(n) < 1 / (1 + np.exp(-0.05 * (age - 40)))).astype(int)
    days = rng.exponential(300, n).round(1) + 1
    return pd.DataFrame({"night": night, "age": age, "days": days,
                         "leave": (rng.random(n) < 0.6).astype(int),
                         "spells": rng.poisson(1.2, n), "years": rng.uniform(0.5, 3, n)})


def prep(frame, **kw):
    base = dict(exposure="night", covariates=["age"])
    return prepare(frame, **{**base, **kw})


def test_time_codes_the_event_indicator_and_keeps_the_follow_up_aligned():
    frame = cohort()
    got = prep(frame, outcome="leave", time="days")
    assert got.outcome_type == "time-to-event"
    assert got.outcome_levels == {"event": "1", "non_event": "0"}
    # rows are put in a canonical order: the follow-up travels with its own row
    np.testing.assert_array_equal(got.followup, frame["days"].to_numpy()[got.row_ids])
    np.testing.assert_array_equal(got.y, frame["leave"].to_numpy()[got.row_ids])


def test_person_time_codes_the_count():
    frame = cohort()
    got = prep(frame, outcome="spells", person_time="years")
    assert got.outcome_type == "rate"
    np.testing.assert_array_equal(got.followup, frame["years"].to_numpy()[got.row_ids])
    np.testing.assert_array_equal(got.y, frame["spells"].to_numpy()[got.row_ids])


def test_everyone_with_an_event_is_a_valid_time_to_event_outcome():
    frame = cohort().assign(leave=1)
    assert prep(frame, outcome="leave", time="days").y.all()


def test_text_event_values_need_outcome_event():
    frame = cohort().assign(leave=lambda d: np.where(d["leave"] == 1, "sick", "censored"))
    with pytest.raises(InputError, match="outcome_event"):
        prep(frame, outcome="leave", time="days")
    got = prep(frame, outcome="leave", time="days", outcome_event="sick")
    assert got.outcome_levels == {"event": "sick", "non_event": "censored"}


@pytest.mark.parametrize("change, kw, words", [
    (lambda d: d.assign(days=d["days"].where(d.index != 3, 0.0)), dict(outcome="leave", time="days"),
     "`time` column 'days'.*> 0"),
    (lambda d: d.assign(days=d["days"].where(d.index != 3, -2.0)), dict(outcome="leave", time="days"),
     "`time` column 'days'.*> 0"),
    (lambda d: d.assign(days=d["days"].where(d.index != 3)), dict(outcome="leave", time="days"),
     "`time` column 'days' is missing on 1 row"),
    (lambda d: d.assign(days=d["days"].astype(str) + "d"), dict(outcome="leave", time="days"),
     "`time` column 'days' is not numeric"),
    (lambda d: d.assign(leave=d["leave"].where(d.index != 3, 2)), dict(outcome="leave", time="days"),
     "competing risks"),
    (lambda d: d.assign(leave=0), dict(outcome="leave", time="days"), "no events"),
    (lambda d: d.assign(spells=d["spells"].astype(float).where(d.index != 3, 1.5)),
     dict(outcome="spells", person_time="years"), "negative or fractional"),
    (lambda d: d.assign(spells=d["spells"].where(d.index != 3, -1)),
     dict(outcome="spells", person_time="years"), "negative or fractional"),
    (lambda d: d.assign(years=d["years"].where(d.index != 3, 0.0)),
     dict(outcome="spells", person_time="years"), "`person_time` column 'years'.*> 0"),
    (lambda d: d.assign(years=d["years"].where(d.index != 3, 5000.0),
                        spells=d["spells"].where(d.index != 3, 400)),
     dict(outcome="spells", person_time="years"), "totals of many people"),
    (lambda d: d, dict(outcome="leave", time="dayz"), "`time`: column 'dayz' is not in the table"),
    (lambda d: d, dict(outcome="leave", time="age"), "`time` 'age' is also"),
    (lambda d: d, dict(outcome="spells", person_time="years", outcome_event="1"), "drop `outcome_event`"),
])
def test_bad_follow_up_columns_are_refused_by_name(change, kw, words):
    with pytest.raises(InputError, match=words):
        prep(change(cohort()), **kw)


@pytest.mark.parametrize("kw, words", [
    (dict(time="days", person_time="years"), "`time` and `person_time` exclude each other"),
    (dict(horizon=100), "`horizon` needs `time`"),
    (dict(time="days", horizon=0), "`horizon` must be a positive number"),
    (dict(time="days", horizon="soon"), "`horizon` must be a positive number"),
    (dict(time="days", measure="rr"), "`measure=rr` is not available with `time`"),
    (dict(time="days", statistic="sum"), "`statistic=sum` is not available with `time`"),
    (dict(person_time="years", outcome_type="binary"), "not available with `person_time`"),
    (dict(time="days", design="match"), "`design=match` is not available with `time`"),
    (dict(time="days", cluster="site"), "`cluster=site` is not available with `time`"),
    (dict(time="leave"), "`time` 'leave' is also the exposure or the outcome"),
])
def test_spec_refuses_follow_up_combinations(kw, words):
    with pytest.raises(InputError, match=words):
        AnalysisSpec(exposure="night", outcome="leave", covariates=("age",), **kw)


def test_follow_up_keys_stay_out_of_results_of_other_outcomes():
    spec = AnalysisSpec(exposure="night", outcome="leave", covariates=("age",))
    assert not {"time", "horizon", "person_time"} & set(spec.to_dict())
    with_time = AnalysisSpec(exposure="night", outcome="leave", covariates=("age",),
                             time="days", horizon="365")
    assert with_time.to_dict()["horizon"] == 365.0 and "person_time" not in with_time.to_dict()


@pytest.mark.parametrize("flags, words", [
    (["--outcome", "leave", "--horizon", "30"], "`--horizon` needs `--time`"),
    (["--outcome", "leave", "--time", "days", "--person-time", "years"], "exclude each other"),
    (["--outcome", "leave", "--time", "days"], None),  # checked by the data stage below
])
def test_cli_exits_2_with_one_line(tmp_path, capsys, flags, words):
    frame = cohort()
    if words is None:  # a data-stage refusal: an event code of 2
        frame.loc[3, "leave"] = 2
        words = "competing risks"
    path = tmp_path / "cohort.csv"
    frame.to_csv(path, index=False)
    before = path.read_bytes()
    out = tmp_path / "out"
    code = main(["analyze", str(path), "--exposure", "night", "--covariates", "age",
                 "--out", str(out), *flags])
    err = capsys.readouterr().err.strip()
    assert code == 2
    assert words in err and len(err.splitlines()) == 1 and "Traceback" not in err
    assert path.read_bytes() == before and (not out.exists() or not any(out.iterdir()))
