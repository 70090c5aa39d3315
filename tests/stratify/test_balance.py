"""Balance table: SMDs (Austin 2009), variance ratios, KS distances, Rubin's B and R."""

import json
from dataclasses import dataclass

import numpy as np
import pandas as pd
import pytest
from scipy.special import expit

from stratagap.errors import BalanceWarning, InputError
from stratagap.stratify.balance import CSV_COLUMNS, balance_table
from stratagap.stratify.strata import make_strata, unit_weights


@dataclass
class Term:
    name: str
    covariate: str
    level: object
    kind: str
    column: int | None = None
    values: np.ndarray | None = None


def data(n=3000, seed=7):
    rng = np.random.default_rng(seed)
    age = rng.normal(45, 12, n)
    region = rng.choice(["north", "south", "west"], size=n, p=[0.5, 0.3, 0.2])
    south = (region == "south").astype(float)
    west = (region == "west").astype(float)
    lin = -3.2 + 0.06 * age + 0.7 * south - 0.4 * west
    t = (rng.random(n) < expit(lin)).astype(np.int8)
    X = np.column_stack([age, south, west])
    terms = [Term("age", "age", None, "continuous", column=0),
             Term("region[south]", "region", "south", "binary", column=1),
             Term("region[west]", "region", "west", "binary", values=west)]
    return X, t, terms, lin


def test_smd_before_matches_pandas_formulas():
    X, t, terms, _ = data()
    res = balance_table(X, t, terms)
    df = pd.DataFrame(X, columns=["age", "south", "west"]).assign(t=t)
    g = df.groupby("t")
    m, v = g.mean(), g.var()  # pandas var: ddof=1
    smd_age = (m.loc[1, "age"] - m.loc[0, "age"]) / np.sqrt((v.loc[1, "age"] + v.loc[0, "age"]) / 2)
    p1, p0 = m.loc[1, "south"], m.loc[0, "south"]
    smd_south = (p1 - p0) / np.sqrt((p1 * (1 - p1) + p0 * (1 - p0)) / 2)  # Austin 2009, binary
    rows = {r["name"]: r for r in res.rows}
    assert rows["age"]["smd_before"] == pytest.approx(smd_age, rel=1e-12)
    assert rows["region[south]"]["smd_before"] == pytest.approx(smd_south, rel=1e-12)
    assert rows["age"]["var_ratio_before"] == pytest.approx(v.loc[1, "age"] / v.loc[0, "age"])
    assert rows["region[south]"]["var_ratio_before"] is None  # binary: no variance ratio
    assert rows["age"]["smd_after"] is None and not res.adjusted
    assert res.max_abs_smd_before == pytest.approx(max(abs(r["smd_before"]) for r in res.rows))
    assert rows["age"]["flagged"]  # before-only: flagged on the before SMD


def test_smd_after_uses_weighted_means_and_the_before_denominator():
    X, t, terms, lin = data()
    score = expit(lin)
    strata = make_strata(score, t, estimand="att")
    w = unit_weights(strata.labels, t, "att")
    res = balance_table(X, t, terms, weights_after=w, logit=lin)
    rows = {r["name"]: r for r in res.rows}
    # independent: per-stratum means combined with ATT weights n1_s / n1
    df = pd.DataFrame({"age": X[:, 0], "t": t, "s": strata.labels})
    means = df.groupby(["s", "t"])["age"].mean().unstack()
    n1s = df[df.t == 1].groupby("s").size()
    diff = float(np.sum((means[1] - means[0]) * n1s / n1s.sum()))
    sd_before = np.sqrt((X[t == 1, 0].var(ddof=1) + X[t == 0, 0].var(ddof=1)) / 2)
    assert rows["age"]["smd_after"] == pytest.approx(diff / sd_before, rel=1e-10)
    assert abs(rows["age"]["smd_after"]) < abs(rows["age"]["smd_before"]) / 3


def test_weighted_variance_ratio_and_ks_after():
    X, t, terms, lin = data(n=500)
    w = np.random.default_rng(1).uniform(0.5, 2.0, t.size)
    with pytest.warns(BalanceWarning):
        res = balance_table(X, t, terms[:1], weights_after=w)
    x = X[:, 0]

    def wvar(v, u):  # reliability weights, written out independently
        m = np.sum(u * v) / np.sum(u)
        return np.sum(u * (v - m) ** 2) / (np.sum(u) - np.sum(u**2) / np.sum(u))

    ratio = wvar(x[t == 1], w[t == 1]) / wvar(x[t == 0], w[t == 0])
    assert res.rows[0]["var_ratio_after"] == pytest.approx(ratio, rel=1e-12)
    # weighted KS by brute force over every observed value
    grid = np.unique(x)
    F1 = [(w[t == 1] * (x[t == 1] <= g)).sum() / w[t == 1].sum() for g in grid]
    F0 = [(w[t == 0] * (x[t == 0] <= g)).sum() / w[t == 0].sum() for g in grid]
    assert res.rows[0]["ks_after"] == pytest.approx(np.max(np.abs(np.subtract(F1, F0))), abs=1e-12)


def test_equal_weights_after_reproduce_before():
    X, t, terms, lin = data(n=400)
    with pytest.warns(BalanceWarning):
        res = balance_table(X, t, terms, weights_after=np.ones(t.size), logit=lin)
    for r in res.rows:
        assert r["smd_after"] == pytest.approx(r["smd_before"], rel=1e-12)
        assert r["ks_after"] == pytest.approx(r["ks_before"], abs=1e-12)
        if r["kind"] == "continuous":
            assert r["var_ratio_after"] == pytest.approx(r["var_ratio_before"], rel=1e-12)
    assert res.rubin["B_after"] == pytest.approx(res.rubin["B_before"], rel=1e-12)
    assert res.rubin["R_after"] == pytest.approx(res.rubin["R_before"], rel=1e-12)


def test_rubin_b_and_r_before():
    X, t, terms, lin = data()
    res = balance_table(X, t, terms, logit=lin)
    l1, l0 = lin[t == 1], lin[t == 0]
    B = abs(l1.mean() - l0.mean()) / np.sqrt((l1.var(ddof=1) + l0.var(ddof=1)) / 2)  # Rubin 2001
    assert res.rubin["B_before"] == pytest.approx(B, rel=1e-12)
    assert res.rubin["R_before"] == pytest.approx(l1.var(ddof=1) / l0.var(ddof=1), rel=1e-12)
    assert res.rubin["B_ok_before"] == (B < 0.5)
    assert res.rubin["B_after"] is None


def test_flags_and_warning_name_the_imbalanced_terms():
    X, t, terms, lin = data()
    w = np.ones(t.size)  # "after" = before: age stays imbalanced
    with pytest.warns(BalanceWarning, match="age"):
        res = balance_table(X, t, terms, weights_after=w)
    flagged = {r["name"] for r in res.rows if r["flagged"]}
    assert flagged == {r["name"] for r in res.rows if abs(r["smd_after"]) > 0.1}
    assert "age" in res.flagged


def test_to_frame_has_the_csv_columns_and_to_dict_is_json_ready():
    X, t, terms, lin = data(n=500)
    with pytest.warns(BalanceWarning):
        res = balance_table(X, t, terms, weights_after=np.ones(t.size), logit=lin)
    frame = res.to_frame()
    assert list(frame.columns) == CSV_COLUMNS
    assert frame["level"].isna().tolist() == [True, False, False]  # no level for a numeric
    assert list(frame["level"][1:]) == ["south", "west"]
    d = res.to_dict()
    assert json.loads(json.dumps(d)) == d


def test_perfectly_separated_binary_term_gives_infinite_smd_not_an_error():
    t = np.array([1, 1, 1, 0, 0, 0], dtype=np.int8)
    x = t.astype(float)
    res = balance_table(x[:, None], t, [Term("d", "d", "1", "binary", column=0)])
    assert res.rows[0]["smd_before"] is None and res.rows[0]["flagged"]
    assert res.max_abs_smd_before == np.inf and res.to_dict()["max_abs_smd_before"] is None


def test_bad_inputs():
    X, t, terms, _ = data(n=100)
    with pytest.raises(InputError, match="weights_after"):
        balance_table(X, t, terms, weights_after=-np.ones(t.size))
    with pytest.raises(InputError, match="kind"):
        balance_table(X, t, [Term("a", "a", None, "ordinal", column=0)])
    with pytest.raises(InputError, match="both groups"):
        balance_table(X, np.ones_like(t), terms)
