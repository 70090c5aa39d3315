"""Time-to-event outcomes end to end: analyze(), the JSON, the CLI, the report, bad input.

The numbers themselves are checked against outside values in tests/inference/
test_survival_scores.py, tests/estimation/test_survival_*.py and tests/external/
test_nhefs_survival.py; here: the pieces arrive where the contract says, the same seed gives
the same JSON, the documented fields cover the JSON, and the CLI exits 2 on bad input.
"""

import json
import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import stratagap
from stratagap.errors import InputError
from stratagap.inference import stratified_test
from stratagap.inference.survival_scores import survival_scores

DOC = Path(__file__).resolve().parents[1] / "docs" / "results.md"
SRC = Path(__file__).resolve().parents[1] / "src"


def cohort(n=300, seed=4, effect=0.3):
    rng = np.random.default_rng(seed)
    age = rng.normal(50, 10, n)
    sev = rng.normal(size=n)
    sex = rng.integers(0, 2, n)
    t = (rng.random(n) < 1 / (1 + np.exp(-(-0.5 + 0.04 * (age - 50) + 0.8 * sev)))).astype(int)
    haz = 0.03 * np.exp(0.03 * (age - 50) + 0.6 * sev + 0.2 * sex + effect * t)
    ev = rng.exponential(1 / haz)
    cens = rng.uniform(10, 40, n)
    return pd.DataFrame({"grp": t, "age": age, "sev": sev, "sex": sex,
                         "months": np.round(np.minimum(ev, cens), 2) + 0.01,
                         "event": (ev <= cens).astype(int)})


ARGS = dict(exposure="grp", outcome="event", time="months", covariates=["age", "sev", "sex"],
            resamples=999)


@pytest.fixture(scope="module")
def result():
    return stratagap.analyze(cohort(), **ARGS)


def test_json_fields(result):
    d = result.to_dict()
    adj = d["adjusted"]
    assert adj["measure"].startswith("risk difference at time")
    assert adj["horizon"] == d["followup"]["horizon"]["value"] and adj["horizon_reason"]
    assert set(adj["hazard_ratio"]) >= {"estimate", "ci_low", "ci_high"}
    assert adj["hazard_ratio"]["ci_low"] < adj["hazard_ratio"]["estimate"] < adj["hazard_ratio"]["ci_high"]
    assert set(adj["rmst_difference"]) >= {"estimate", "ci_low", "ci_high"}
    assert adj["ci_low"] < adj["estimate"] < adj["ci_high"]
    f = d["followup"]
    df = cohort()
    assert f["events_by_group"] == {"exposed": int(df.event[df.grp == 1].sum()),
                                    "reference": int(df.event[df.grp == 0].sum())}
    assert f["person_time_by_group"]["exposed"] == pytest.approx(df.months[df.grp == 1].sum())
    assert "risk difference at time" in d["verdict"]
    assert d["question"]["outcome_type"] == "time-to-event"


def test_test_is_stratified_test_on_martingale_residuals(result):
    d = result.to_dict()
    arrays = result.arrays
    t, labels = arrays["t"], arrays["labels"]
    prepared_time = arrays["followup"]
    X = np.column_stack([result.arrays["raw"][c].to_numpy(float) for c in ("age", "sev", "sex")])
    scores = survival_scores(prepared_time, arrays["y"], labels, X)
    again = stratified_test(scores.values, t, labels, estimand="ate", resamples=999, seed=2026)
    assert d["test"]["statistic"] == pytest.approx(again.statistic, rel=1e-8)
    assert d["test"]["p_value"] == pytest.approx(again.p_value, abs=1e-12)


def test_same_seed_same_json(result):
    again = stratagap.analyze(cohort(), **ARGS)
    assert json.dumps(again.to_dict(), sort_keys=True) == json.dumps(result.to_dict(),
                                                                     sort_keys=True)


def test_logrank_statistic_and_horizon():
    r = stratagap.analyze(cohort(), **ARGS, statistic="difference", horizon=12)
    d = r.to_dict()
    assert d["followup"]["scores"]["kind"] == "logrank"
    assert d["adjusted"]["horizon"] == 12 and d["adjusted"]["horizon_chosen_by"] == "user"
    with pytest.raises(InputError, match="`horizon` 500 is beyond the follow-up"):
        stratagap.analyze(cohort(), **ARGS, horizon=500)


def test_every_survival_field_is_documented(result):
    documented = set(re.findall(r"`([^`]+)`", DOC.read_text(encoding="utf-8")))
    names = set()

    def walk(value, path=""):
        if isinstance(value, dict):
            for key, item in value.items():
                names.add(key)
                if key not in ("coefficients", "survival", "ci_low", "ci_high", "at_risk"):
                    walk(item, f"{path}.{key}")
        elif isinstance(value, list):
            for item in value[:3]:
                walk(item, path)

    d = result.to_dict()
    walk(d["followup"])
    walk(d["adjusted"])
    missing = sorted(n for n in names if n not in documented)
    assert not missing, f"document these results.json fields in docs/results.md: {missing}"


def _cli(*args, cwd):
    env = {"PYTHONPATH": str(SRC), "PATH": "/usr/bin:/bin"}
    return subprocess.run([sys.executable, "-m", "stratagap", "analyze", *args], cwd=cwd,
                          capture_output=True, text=True, env=env)


def test_cli_end_to_end_and_bad_horizon(tmp_path):
    cohort().to_csv(tmp_path / "c.csv", index=False)
    base = ["c.csv", "--exposure", "grp", "--outcome", "event", "--time", "months",
            "--covariates", "age,sev,sex", "--resamples", "499"]
    ok = _cli(*base, "--out", "out", cwd=tmp_path)
    assert ok.returncode == 0, ok.stderr
    assert "risk difference at time" in ok.stdout and "hazard ratio" in ok.stdout
    html = (tmp_path / "out" / "report.html").read_text(encoding="utf-8")
    assert "Adjusted survival of the two groups" in html and "sg-stratum-hazard-ratios" in html
    assert (tmp_path / "out" / "figures" / "survival_curves.svg").exists()
    assert "events: exposed" in html  # the participant flow gives events and person-time
    bad = _cli(*base, "--horizon", "500", "--out", "bad", cwd=tmp_path)
    assert bad.returncode == 2 and "horizon" in bad.stderr and "Traceback" not in bad.stderr
    assert not any((tmp_path / "bad").rglob("*"))  # nothing written (the CLI may make the folder)


def test_no_events_in_one_group_is_not_an_error():
    d = cohort()
    d.loc[d.grp == 1, "event"] = 0
    with pytest.warns(Warning):
        r = stratagap.analyze(d, **ARGS)
    hr = r.to_dict()["adjusted"]["hazard_ratio"]
    assert hr["estimate"] is None and hr["reason"] == "no events in the exposed group"
    assert r.to_dict()["adjusted"]["estimate"] < 0  # no exposed event: exposed risk 0
