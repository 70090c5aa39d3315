"""design=match through the public analyze() and the command line: the matched sets are the
strata of the test, the effect and the sensitivity analysis."""

import csv
import json

import numpy as np
import pandas as pd
import pytest

import stratagap
from stratagap.cli import main
from stratagap.errors import InputError


def _frame(n=300, seed=4, shift=1.0):
    rng = np.random.default_rng(seed)
    x = rng.normal(size=n)
    sex = rng.integers(0, 2, n)
    t = (rng.random(n) < 1 / (1 + np.exp(-(x - shift)))).astype(int)
    y = 1.0 * t + x + rng.normal(size=n)
    return pd.DataFrame({"g": np.where(t == 1, "a", "b"), "y": y, "x": x, "sex": sex})


OPTIONS = dict(exposure="g", exposed_value="a", outcome="y", covariates=["x", "sex"],
               resamples=199, seed=3)


@pytest.fixture(scope="module")
def matched():
    return stratagap.analyze(_frame(), design="match", same_value_on="sex", **OPTIONS)


def test_matched_sets_are_the_strata(matched):
    d = matched.to_dict()
    m = d["matching"]
    assert d["question"]["estimand"] == "ATT"
    assert "matched exposed units" in d["question"]["population"]
    assert d["strata_info"]["method"] == "matched"
    assert len(d["strata"]) == m["matched_exposed"] == d["flow"]["analysed_by_group"]["exposed"]
    assert d["flow"]["not_matched_by_group"]["exposed"] == m["n_exposed"] - m["matched_exposed"]
    assert sum(m["unmatched_exposed"].values()) == m["n_exposed"] - m["matched_exposed"]
    assert d["flow"]["analysed_by_group"]["reference"] == m["reference_used"]
    sets = matched.arrays["matched_sets"]
    table = _frame()
    for s in np.unique(sets["set"])[:20]:  # every set shares the exact-agreement column
        rows = sets["row"][sets["set"] == s]
        assert table["sex"].iloc[rows].nunique() == 1
        assert (table["g"].iloc[rows] == "a").sum() == 1


def test_matched_effect_is_the_mean_within_set_difference(matched):
    # Imbens & Rubin 2015, ch. 10 (from memory): d_i = y_i - mean of its reference units,
    # estimate mean(d), SE sd(d) / sqrt(m)
    table = _frame()
    sets = matched.arrays["matched_sets"]
    d = []
    for s in np.unique(sets["set"]):
        rows = sets["row"][sets["set"] == s]
        grp = sets["group"][sets["set"] == s]
        yv = table["y"].to_numpy()[rows]
        d.append(yv[grp == "exposed"][0] - yv[grp == "reference"].mean())
    d = np.array(d)
    plain = matched.to_dict()["adjusted"]["plain_stratified"]
    assert plain["estimate"] == pytest.approx(d.mean(), rel=1e-12)
    assert plain["se"] == pytest.approx(d.std(ddof=1) / np.sqrt(d.size), rel=1e-12)


def test_balance_after_is_on_the_matched_sample(matched):
    # after matching with one reference unit per set: the plain SMD of the matched units on the
    # before-matching denominator (Austin 2009 / Stuart 2010: the denominator is kept)
    table = _frame()
    sets = matched.arrays["matched_sets"]
    rows = sets["row"]
    x = table["x"].to_numpy()
    t = (table["g"] == "a").to_numpy()
    kept = np.asarray(matched.arrays["row_ids"])[np.asarray(matched.arrays["keep"])]
    denom = np.sqrt((x[kept][t[kept]].var(ddof=1) + x[kept][~t[kept]].var(ddof=1)) / 2)
    xm, tm = x[rows], t[rows]
    smd_after = (xm[tm].mean() - xm[~tm].mean()) / denom
    row = next(r for r in matched.to_dict()["balance"]["rows"] if r["covariate"] == "x")
    assert row["smd_after"] == pytest.approx(smd_after, rel=1e-9)
    before = (x[kept][t[kept]].mean() - x[kept][~t[kept]].mean()) / denom
    assert row["smd_before"] == pytest.approx(before, rel=1e-9)


def test_same_inputs_give_the_same_json():
    a = stratagap.analyze(_frame(shift=2.0), design="match", per_exposed=2, **OPTIONS)
    b = stratagap.analyze(_frame(shift=2.0), design="match", per_exposed=2, **OPTIONS)
    assert a.to_json() == b.to_json()
    assert a.to_dict()["matching"]["per_exposed"] == 2


def test_strata_design_keeps_its_spec_keys():
    spec = stratagap.AnalysisSpec(exposure="g", outcome="y", covariates="x")
    assert "design" not in spec.to_dict() and spec.estimand == "ate"
    spec = spec.replace(design="match", estimand=None)
    assert spec.to_dict()["design"] == "match" and spec.estimand == "att"


@pytest.mark.parametrize("options, message", [
    (dict(estimand="ate"), "`estimand=ate` does not go with `design=match`"),
    (dict(caliper_sd=0), "`caliper_sd` must be a positive number"),
    (dict(per_exposed=0), r"`per_exposed` must lie in \[1, 100\]"),
    (dict(per_exposed=50), "`per_exposed=50` asks for"),
    (dict(same_value_on="colour"), "`same_value_on` names 'colour', not a column"),
    (dict(caliper_sd=1e-9), "no exposed unit has a reference unit within the caliper"),
    (dict(design="pairs"), "`design` must be one of strata, match"),
    (dict(strata_column="sex"), "`strata_column` and `design=match` exclude each other"),
    (dict(strata_method="adaptive"), "`strata_method=adaptive` and `design=match` exclude"),
])
def test_bad_matching_arguments(options, message):
    with pytest.raises(InputError, match=message):
        stratagap.analyze(_frame(), **{"design": "match", **OPTIONS, **options})


def test_cli_writes_the_matched_sets(tmp_path, capsys):
    path = tmp_path / "d.csv"
    _frame().to_csv(path, index=False)
    out = tmp_path / "out"
    code = main(["analyze", str(path), "--exposure", "g", "--exposed-value", "a", "--outcome",
                 "y", "--covariates", "x,sex", "--design", "match", "--per-exposed", "1",
                 "--caliper-sd", "0.2", "--same-value-on", "sex", "--resamples", "99",
                 "--out", str(out)])
    assert code == 0
    assert "matched sets:" in capsys.readouterr().out
    with open(out / "matched_sets.csv") as fh:
        rows = list(csv.DictReader(fh))
    data = json.loads((out / "results.json").read_text())
    assert len(rows) == data["matching"]["matched_exposed"] + data["matching"]["reference_used"]
    assert set(rows[0]) == {"set", "row", "group", "logit_gap"}


def test_cli_bad_caliper_is_one_line(tmp_path, capsys):
    path = tmp_path / "d.csv"
    _frame().to_csv(path, index=False)
    code = main(["analyze", str(path), "--exposure", "g", "--outcome", "y", "--covariates", "x",
                 "--design", "match", "--caliper-sd", "-1"])
    err = capsys.readouterr().err
    assert code == 2 and "`--caliper-sd` must be a positive number" in err
    assert len(err.strip().splitlines()) == 1


def test_matching_fields_are_documented(matched):
    # the field-name check of tests/test_results_doc.py, on a matched design
    import re
    from pathlib import Path
    sys_path = Path(__file__).resolve().parents[1]
    import importlib.util
    spec = importlib.util.spec_from_file_location("results_doc", sys_path / "test_results_doc.py")
    doc = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(doc)
    documented = set(re.findall(r"`([^`]+)`", doc.DOC.read_text(encoding="utf-8")))
    # keys that are numbers (k of matches_per_exposed, Gamma of mc_se) are data, not field names
    missing = sorted(n for n in set(doc._names(matched.to_dict()))
                     if n not in documented and not re.fullmatch(r"[0-9.]+", n))
    assert not missing, f"document these results.json fields in docs/results.md: {missing}"
