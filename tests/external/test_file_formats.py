"""File formats written by other libraries, and the NHEFS open data (causaldata).

The same invented table is written as CSV (pandas), Parquet (pyarrow), Stata .dta
(``DataFrame.to_stata``) and SAS transport .xpt (pyreadstat, the test extra); ``read_table``
must return the same values from each.
"""

import warnings

import numpy as np
import pandas as pd
import pytest

from stratagap.errors import InputError
from stratagap.data import prepare, read_table


def invented_table():
    """Invented: a small clinic extract (exposure, outcome, a numeric and a text covariate)."""
    return pd.DataFrame({
        "treat": [0, 1, 1, 0, 1, 0, 0, 1],
        "sbp": [121.5, 130.25, 118.0, 140.75, 125.5, 119.0, 133.5, 128.0],
        "age": [41.0, 55.0, 62.0, 38.0, 47.0, 59.0, 44.0, 51.0],
        "clinic": ["north", "east", "east", "south", "north", "south", "east", "north"],
    })


def write(df, path):
    suffix = path.suffix
    if suffix == ".csv":
        df.to_csv(path, index=False)
    elif suffix == ".parquet":
        df.to_parquet(path, engine="pyarrow", index=False)
    elif suffix == ".dta":
        df.to_stata(path, write_index=False)
    elif suffix == ".xpt":
        import pyreadstat

        pyreadstat.write_xport(df, str(path), file_format_version=5)  # the version pandas reads
    return path


@pytest.mark.parametrize("suffix", [".csv", ".parquet", ".dta", ".xpt"])
def test_same_values_from_every_format(tmp_path, suffix):
    df = invented_table()
    got = read_table(write(df, tmp_path / f"clinic{suffix}"))
    assert list(got.columns) == list(df.columns)
    for col in ("treat", "sbp", "age"):
        np.testing.assert_array_equal(got[col].to_numpy(dtype=float), df[col].to_numpy(dtype=float))
    assert [str(v).strip() for v in got["clinic"]] == df["clinic"].tolist()


@pytest.mark.parametrize("suffix", [".csv", ".parquet", ".dta", ".xpt"])
def test_prepare_same_from_every_format(tmp_path, suffix):
    df = invented_table()
    ref = prepare(df, exposure="treat", outcome="sbp", covariates=["age", "clinic"])
    got = read_table(write(df, tmp_path / f"clinic{suffix}"))
    got["clinic"] = got["clinic"].astype(str).str.strip()
    p = prepare(got, exposure="treat", outcome="sbp", covariates=["age", "clinic"])
    np.testing.assert_array_equal(p.X, ref.X)
    np.testing.assert_array_equal(p.y, ref.y)
    np.testing.assert_array_equal(p.t, ref.t)
    assert p.design_names == ref.design_names


def test_xport_zero_and_missing_values(tmp_path):
    """pandas decodes an IBM-float zero as 16**-65; read_table must give exact zeros and NaN."""
    import pyreadstat

    df = pd.DataFrame({"flag": [0.0, 1.0, 0.0, 1.0], "dose": [0.0, np.nan, 2.5, -0.0]})
    path = tmp_path / "zeros.xpt"
    pyreadstat.write_xport(df, str(path), file_format_version=5)
    got = read_table(path)
    np.testing.assert_array_equal(got["flag"].to_numpy(), [0.0, 1.0, 0.0, 1.0])
    np.testing.assert_array_equal(got["dose"].to_numpy(), [0.0, np.nan, 2.5, 0.0])


def test_xport_version8_read_with_pyreadstat(tmp_path):
    df = invented_table()
    path = tmp_path / "v8.xpt"
    import pyreadstat

    pyreadstat.write_xport(df, str(path), file_format_version=8)
    got = read_table(path)
    np.testing.assert_array_equal(got["sbp"].to_numpy(float), df["sbp"].to_numpy(float))
    assert got["clinic"].tolist() == df["clinic"].tolist()


def test_csv_disguised_as_parquet(tmp_path):
    path = tmp_path / "extract.parquet"
    invented_table().to_csv(path, index=False)
    with pytest.raises(InputError, match=r"'.*extract\.parquet' is named \.parquet but its content is CSV/text"):
        read_table(path)


def test_stata_disguised_as_csv(tmp_path):
    path = tmp_path / "extract.csv"
    invented_table().to_stata(path, write_index=False)
    with pytest.raises(InputError, match=r"named \.csv but its content is Stata \.dta"):
        read_table(path)


# NHEFS, Hernán & Robins, Causal Inference: What If, ch. 12 (propensity model of §12.1/Program 12.2).
WHAT_IF_CH12 = ("sex + race + age + I(age**2) + C(education) + smokeintensity + I(smokeintensity**2)"
                " + smokeyrs + I(smokeyrs**2) + C(exercise) + C(active) + wt71 + I(wt71**2)")


@pytest.fixture(scope="module")
def nhefs():
    from causaldata import nhefs

    return nhefs.load_pandas().data


def test_nhefs_flow_and_crude(nhefs):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        p = prepare(nhefs, exposure="qsmk", outcome="wt82_71", covariates=None, formula=WHAT_IF_CH12)
    # What If ch. 12 (from memory): 1,566 individuals with known weight change (1,629 in NHEFS).
    assert p.flow.rows_read == 1629 and p.flow.rows_used == 1566
    assert p.flow.dropped_missing_by_column["wt82_71"] == 63
    # The crude difference of means, computed independently with pandas (What If §12.1: 2.5 kg).
    cc = nhefs.dropna(subset=["wt82_71"])
    means = cc.groupby("qsmk")["wt82_71"].mean()
    crude = means.loc[1.0] - means.loc[0.0]
    assert abs(crude - 2.54) < 0.005
    got = p.y[p.t == 1].mean() - p.y[p.t == 0].mean()
    assert abs(got - crude) < 1e-10
    assert p.flow.used_by_group == {"exposed": int((cc["qsmk"] == 1).sum()), "reference": int((cc["qsmk"] == 0).sum())}
    # The design: 18 columns (4 + 2 + 2 dummies for the 5- and 3-level factors, 10 others), no intercept.
    assert p.X.shape == (1566, 18) and "Intercept" not in p.design_names
    raw = p.raw
    np.testing.assert_allclose(p.X[:, p.design_names.index("I(age ** 2)")], raw["age"] ** 2, rtol=1e-12)
    np.testing.assert_array_equal(p.X[:, p.design_names.index("C(education)[T.5]")],
                                  (raw["education"].astype(str) == "5").to_numpy(float))
    assert p.outcome_type == "continuous" and p.exposure_levels == {"exposed": "1", "reference": "0"}
    # NHEFS's outcome is missing more often among quitters (What If §12.6 motivates IPCW).
    share = nhefs.groupby("qsmk")["wt82_71"].apply(lambda s: s.isna().mean())
    assert abs(p.flow.missing_outcome_by_group["exposed"]["share"] - share.loc[1.0]) < 1e-12
