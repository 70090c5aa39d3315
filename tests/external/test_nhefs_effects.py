"""NHEFS (causaldata; Hernán & Robins, Causal Inference: What If): effect estimates.

The 1,566 people with a recorded weight change (wt82_71), quitting smoking (qsmk) as the
exposure, the book's ch. 12 propensity model (sex, race, age, age^2, education (5 levels),
smokeintensity, smokeintensity^2, smokeyrs, smokeyrs^2, exercise (3), active (3), wt71, wt71^2)
fitted here with statsmodels, quintile strata of the score computed here with pandas.

Published values (What If, from memory): crude 2.5 kg (95 % CI 1.7-3.4, §12.1); IP weighting
3.4 kg (2.4-4.5, §12.2); standardization 3.5 kg (2.6-4.5, §13.3). Checks: crude to the data's
own value (2.54), the stratified-regression ATE inside [3.0, 4.0], and every estimate equal to
an independent statsmodels/pandas computation of the same estimator to 1e-8.
"""

import math
import warnings

import numpy as np
import pandas as pd
import pytest

import statsmodels.api as sm  # a hard dependency; causaldata is in the test extras

from _what_if_design import what_if_covariates
from stratagap.estimation import effects


@pytest.fixture(scope="module")
def nhefs():
    from causaldata import nhefs as source

    d = source.load_pandas().data
    d = d[d["wt82_71"].notna()].reset_index(drop=True)
    X = what_if_covariates(d)
    t = d["qsmk"].to_numpy().astype(np.int8)
    y = d["wt82_71"].to_numpy(dtype=float)
    design = sm.add_constant(X)
    score = sm.GLM(t, design, family=sm.families.Binomial()).fit().predict(design).to_numpy()
    labels = pd.qcut(score, 5, labels=False).astype(np.int64)  # pooled quintiles of the score
    return {"y": y, "t": t, "X": X, "labels": labels}


def test_sample_and_crude(nhefs):
    y, t = nhefs["y"], nhefs["t"]
    assert len(y) == 1566 and nhefs["X"].shape[1] == 18
    crude = effects.crude(y, t, "continuous")
    assert crude.estimate == pytest.approx(2.5406, abs=5e-5)  # the data's own value, 2.54
    ols = sm.OLS(y, sm.add_constant(t.astype(float))).fit()  # same difference by OLS
    assert crude.estimate == pytest.approx(ols.params[1], abs=1e-10)
    # What If §12.1 (from memory): 95 % CI 1.7-3.4 (model-based SE); ours is Welch's interval,
    # a little wider because the quitters' weight change is more variable.
    assert 1.4 < crude.ci_low < 1.8 and 3.3 < crude.ci_high < 3.6


def _documented_model(t, X, m, estimand, min_extra=2):
    """The per-stratum model the documentation prescribes, decided here (not by the package).

    docs/methods.md and ``stratagap.estimation._within_strata``: drop covariates constant in the
    stratum or constant except for one unit; drop a column that is a linear combination of the
    constant, the exposure and the columns kept before it; then the first estimable model of
    interactions (each group >= p + min_extra units), main effects, difference of means, where
    estimable means full column rank and every leverage below 1. Interactions are restricted to
    the columns each group can estimate (two values or more in each group, not a single odd
    unit, the interaction not a combination of earlier columns; "partial interactions" when
    some are left out) and skipped when the effect's design variance exceeds 4 times that of
    main effects. Rank and leverage are computed here with numpy's SVD-based ``matrix_rank``
    and the explicit hat matrix. Returns ``(model, columns, interacted columns)``.
    """
    Xs = X.loc[m]
    ts = t[m].astype(float)
    n, n1 = int(m.sum()), int(ts.sum())
    varying = []
    for col in Xs.columns:
        counts = Xs[col].value_counts()
        if len(counts) == 1 or (len(counts) == 2 and counts.min() == 1 and n > 2):
            continue
        varying.append(col)
    centre = Xs.mean() if estimand == "ate" else Xs[ts == 1].mean()
    Xc = Xs - centre
    kept = []
    for col in varying:
        D = np.column_stack([np.ones(n), ts, Xc[kept + [col]].to_numpy()])
        if np.linalg.matrix_rank(D) == D.shape[1]:
            kept.append(col)
    p = len(kept)
    ladder = (["interactions"] if p and min(n1, n - n1) >= p + min_extra else []) + (
        ["main effects"] if p else [])
    Z = Xc[kept].to_numpy()
    for model in ladder:
        inter = []
        if model == "interactions":
            # interacted: columns with >= 2 values in each group, neither a single odd unit,
            # whose interaction is not a combination of the columns before it
            for j, col in enumerate(kept):
                counts = [Xs.loc[ts == g, col].value_counts() for g in (1, 0)]
                if any(len(c) == 1 or (len(c) == 2 and c.min() == 1) for c in counts):
                    continue
                D = np.column_stack([np.ones(n), ts, Z, ts[:, None] * Z[:, inter + [j]]])
                if np.linalg.matrix_rank(D) == D.shape[1]:
                    inter.append(j)
            if not inter:
                continue
        D = np.column_stack([np.ones(n), ts, Z] + ([ts[:, None] * Z[:, inter]] if inter else []))
        if inter:  # design variance of the effect, at most 4 times that of main effects
            D0 = np.column_stack([np.ones(n), ts, Z])
            if np.linalg.inv(D.T @ D)[1, 1] > 4 * np.linalg.inv(D0.T @ D0)[1, 1]:
                continue
        if np.linalg.matrix_rank(D) < D.shape[1]:
            continue
        leverage = np.diag(D @ np.linalg.inv(D.T @ D) @ D.T)
        if leverage.max() < 1 - 1e-10:
            name = model if len(inter) in (0, p) else "partial interactions"
            return name, kept, [kept[j] for j in inter]
    return "difference of means", [], []


def _independent_stratum(y, t, X, m, estimand, model, columns, interacted):
    """statsmodels OLS + HC2 of one stratum, design built here from the named columns."""
    ts = t[m].astype(float)
    if model == "difference of means":  # Neyman variance (Imbens & Rubin 2015, ch. 6)
        y1, y0 = y[m][ts == 1], y[m][ts == 0]
        v = y1.var(ddof=1) / len(y1) + y0.var(ddof=1) / len(y0)
        return y0.mean(), y1.mean() - y0.mean(), np.array([[np.nan, np.nan], [np.nan, v]])
    Xs = X.loc[m, columns]
    centre = Xs.mean() if estimand == "ate" else Xs[t[m] == 1].mean()
    Xc = (Xs - centre).to_numpy()
    Xi = (Xs[interacted] - centre[interacted]).to_numpy()
    parts = [np.ones(m.sum()), ts, Xc] + ([ts[:, None] * Xi] if interacted else [])
    fit = sm.OLS(y[m], np.column_stack(parts)).fit(cov_type="HC2")
    return fit.params[0], fit.params[1], fit.cov_params()[:2, :2]


@pytest.mark.parametrize("estimand", ["ate", "att"])
def test_stratified_regression_against_statsmodels(nhefs, estimand):
    y, t, X, labels = nhefs["y"], nhefs["t"], nhefs["X"], nhefs["labels"]
    with warnings.catch_warnings(record=True):
        warnings.simplefilter("always")
        res = effects.stratified_regression(y, t, X.to_numpy(), labels, estimand=estimand,
                                            names=list(X.columns))
    if estimand == "ate":
        # What If §12.2 / §13.3 (from memory): IP weighting 3.4, standardization 3.5 kg
        assert 3.0 <= res.estimate <= 4.0
    n = np.bincount(labels).astype(float)
    n1 = np.bincount(labels, weights=t)
    w = n / n.sum() if estimand == "ate" else n1 / n1.sum()
    tau, var = np.zeros(5), np.zeros(5)
    models = []
    for row in res.per_stratum:
        s = row["stratum"]
        m = labels == s
        # the model and columns are decided here by the documented rule, then compared
        model, columns, interacted = _documented_model(t, X, m, estimand)
        models.append(model)
        assert (row["model"], row["covariates"], row["interacted"]) == (
            model, columns, interacted), s
        a_s, tau[s], cov = _independent_stratum(y, t, X, m, estimand, model, columns, interacted)
        var[s] = cov[1, 1]
        assert row["estimate"] == pytest.approx(tau[s], abs=1e-8)
        assert row["se"] == pytest.approx(math.sqrt(var[s]), abs=1e-8)
        if model != "difference of means":
            assert row["reference_mean"] == pytest.approx(a_s, abs=1e-8)
    assert res.estimate == pytest.approx(np.sum(w * tau), abs=1e-8)
    assert res.se == pytest.approx(math.sqrt(np.sum(w ** 2 * var)), abs=1e-8)
    # expected on these data: the full model in at least three strata, a simpler one elsewhere
    assert models.count("interactions") >= 3 and len(set(models)) > 1


def test_plain_stratified_difference_against_pandas(nhefs):
    y, t, labels = nhefs["y"], nhefs["t"], nhefs["labels"]
    res = effects.plain_stratified_difference(y, t, labels, estimand="ate")
    df = pd.DataFrame({"y": y, "t": t, "s": labels})
    g = df.groupby(["s", "t"])["y"].agg(["mean", "var", "count"]).unstack("t")
    w = (g["count"][0] + g["count"][1]) / len(y)
    est = float((w * (g["mean"][1] - g["mean"][0])).sum())
    se = math.sqrt(float((w ** 2 * (g["var"][1] / g["count"][1]
                                    + g["var"][0] / g["count"][0])).sum()))
    assert res.estimate == pytest.approx(est, abs=1e-8)
    assert res.se == pytest.approx(se, abs=1e-8)


def test_constant_effect_against_statsmodels_residuals(nhefs):
    y, t, X, labels = nhefs["y"], nhefs["t"], nhefs["X"], nhefs["labels"]
    res = effects.constant_effect(y, t, X.to_numpy(), labels, estimand="ate", resamples=999,
                                  seed=2026)
    # independent: residuals from statsmodels OLS on X plus one dummy per stratum
    D = np.column_stack([X.to_numpy(), pd.get_dummies(labels).to_numpy(dtype=float)])
    r_y = sm.OLS(y, D).fit().resid
    r_t = sm.OLS(t.astype(float), D).fit().resid
    df = pd.DataFrame({"ry": r_y, "rt": r_t, "t": t, "s": labels})
    means = df.groupby(["s", "t"])[["ry", "rt"]].mean().unstack("t")
    w = np.bincount(labels) / len(y)
    T_y = float((w * (means["ry"][1] - means["ry"][0])).sum())
    T_t = float((w * (means["rt"][1] - means["rt"][0])).sum())
    assert res.estimate == pytest.approx(T_y / T_t, abs=1e-8)
    assert 3.0 <= res.estimate <= 4.0 and res.ci_low < res.estimate < res.ci_high
    assert res.is_interval and res.p_value_at_zero < 0.01
