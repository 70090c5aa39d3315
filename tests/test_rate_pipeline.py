"""Rate outcomes (events over person-time) through stratagap.analyze and the CLI.

Outside values: statsmodels ``confint_poisson_2indep`` (crude Wald intervals), the
Greenland & Robins (1985) Mantel-Haenszel rate ratio recomputed by hand from the strata table
of the result, and the test's values recomputed with statsmodels' Poisson GLM.
"""

from __future__ import annotations

import json
import math
import re
import sys
from pathlib import Path

import numpy as np
import pytest
import statsmodels.api as sm
from statsmodels.stats.rates import confint_poisson_2indep

import stratagap
from stratagap.cli import main

sys.path.insert(0, str(Path(__file__).resolve().parent))
from calibration.rates_scenario import make_rate_data  # noqa: E402
from test_results_doc import DOC, _names  # noqa: E402

KW = dict(exposure="shift", exposed_value="nights", outcome="spells", person_time="years",
          covariates=["age_z", "smoker"], resamples=199, seed=3)


@pytest.fixture(scope="module")
def data():
    return make_rate_data(n=900, seed=21)


@pytest.fixture(scope="module")
def result(data):
    return stratagap.analyze(data, **KW)


def test_json_fields_of_a_rate_result(result, data):
    d = result.to_dict()
    adj = d["adjusted"]
    assert adj["measure"] == "rate difference"
    assert set(adj["rate_ratio"]) >= {"estimate", "ci_low", "ci_high"}
    assert adj["rate_ratio"]["ci_low"] < adj["rate_ratio"]["estimate"] < adj["rate_ratio"]["ci_high"]
    assert adj["unit"] == "events per unit of 'years'"
    assert adj["rate_difference_per"]["estimate"] == pytest.approx(1000 * adj["estimate"])
    f = d["followup"]
    assert f["outcome_type"] == "rate" and d["question"]["outcome_type"] == "rate"
    t = data["shift"] == "nights"
    assert f["events_by_group"]["exposed"] == data.loc[t, "spells"].sum()
    assert f["person_time_by_group"]["reference"] == pytest.approx(data.loc[~t, "years"].sum())


def test_crude_is_the_complete_case_rate_difference(result, data):
    # statsmodels confint_poisson_2indep, Wald, difference of rates
    t = data["shift"] == "nights"
    a, b = data.loc[t, "spells"].sum(), data.loc[~t, "spells"].sum()
    p1, p0 = data.loc[t, "years"].sum(), data.loc[~t, "years"].sum()
    crude = result.to_dict()["crude"]
    assert crude["estimate"] == pytest.approx(a / p1 - b / p0, rel=1e-12)
    lo, hi = confint_poisson_2indep(a, p1, b, p0, method="wald", compare="diff")
    assert (crude["ci_low"], crude["ci_high"]) == pytest.approx((lo, hi), rel=1e-7)


def test_rate_ratio_is_mantel_haenszel_over_the_result_strata(result):
    # Greenland & Robins 1985 recomputed from the per-stratum events and person-time
    rows = result.to_dict()["followup"]["per_stratum"]
    a, b = (np.array([r[k] for r in rows]) for k in ("events_exposed", "events_reference"))
    p1, p0 = (np.array([r[k] for r in rows]) for k in ("person_time_exposed",
                                                       "person_time_reference"))
    p = p1 + p0
    R, S = np.sum(a * p0 / p), np.sum(b * p1 / p)
    var = np.sum((a + b) * p1 * p0 / p ** 2) / (R * S)
    rr = result.to_dict()["adjusted"]["rate_ratio"]
    assert rr["estimate"] == pytest.approx(R / S, rel=1e-12)
    assert rr["ci_high"] == pytest.approx(R / S * math.exp(1.959963984540054 * math.sqrt(var)),
                                          rel=1e-9)


def test_test_values_are_poisson_residuals_without_exposure(result):
    # statsmodels GLM Poisson with offset, stratum dummies and the covariate matrix
    arrays = result.arrays
    y, pt, labels = arrays["y"], arrays["followup"], arrays["labels"]
    # the test statistic is the stratified mean difference of those residuals
    from stratagap.inference.rate_scores import rate_scores  # noqa: PLC0415
    D = (labels[:, None] == np.unique(labels)[None, :]).astype(float)
    values = rate_scores(y, pt, labels, np.zeros((y.size, 0)), statistic="difference").values
    fit = sm.GLM(y, D, family=sm.families.Poisson(), offset=np.log(pt)).fit()
    np.testing.assert_allclose(values, y - fit.fittedvalues, atol=1e-8)
    test = result.to_dict()["test"]
    assert test["statistic_name"] == "mean_difference"
    assert "events minus expected" in test["statistic_label"]


def test_every_rate_field_is_documented(result):
    documented = set(re.findall(r"`([^`]+)`", DOC.read_text(encoding="utf-8")))
    missing = sorted(n for n in set(_names(result.to_dict())) if n not in documented)
    assert not missing, f"document these results.json fields in docs/results.md: {missing}"


def test_same_seed_same_json(data, result):
    again = stratagap.analyze(data, **KW)
    assert json.dumps(again.to_dict(), sort_keys=True) == json.dumps(result.to_dict(),
                                                                     sort_keys=True)


def test_row_order_does_not_change_the_result(data, result):
    shuffled = data.sample(frac=1.0, random_state=4).reset_index(drop=True)
    again = stratagap.analyze(shuffled, **KW).to_dict()
    assert again["adjusted"]["estimate"] == pytest.approx(result.to_dict()["adjusted"]["estimate"],
                                                          rel=1e-10)


def test_difference_statistic_runs(data):
    d = stratagap.analyze(data, **{**KW, "statistic": "difference"}).to_dict()
    assert "stratum rates" in d["test"]["statistic_label"]
    assert d["followup"]["test_values"] == "events minus expected (stratum effects only)"


def test_no_events_in_one_group_reports_the_ratio_as_not_estimable(data):
    df = data.copy()
    df.loc[df["shift"] == "nights", "spells"] = 0
    res = stratagap.analyze(df, **KW)
    d = res.to_dict()
    assert d["adjusted"]["rate_ratio"]["estimate"] is None
    assert "no events in the exposed group" in d["adjusted"]["rate_ratio"]["method"]
    assert d["adjusted"]["estimate"] < 0 and d["sensitivity"]["e_value"] is None
    assert any("not estimable" in w["message"] for w in d["warnings"])


def test_cli_runs_end_to_end_and_prints_the_rate_lines(tmp_path, data, capsys):
    path = tmp_path / "staff.csv"
    data.to_csv(path, index=False)
    before = path.read_bytes()
    code = main(["analyze", str(path), "--exposure", "shift", "--exposed-value", "nights",
                 "--outcome", "spells", "--person-time", "years", "--covariates",
                 "age_z,smoker", "--resamples", "199", "--out", str(tmp_path / "out")])
    out = capsys.readouterr().out
    assert code == 0
    assert "per 1,000 units of 'years'" in out and "Mantel-Haenszel rate ratio" in out
    assert "Not medical advice" in out
    html = (tmp_path / "out" / "report.html").read_text(encoding="utf-8")
    assert "Person-time (years)" in html and "events: exposed" in html
    assert path.read_bytes() == before


def test_cli_refuses_a_fractional_count(tmp_path, data, capsys):
    df = data.copy()
    df["spells"] = df["spells"].astype(float)
    df.loc[0, "spells"] = 0.5
    path = tmp_path / "bad.csv"
    df.to_csv(path, index=False)
    code = main(["analyze", str(path), "--exposure", "shift", "--exposed-value", "nights",
                 "--outcome", "spells", "--person-time", "years", "--covariates",
                 "age_z,smoker", "--out", str(tmp_path / "o")])
    err = capsys.readouterr().err
    assert code == 2 and "spells" in err and "Traceback" not in err
    assert len(err.strip().splitlines()) == 1


def test_statistic_is_the_stratified_mean_difference_of_events_minus_expected(data):
    # statsmodels GLM (stratum effects only, offset log PT) gives the values; the statistic is
    # sum_s w_s (mean exposed - mean reference), w_s = n_s / n (ATE), recomputed here
    res = stratagap.analyze(data, **{**KW, "statistic": "difference"})
    y, pt, labels, t = (res.arrays[k] for k in ("y", "followup", "labels", "t"))
    D = (labels[:, None] == np.unique(labels)[None, :]).astype(float)
    r = y - sm.GLM(y, D, family=sm.families.Poisson(), offset=np.log(pt)).fit().fittedvalues
    T = sum(np.mean(labels == s) * (r[(labels == s) & (t == 1)].mean()
                                    - r[(labels == s) & (t == 0)].mean())
            for s in np.unique(labels))
    assert res.to_dict()["test"]["statistic"] == pytest.approx(T, rel=1e-7, abs=1e-12)
