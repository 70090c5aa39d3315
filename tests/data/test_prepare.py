"""Unit tests of the data stage: reading files and preparing the analysed arrays."""

import json
import os
import warnings

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings, strategies as st

from stratagap.errors import DataWarning, InputError, MissingDataWarning
from stratagap.data import BalanceTerm, Flow, PreparedData, observed_weights, prepare, read_table


def invented(n=200, seed=1):
    """An invented occupational table: night-shift work, blood pressure, a few covariates."""
    rng = np.random.default_rng(seed)
    age = rng.normal(45, 10, n).round(1)
    site = rng.choice(["north", "east", "south"], n)
    smoker = rng.integers(0, 2, n)
    logit = -0.5 + 0.04 * (age - 45) + 0.5 * (site == "east")
    shift = (rng.random(n) < 1 / (1 + np.exp(-logit))).astype(int)
    sbp = 120 + 0.5 * (age - 45) + 3 * shift + rng.normal(0, 8, n)
    return pd.DataFrame({"shift": shift, "sbp": sbp, "age": age, "site": site, "smoker": smoker})


def quiet_prepare(table, **kw):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return prepare(table, **kw)


# --------------------------------------------------------------------------------- read_table
@pytest.mark.parametrize("delim", [",", ";", "\t"])
def test_csv_delimiters_detected(tmp_path, delim):
    df = pd.DataFrame({"a": [1, 2, 3], "b": [0.5, 1.5, 2.5], "c": ["x", "y", "z"]})
    path = tmp_path / "t.csv"
    df.to_csv(path, sep=delim, index=False)
    got = read_table(path)
    pd.testing.assert_frame_equal(got, df, check_dtype=False)


def test_csv_semicolon_with_decimal_commas_in_quotes(tmp_path):
    path = tmp_path / "t.csv"
    path.write_text('a;b\n"1,5";2\n"2,5";3\n', encoding="utf-8")
    got = read_table(path)
    assert list(got.columns) == ["a", "b"] and got["b"].tolist() == [2, 3]


def test_read_errors(tmp_path):
    with pytest.raises(InputError, match="does not exist"):
        read_table(tmp_path / "nope.csv")
    with pytest.raises(InputError, match="is a directory"):
        read_table(tmp_path)
    empty = tmp_path / "empty.csv"
    empty.write_bytes(b"")
    with pytest.raises(InputError, match=r"empty \(0 bytes\)"):
        read_table(empty)
    header = tmp_path / "header.csv"
    header.write_text("a,b,c\n")
    with pytest.raises(InputError, match="header but no data rows"):
        read_table(header)
    dup = tmp_path / "dup.csv"
    dup.write_text("a,b,a\n1,2,3\n")
    with pytest.raises(InputError, match="duplicate column names.*'a'"):
        read_table(dup)
    odd = tmp_path / "data.xlsx"  # a CSV under a workbook's name: say what it really is
    odd.write_text("a,b\n1,2\n")
    with pytest.raises(InputError, match=r"named \.xlsx but its content is CSV/text.*\.csv"):
        read_table(odd)
    unknown = tmp_path / "data.dat"
    unknown.write_text("a,b\n1,2\n")
    with pytest.raises(InputError, match="unknown suffix '.dat'"):
        read_table(unknown)
    ragged = tmp_path / "ragged.csv"
    ragged.write_text("a,b\n1,2\n3,4,5,6\n")
    with pytest.raises(InputError, match="not a well-formed table"):
        read_table(ragged)


def test_error_messages_are_one_line(tmp_path):
    bad = tmp_path / "latin.csv"
    bad.write_bytes("name,x\nJos\xe9,1\n".encode("latin-1"))
    for path in (tmp_path / "nope.csv", bad):
        with pytest.raises(InputError) as info:
            read_table(path)
        assert "\n" not in str(info.value)


def test_encoding_fallback_message_and_option(tmp_path):
    path = tmp_path / "latin.csv"
    path.write_bytes("name,x\nJos\xe9,1\nAn\xefs,2\n".encode("latin-1"))
    with pytest.raises(InputError, match=r"latin\.csv.*cannot be decoded as UTF-8.*re-save it as UTF-8 or pass `encoding`"):
        read_table(path)
    got = read_table(path, encoding="latin-1")
    assert got["name"].tolist() == ["José", "Anïs"]
    with pytest.raises(InputError, match="not a known text encoding"):
        read_table(path, encoding="no-such-codec")


def test_utf8_bom_accepted(tmp_path):
    path = tmp_path / "bom.csv"
    path.write_bytes("\ufeffa,b\n1,2\n".encode("utf-8"))
    assert list(read_table(path).columns) == ["a", "b"]


def test_content_sniff_mismatch(tmp_path):
    fake = tmp_path / "fake.parquet"
    fake.write_text("a,b\n1,2\n")
    with pytest.raises(InputError, match=r"named \.parquet but its content is CSV/text.*\.csv"):
        read_table(fake)
    real = tmp_path / "real.csv"
    pd.DataFrame({"a": [1, 2]}).to_parquet(real)
    with pytest.raises(InputError, match=r"named \.csv but its content is Parquet"):
        read_table(real)
    junk = tmp_path / "junk.dta"
    junk.write_bytes(b"\x00\x01\x02garbage")
    with pytest.raises(InputError, match=r"does not look like a Stata"):
        read_table(junk)


def test_input_never_modified(tmp_path):
    path = tmp_path / "ro.csv"
    invented(20).to_csv(path, index=False)
    before = path.read_bytes()
    os.chmod(path, 0o444)  # read-only: a reader that opened it for writing would fail
    mtime = path.stat().st_mtime_ns
    table = read_table(path)
    assert len(table) == 20
    assert path.read_bytes() == before and path.stat().st_mtime_ns == mtime


# ----------------------------------------------------------------------------- column checks
@pytest.mark.parametrize("arg,kw", [
    ("exposure", {"exposure": "shfit"}),
    ("outcome", {"outcome": "sbpp"}),
    ("covariates", {"covariates": ["age", "sitee"]}),
    ("strata_column", {"strata_column": "sitte"}),
    ("negative_control", {"negative_control": "agee"}),
])
def test_unknown_column_named_with_suggestion(arg, kw):
    args = dict(exposure="shift", outcome="sbp", covariates=["age"]) | kw
    with pytest.raises(InputError, match=rf"`{arg}`: column '\w+' is not in the table; did you mean '"):
        prepare(invented(), **args)


def test_argument_validation():
    df = invented()
    with pytest.raises(InputError, match="must be a pandas DataFrame"):
        prepare([1, 2], exposure="shift", outcome="sbp", covariates=["age"])
    with pytest.raises(InputError, match="no rows"):
        prepare(df.iloc[:0], exposure="shift", outcome="sbp", covariates=["age"])
    with pytest.raises(InputError, match="`missing` must be"):
        prepare(df, exposure="shift", outcome="sbp", covariates=["age"], missing="impute")
    with pytest.raises(InputError, match="`outcome_type` must be"):
        prepare(df, exposure="shift", outcome="sbp", covariates=["age"], outcome_type="count")
    with pytest.raises(InputError, match="`covariates` is empty"):
        prepare(df, exposure="shift", outcome="sbp", covariates=[])
    with pytest.raises(InputError, match="same column"):
        prepare(df, exposure="shift", outcome="shift", covariates=["age"])
    with pytest.raises(InputError, match="includes 'sbp', which is the outcome"):
        prepare(df, exposure="shift", outcome="sbp", covariates=["age", "sbp"])
    dup = pd.concat([df, df[["age"]]], axis=1)
    with pytest.raises(InputError, match="duplicate column names.*age"):
        prepare(dup, exposure="shift", outcome="sbp", covariates=["site"])


def test_covariates_as_comma_string():
    p = quiet_prepare(invented(), exposure="shift", outcome="sbp", covariates="age, site")
    assert p.covariates == ["age", "site"]


# ------------------------------------------------------------------------------- exposure
def test_exposure_01_and_bool_need_no_flag():
    df = invented()
    p = prepare(df, exposure="shift", outcome="sbp", covariates=["age"])
    assert p.t.dtype == np.int8 and p.exposure_levels == {"exposed": "1", "reference": "0"}
    assert p.t.sum() == df["shift"].sum()
    df["b"] = df["shift"].astype(bool)
    p = prepare(df, exposure="b", outcome="sbp", covariates=["age"])
    assert p.exposure_levels == {"exposed": "True", "reference": "False"} and p.t.sum() == df["shift"].sum()


def test_exposure_two_strings_need_exposed_value():
    df = invented()
    df["grp"] = np.where(df["shift"] == 1, "night", "day")
    with pytest.raises(InputError, match=r"two values \(day, night\).*`exposed_value=day` or `exposed_value=night`"):
        prepare(df, exposure="grp", outcome="sbp", covariates=["age"])
    p = prepare(df, exposure="grp", outcome="sbp", covariates=["age"], exposed_value="night")
    assert np.array_equal(np.sort(p.t), np.sort(df["shift"].to_numpy()))
    assert p.exposure_levels == {"exposed": "night", "reference": "day"}
    with pytest.raises(InputError, match="`exposed_value` 'evening' is not one of"):
        prepare(df, exposure="grp", outcome="sbp", covariates=["age"], exposed_value="evening")


def test_exposed_value_string_matches_integer_and_float():
    df = invented()
    df["code"] = np.where(df["shift"] == 1, 2, 5)
    p = prepare(df, exposure="code", outcome="sbp", covariates=["age"], exposed_value="2")
    assert p.t.sum() == df["shift"].sum() and p.exposure_levels["exposed"] == "2"
    df.loc[0, "code"] = np.nan  # float column now: 2.0 must still match "2"
    p = quiet_prepare(df, exposure="code", outcome="sbp", covariates=["age"], exposed_value="2")
    assert p.exposure_levels == {"exposed": "2", "reference": "5"}


def test_exposure_one_or_many_values():
    df = invented()
    df["one"] = 1
    with pytest.raises(InputError, match=r"'one' has 1 value\(s\) \(1: 200\).*exactly 2"):
        prepare(df, exposure="one", outcome="sbp", covariates=["age"])
    with pytest.raises(InputError, match=r"'site' has 3 value\(s\) \((\w+: \d+, ){2}\w+: \d+\).*recode"):
        prepare(df, exposure="site", outcome="sbp", covariates=["age"])
    df["none"] = np.nan
    with pytest.raises(InputError, match="'none' is missing in every row"):
        prepare(df, exposure="none", outcome="sbp", covariates=["age"])
    df["many"] = np.arange(200) % 12
    with pytest.raises(InputError, match=r"has 12 value\(s\).*\.\.\. and 2 more"):
        prepare(df, exposure="many", outcome="sbp", covariates=["age"])


def test_one_group_left_after_dropping_missing():
    df = invented()
    df.loc[df["shift"] == 1, "age"] = np.nan
    with pytest.raises(InputError, match=r"only the reference group \(0\) remains"):
        quiet_prepare(df, exposure="shift", outcome="sbp", covariates=["age"])


# -------------------------------------------------------------------------------- outcome
def test_outcome_types():
    df = invented()
    p = prepare(df, exposure="shift", outcome="sbp", covariates=["age"])
    assert p.outcome_type == "continuous" and p.outcome_levels is None and p.y.dtype == np.float64
    df["hyp"] = (df["sbp"] > 125).astype(int)
    p = prepare(df, exposure="shift", outcome="hyp", covariates=["age"])
    assert p.outcome_type == "binary" and p.outcome_levels == {"event": "1", "non_event": "0"}
    assert p.y.sum() == df["hyp"].sum()
    df["hyp_b"] = df["hyp"].astype(bool)
    assert prepare(df, exposure="shift", outcome="hyp_b", covariates=["age"]).outcome_type == "binary"
    p = prepare(df, exposure="shift", outcome="hyp", covariates=["age"], outcome_type="continuous")
    assert p.outcome_type == "continuous" and set(np.unique(p.y)) == {0.0, 1.0}


def test_outcome_two_strings_need_event():
    df = invented()
    df["status"] = np.where(df["sbp"] > 125, "high", "normal")
    with pytest.raises(InputError, match=r"two values \(high, normal\).*outcome_event=high"):
        prepare(df, exposure="shift", outcome="status", covariates=["age"])
    with pytest.raises(InputError, match=r"two values \(high, normal\)"):
        prepare(df, exposure="shift", outcome="status", covariates=["age"], outcome_type="binary")
    p = prepare(df, exposure="shift", outcome="status", covariates=["age"], outcome_event="high")
    assert p.outcome_type == "binary" and p.outcome_levels == {"event": "high", "non_event": "normal"}
    assert p.y.sum() == (df["status"] == "high").sum()
    with pytest.raises(InputError, match="`outcome_event` 'x' is not one of"):
        prepare(df, exposure="shift", outcome="status", covariates=["age"], outcome_event="x")
    with pytest.raises(InputError, match="applies to binary outcomes only"):
        prepare(df, exposure="shift", outcome="sbp", covariates=["age"], outcome_event=1,
                outcome_type="continuous")


def test_outcome_errors():
    df = invented()
    df["text"] = df["site"]
    with pytest.raises(InputError, match=r"`outcome` column 'text' is not numeric"):
        prepare(df, exposure="shift", outcome="text", covariates=["age"])
    df["flat"] = 3.0
    with pytest.raises(InputError, match=r"`outcome` column 'flat' is constant"):
        prepare(df, exposure="shift", outcome="flat", covariates=["age"])
    with pytest.raises(InputError, match=r"'sbp' has 200 values.*binary outcome needs exactly 2"):
        prepare(df, exposure="shift", outcome="sbp", covariates=["age"], outcome_type="binary")
    with pytest.raises(InputError, match="'text' is not numeric"):
        prepare(df, exposure="shift", outcome="text", covariates=["age"], outcome_type="continuous")
    df["two"] = np.where(df["sbp"] > 120, 1, 2)
    with pytest.raises(InputError, match="`outcome_event=1` or `outcome_event=2` or `outcome_type=continuous`"):
        prepare(df, exposure="shift", outcome="two", covariates=["age"])


def test_datetime_outcome_is_error_and_time_to_event_warns():
    df = invented()
    df["visit"] = pd.Timestamp("2020-01-01") + pd.to_timedelta(np.arange(200), unit="D")
    with pytest.raises(InputError, match="'visit' holds dates/times; time-to-event outcomes are out of scope"):
        prepare(df, exposure="shift", outcome="visit", covariates=["age"])
    with pytest.raises(InputError, match="'visit' holds dates/times; convert it to a number"):
        prepare(df, exposure="shift", outcome="sbp", covariates=["age", "visit"])
    df["followup_days"] = np.arange(200) + 1.0
    df["death"] = np.arange(200) % 2
    with pytest.warns(DataWarning, match="'followup_days' looks like part of a time-to-event outcome"):
        prepare(df, exposure="shift", outcome="followup_days", covariates=["age"])
    with pytest.warns(DataWarning, match="time-to-event outcomes are out of scope"):
        prepare(df, exposure="shift", outcome="death", covariates=["age"])
    df["ymd"] = 20200101 + np.arange(200) % 28
    with pytest.warns(DataWarning, match="'ymd' looks like"):
        prepare(df, exposure="shift", outcome="ymd", covariates=["age"])
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # a plain outcome beside a death column: no warning
        prepare(df, exposure="shift", outcome="sbp", covariates=["age"])


# ----------------------------------------------------------------------------- covariates
def test_categorical_one_hot_with_sorted_reference():
    df = invented()
    # the linear coding (terms="linear"); spline columns are tested in test_splines.py
    p = prepare(df, exposure="shift", outcome="sbp", covariates=["age", "site", "smoker"],
                terms="linear")
    assert p.design_names == ["age", "site: north", "site: south", "smoker"]
    assert p.reference_levels == {"site": "east"}  # first in sorted order
    assert np.array_equal(p.X[:, 1], (p.raw["site"] == "north").to_numpy(float))
    assert np.array_equal(p.X[:, 0], p.raw["age"].to_numpy(float))
    kinds = {t.name: (t.kind, t.column, t.level) for t in p.terms}
    assert kinds == {"age": ("continuous", 0, None), "site: east": ("binary", None, "east"),
                     "site: north": ("binary", 1, "north"), "site: south": ("binary", 2, "south"),
                     "smoker": ("binary", 3, None)}
    ref = [t for t in p.terms if t.name == "site: east"][0]
    assert np.array_equal(ref.values, (p.raw["site"] == "east").to_numpy(float))
    for t in p.terms:
        if t.column is not None:
            assert np.array_equal(t.values, p.X[:, t.column])


def test_constant_covariate_dropped_with_warning():
    df = invented()
    df["plant"] = "A"
    with pytest.warns(DataWarning, match="covariate 'plant' is constant"):
        p = prepare(df, exposure="shift", outcome="sbp", covariates=["age", "plant"], terms="linear")
    assert p.covariates == ["age"] and p.design_names == ["age"]


def test_covariate_identical_to_exposure():
    df = invented()
    df["copy"] = df["shift"]
    with pytest.raises(InputError, match="'copy' is the exposure recoded"):
        prepare(df, exposure="shift", outcome="sbp", covariates=["age", "copy"])
    df["label"] = np.where(df["shift"] == 1, "nights", "days")
    with pytest.raises(InputError, match="'label' is the exposure recoded"):
        prepare(df, exposure="shift", outcome="sbp", covariates=["label"])


def test_id_like_covariate():
    df = invented()
    df["worker"] = [f"W{i:04d}" for i in range(200)]
    with pytest.raises(InputError, match="'worker' looks like an identifier.*remove it"):
        prepare(df, exposure="shift", outcome="sbp", covariates=["age", "worker"])
    df["badge"] = [f"B{i % 120}" for i in range(200)]  # 120 levels in 200 rows
    with pytest.raises(InputError, match="'badge' looks like an identifier"):
        prepare(df, exposure="shift", outcome="sbp", covariates=["badge"])


def test_collinear_columns_dropped_with_warning():
    df = invented()
    df["age_months"] = df["age"] * 12
    with pytest.warns(DataWarning, match="'age_months' is a linear combination"):
        p = prepare(df, exposure="shift", outcome="sbp", covariates=["age", "age_months", "smoker"],
                    terms="linear")
    assert p.design_names == ["age", "smoker"] and p.dropped_design_columns == ["age_months"]
    term = [t for t in p.terms if t.name == "age_months"][0]
    assert term.column is None and np.allclose(term.values, 12 * p.raw["age"])
    df["region"] = df["site"].map({"north": "N", "east": "E", "south": "S"})  # same partition
    with pytest.warns(DataWarning, match=r"'region: [NS]' is a linear combination"):
        p = prepare(df, exposure="shift", outcome="sbp", covariates=["site", "region"])
    assert p.design_names == ["site: north", "site: south"]
    assert np.linalg.matrix_rank(np.column_stack([np.ones(len(p.t)), p.X])) == p.X.shape[1] + 1


def test_infinite_values_rejected():
    df = invented().astype({"age": float})
    df.loc[[3, 7], "age"] = [np.inf, -np.inf]
    with pytest.raises(InputError, match=r"`covariates` column 'age' has 2 infinite value"):
        prepare(df, exposure="shift", outcome="sbp", covariates=["age"])
    df = invented()
    df.loc[5, "sbp"] = np.inf
    with pytest.raises(InputError, match=r"`outcome` column 'sbp' has 1 infinite"):
        prepare(df, exposure="shift", outcome="sbp", covariates=["age"])


# -------------------------------------------------------------------------------- formula
def test_formula_design_matches_direct_computation():
    df = invented()
    p = prepare(df, exposure="shift", outcome="sbp", covariates=None,
                formula="age + I(age**2) + C(site) + smoker + age:smoker")
    assert "Intercept" not in p.design_names
    assert p.design_names == ["age", "I(age ** 2)", "C(site)[T.north]", "C(site)[T.south]", "smoker", "age:smoker"]
    raw = p.raw
    expected = np.column_stack([raw["age"], raw["age"] ** 2, raw["site"] == "north", raw["site"] == "south",
                                raw["smoker"], raw["age"] * raw["smoker"]]).astype(float)
    np.testing.assert_allclose(p.X, expected, rtol=1e-12)
    assert p.covariates == ["age", "site", "smoker"]
    kinds = [(t.name, t.kind, t.column, t.level) for t in p.terms]
    assert kinds[2] == ("C(site)[T.north]", "binary", 2, "north") and kinds[1][1] == "continuous"
    assert len(p.terms) == p.X.shape[1]


def test_formula_splines_and_options():
    df = invented()
    p = prepare(df, exposure="shift", outcome="sbp", covariates=["age"], formula="~ bs(age, df=3) + smoker")
    assert p.X.shape[1] == 4 and p.covariates == ["age", "smoker"]
    with pytest.raises(InputError, match="`covariates` names 'site', which the `formula` does not use"):
        prepare(df, exposure="shift", outcome="sbp", covariates=["site"], formula="age")
    with pytest.raises(InputError, match="takes only the right-hand side"):
        prepare(df, exposure="shift", outcome="sbp", covariates=None, formula="sbp ~ age")
    with pytest.raises(InputError, match=r"`formula`: column 'agee' is not in the table; did you mean 'age'"):
        prepare(df, exposure="shift", outcome="sbp", covariates=None, formula="I(agee**2) + site")
    with pytest.raises(InputError, match="`formula` could not be parsed"):
        prepare(df, exposure="shift", outcome="sbp", covariates=None, formula="age + (")
    with pytest.raises(InputError, match=r"design column 'np.log\(smoker\)' has \d+ non-finite"):
        prepare(df, exposure="shift", outcome="sbp", covariates=None, formula="age + np.log(smoker)")


# --------------------------------------------------------------------------------- missing
def with_gaps():
    df = invented().astype({"age": float, "shift": float})
    df.loc[[0, 1, 2], "age"] = np.nan
    df.loc[[2, 3], "site"] = None
    df.loc[[4], "shift"] = np.nan
    df.loc[[5, 6], "sbp"] = np.nan
    return df


def test_missing_drop_counts():
    df = with_gaps()
    p = quiet_prepare(df, exposure="shift", outcome="sbp", covariates=["age", "site"])
    f = p.flow
    assert f.rows_read == 200 and f.rows_used == 200 - 7
    assert f.dropped_missing_by_column == {"shift": 1, "sbp": 2, "age": 3, "site": 2}  # row 2 in both
    dropped_rows = df.loc[[0, 1, 2, 3, 5, 6], "shift"]
    assert f.dropped_missing_by_group == {"exposed": int((dropped_rows == 1).sum()),
                                          "reference": int((dropped_rows == 0).sum()), "unknown": 1}
    assert sum(f.dropped_missing_by_group.values()) == 7
    n1 = int((df["shift"] == 1).sum())
    m1 = int(df.loc[[5, 6], "shift"].eq(1).sum())
    assert f.missing_outcome_by_group["exposed"] == {"n": m1, "share": m1 / n1}
    assert f.used_by_group["exposed"] + f.used_by_group["reference"] == f.rows_used
    json.dumps(f.to_dict())


def test_missing_error_policy():
    with pytest.raises(InputError, match=r"`missing=error`: covariates have missing values \('age': 3, 'site': 2\)"):
        prepare(with_gaps(), exposure="shift", outcome="sbp", covariates=["age", "site"], missing="error")


def test_missing_indicator_policy():
    df = with_gaps()
    with pytest.warns(MissingDataWarning, match="Groenwold et al. 2012, CMAJ"):
        p = prepare(df, exposure="shift", outcome="sbp", covariates=["age", "site"], missing="indicator",
                    terms="linear")
    assert p.flow.rows_used == 200 - 3  # only exposure/outcome missing rows dropped
    assert p.flow.dropped_missing_by_column == {"shift": 1, "sbp": 2}
    assert p.design_names == ["age", "age: (missing)", "site: east", "site: north", "site: south"]
    assert p.reference_levels == {"site": "(missing)"}
    miss = p.raw["age"].isna().to_numpy()
    assert miss.sum() == 3 and np.array_equal(p.X[:, 1], miss.astype(float)) and np.all(p.X[miss, 0] == 0)
    q = quiet_prepare(df, exposure="shift", outcome="sbp", covariates=None, missing="indicator",
                      formula="age + C(site)")
    assert "age__missing" in q.design_names and "C(site)[T.south]" in q.design_names


def test_missing_outcome_share_warning_and_censoring_weights():
    import statsmodels.api as sm

    df = invented(2000, seed=4)
    rng = np.random.default_rng(5)
    lost = rng.random(2000) < np.where(df["shift"] == 1, 0.20, 0.05)
    df.loc[lost, "sbp"] = np.nan
    with pytest.warns(MissingDataWarning, match="complete-case analysis may be biased.*censoring_weights"):
        # terms="linear": the reference below is the linear logistic model
        p = prepare(df, exposure="shift", outcome="sbp", covariates=["age", "smoker"], censoring_weights=True,
                    terms="linear")
    assert p.flow.missing_outcome_p_value < 1e-6
    # Independent IPCW (Hernán & Robins 2020, What If §12.6): logistic model of observed ~ L + A.
    Z = sm.add_constant(df[["age", "smoker", "shift"]].to_numpy(float))
    fit = sm.GLM((~lost).astype(float), Z, family=sm.families.Binomial()).fit()
    w = 1 / fit.predict(Z)
    expected = pd.Series(w[~lost], index=np.flatnonzero(~lost))
    np.testing.assert_allclose(p.censoring_weights, expected.loc[p.row_ids].to_numpy(), rtol=1e-8)
    direct = observed_weights(df[["age", "smoker"]].to_numpy(float), df["shift"].to_numpy(), ~lost)
    np.testing.assert_allclose(direct[~lost], w[~lost], rtol=1e-8)
    assert np.all(direct[lost] == 0)


def test_no_missing_outcome_warning_when_shares_equal():
    df = invented(400)
    idx = np.r_[np.flatnonzero(df["shift"] == 1)[:4], np.flatnonzero(df["shift"] == 0)[:5]]
    df.loc[idx, "sbp"] = np.nan
    with warnings.catch_warnings():
        warnings.simplefilter("error", MissingDataWarning)
        p = prepare(df, exposure="shift", outcome="sbp", covariates=["age"])
    assert p.censoring_weights is None


def test_nothing_left_names_columns():
    df = invented().astype({"age": float})
    df["age"] = np.nan
    with pytest.raises(InputError, match=r"no rows are left.*'age' \(200 rows\)"):
        prepare(df, exposure="shift", outcome="sbp", covariates=["age", "site"])


# ---------------------------------------------------------------------- strata, negative control
def test_user_strata_and_negative_control():
    df = invented()
    df["pair"] = np.arange(200) // 4 * 10
    df.loc[0, "pair"] = np.nan
    df["nc"] = np.arange(200.0)
    df.loc[[10, 11], "nc"] = np.nan
    p = quiet_prepare(df, exposure="shift", outcome="sbp", covariates=["age"], strata_column="pair",
                      negative_control="nc")
    assert p.flow.rows_used == 199 and p.flow.dropped_missing_by_column["pair"] == 1
    assert p.user_strata.dtype == np.int64 and p.user_strata.max() == 49
    np.testing.assert_array_equal(p.user_strata, p.raw["pair"].to_numpy() // 10)
    assert p.strata_levels[:3] == ["0", "10", "20"]
    assert np.isnan(p.negative_control).sum() == 2 and p.flow.negative_control_missing == 2
    np.testing.assert_array_equal(p.negative_control, p.raw["nc"].to_numpy(float))


# --------------------------------------------------------------------------- canonical order
@settings(max_examples=20, deadline=None)
@given(st.permutations(list(range(60))))
def test_row_order_invariance(perm):
    df = with_gaps().iloc[:60].copy()
    df.loc[10:13, "age"] = 50.0  # ties in a covariate
    kw = dict(exposure="shift", outcome="sbp", covariates=["age", "site", "smoker"], missing="indicator",
              censoring_weights=True)
    a = quiet_prepare(df, **kw)
    b = quiet_prepare(df.iloc[perm].reset_index(drop=True), **kw)
    for name in ("t", "y", "X", "censoring_weights"):
        np.testing.assert_array_equal(getattr(a, name), getattr(b, name))
    pd.testing.assert_frame_equal(a.raw, b.raw)
    assert a.to_dict() == b.to_dict()
    np.testing.assert_array_equal(np.asarray(perm)[b.row_ids], a.row_ids)


def test_result_types_and_json():
    p = quiet_prepare(with_gaps(), exposure="shift", outcome="sbp", covariates=["age", "site"])
    assert isinstance(p, PreparedData) and isinstance(p.flow, Flow)
    assert all(isinstance(t, BalanceTerm) for t in p.terms)
    d = json.loads(json.dumps(p.to_dict()))
    assert d["flow"]["rows_used"] == p.flow.rows_used and d["terms"][0]["name"] == "age"
    assert p.X.dtype == np.float64 and p.X.flags.c_contiguous and p.X.shape == (len(p.t), len(p.design_names))


def test_negative_control_and_strata_checks():
    df = invented()
    with pytest.raises(InputError, match="`negative_control` column 'site' is not numeric"):
        prepare(df, exposure="shift", outcome="sbp", covariates=["age"], negative_control="site")
    with pytest.raises(InputError, match="`negative_control` 'age' is also the exposure, outcome or a covariate"):
        prepare(df, exposure="shift", outcome="sbp", covariates=["age"], negative_control="age")
    with pytest.raises(InputError, match="`strata_column` 'shift' is also"):
        prepare(df, exposure="shift", outcome="sbp", covariates=["age"], strata_column="shift")


def test_categorical_columns_with_unused_categories():
    """Stata value labels arrive as categoricals that may list categories no row uses."""
    df = invented()
    df["grp"] = pd.Categorical(np.where(df["shift"] == 1, "night", "day"), categories=["day", "night", "rotating"])
    p = prepare(df, exposure="grp", outcome="sbp", covariates=["age"], exposed_value="night")
    assert p.exposure_levels == {"exposed": "night", "reference": "day"}
    df["hyp"] = pd.Categorical(np.where(df["sbp"] > 125, "yes", "no"), categories=["no", "yes", "unsure"])
    p = prepare(df, exposure="shift", outcome="hyp", covariates=["age"], outcome_event="yes")
    assert p.outcome_type == "binary" and p.y.sum() == (df["sbp"] > 125).sum()


def test_formula_design_row_order_invariant():
    df = invented(300, seed=8)
    perm = np.random.default_rng(9).permutation(300)
    kw = dict(exposure="shift", outcome="sbp", covariates=None, formula="bs(age, df=4) + C(site) + smoker:age")
    a = prepare(df, **kw)
    b = prepare(df.iloc[perm], **kw)
    np.testing.assert_array_equal(a.X, b.X)
    np.testing.assert_array_equal(a.y, b.y)
    assert a.design_names == b.design_names and a.to_dict() == b.to_dict()


def test_observed_weights_separation_falls_back_with_warning():
    rng = np.random.default_rng(0)
    x = rng.normal(size=200)
    observed = x > -1  # missingness perfectly predicted by x: the ML fit does not exist
    with pytest.warns(MissingDataWarning, match="separated or did not converge; a ridge-penalized fit"):
        w = observed_weights(x[:, None], rng.integers(0, 2, 200), observed)
    assert np.all(np.isfinite(w)) and np.all(w[observed] >= 1.0) and np.all(w[~observed] == 0)
    assert np.array_equal(observed_weights(x[:, None], np.zeros(200), np.ones(200, bool)), np.ones(200))


def test_identifier_like_numbers_warn():
    """Integer, unique per row, and monotone in the file's order or named like an identifier."""
    rng = np.random.default_rng(3)
    df = invented()
    n = len(df)
    gaps = np.cumsum(rng.integers(1, 40, size=n)) + 21000  # survey record numbers with gaps
    cases = {"serial": gaps,  # monotone in file order, not consecutive
             "seqn": rng.permutation(gaps),  # shuffled, but named like one
             "ticket": np.arange(n) * 3 + 7}  # evenly spaced: monotone in file order
    for name, values in cases.items():
        frame = df.assign(**{name: values})
        with pytest.warns(DataWarning, match=f"'{name}' looks like a row identifier"):
            prepare(frame, exposure="shift", outcome="sbp", covariates=["age", name])
    # a real measurement: integer-valued, unique, but neither ordered nor named like an id
    frame = df.assign(income=rng.permutation(gaps))
    with warnings.catch_warnings():
        warnings.simplefilter("error", DataWarning)
        prepare(frame, exposure="shift", outcome="sbp", covariates=["age", "income"])
