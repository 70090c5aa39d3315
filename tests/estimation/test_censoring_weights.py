"""The `censoring_weights` option: complete cases weighted by 1 / P(outcome observed).

Checked against statsmodels: the weights' logistic model (Logit of observed on [1, X, t]), the
exposure model (Logit of t on [1, X]) on every row with complete covariates, and a
weighted least-squares fit of y on [1, t] with the combined weights, whose HC0 sandwich is the
variance of a difference of two Hájek means with the weights treated as known (What If §12.6
uses this robust-variance practice; from memory).
"""

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

import stratagap


def _data(seed=8, n=3000):
    rng = np.random.default_rng(seed)
    x = rng.normal(size=n)
    t = (rng.random(n) < 1 / (1 + np.exp(-0.7 * x))).astype(int)
    y = 1.0 + x + 2.0 * t + rng.normal(size=n)
    observed = rng.random(n) < 1 / (1 + np.exp(-(1.2 - 0.8 * x - 0.8 * t)))  # MAR on x and t
    return pd.DataFrame({"t": t, "x": x, "y": np.where(observed, y, np.nan)})


def test_censoring_weighted_row_matches_statsmodels():
    d = _data()
    # terms="linear": the reference below is the linear logistic model of Hernán & Robins
    res = stratagap.analyze(d, exposure="t", outcome="y", covariates=["x"], resamples=99,
                            censoring_weights=True, engine="normal", terms="linear")
    row = next(r for r in res.to_dict()["cross_checks"] if "censoring" in r["method"])

    full = d.assign(obs=d["y"].notna().astype(int))
    design = sm.add_constant(full[["x", "t"]].to_numpy(float))
    p_obs = sm.Logit(full["obs"].to_numpy(), design).fit(disp=0).predict(design)
    observed = full["obs"].to_numpy() == 1
    cc = full[observed].copy()
    cc["wc"] = 1 / p_obs[observed]
    # the exposure model on every row with complete covariates, censored ones included
    Xall = sm.add_constant(full[["x"]].to_numpy(float))
    e = sm.Logit(full["t"].to_numpy(), Xall).fit(disp=0).predict(Xall)[observed]
    w = np.where(cc["t"] == 1, 1 / e, 1 / (1 - e)) * cc["wc"].to_numpy()
    wls = sm.WLS(cc["y"].to_numpy(), sm.add_constant(cc[["t"]].to_numpy(float)),
                 weights=w).fit(cov_type="HC0")
    assert row["estimate"] == pytest.approx(wls.params[1], rel=1e-8)
    assert row["se"] == pytest.approx(wls.bse[1], rel=1e-6)
    assert any(w["kind"] == "MissingDataWarning" for w in res.to_dict()["warnings"])


def test_without_the_option_there_is_no_censoring_row():
    res = stratagap.analyze(_data(), exposure="t", outcome="y", covariates=["x"], resamples=99,
                            engine="normal")
    assert not any("censoring" in r["method"] for r in res.to_dict()["cross_checks"])
