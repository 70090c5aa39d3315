"""Balance statistics against reference libraries (scipy, statsmodels).

* KS before adjustment: scipy.stats.ks_2samp statistic (two-sample Kolmogorov-Smirnov distance).
* KS after adjustment with integer weights: a weighted ECDF with integer weights is the ECDF of
  the sample with each unit repeated that many times, so ks_2samp on the expanded samples is an
  independent reference.
* Weighted means after adjustment: statsmodels DescrStatsW.
"""

from dataclasses import dataclass

import numpy as np
import pytest
from scipy.stats import ks_2samp
from statsmodels.stats.weightstats import DescrStatsW

from stratagap.stratify.balance import balance_table

# Arbitrary weights leave the terms imbalanced; that warning is not what is checked here.
pytestmark = pytest.mark.filterwarnings("ignore::stratagap.errors.BalanceWarning")


@dataclass
class Term:
    name: str
    covariate: str
    level: object
    kind: str
    column: int | None = None
    values: np.ndarray | None = None


def sample(n=800, seed=3):
    rng = np.random.default_rng(seed)
    t = (rng.random(n) < 0.4).astype(np.int8)
    cont = rng.gamma(2.0, 1.0, n) + 0.5 * t
    counts = rng.poisson(2.0 + t, n).astype(float)  # many ties
    dummy = (rng.random(n) < 0.3 + 0.2 * t).astype(float)
    X = np.column_stack([cont, counts, dummy])
    terms = [Term("cont", "cont", None, "continuous", column=0),
             Term("counts", "counts", None, "continuous", column=1),
             Term("dummy", "dummy", "1", "binary", column=2)]
    return X, t, terms


def test_ks_before_matches_scipy():
    X, t, terms = sample()
    res = balance_table(X, t, terms)
    for j, row in enumerate(res.rows):
        ref = ks_2samp(X[t == 1, j], X[t == 0, j]).statistic
        assert row["ks_before"] == pytest.approx(ref, abs=1e-12)


def test_weighted_ks_matches_scipy_on_expanded_samples():
    X, t, terms = sample(n=300)
    w = np.random.default_rng(9).integers(1, 5, t.size).astype(float)
    res = balance_table(X, t, terms, weights_after=w)
    reps = w.astype(int)
    for j, row in enumerate(res.rows):
        x1 = np.repeat(X[t == 1, j], reps[t == 1])
        x0 = np.repeat(X[t == 0, j], reps[t == 0])
        assert row["ks_after"] == pytest.approx(ks_2samp(x1, x0).statistic, abs=1e-12)


def test_weighted_means_match_statsmodels():
    X, t, terms = sample()
    w = np.random.default_rng(2).uniform(0.1, 3.0, t.size)
    res = balance_table(X, t, terms, weights_after=w)
    for j, row in enumerate(res.rows):
        m1 = DescrStatsW(X[t == 1, j], weights=w[t == 1]).mean
        m0 = DescrStatsW(X[t == 0, j], weights=w[t == 0]).mean
        x1, x0 = X[t == 1, j], X[t == 0, j]
        if row["kind"] == "continuous":
            denom = np.sqrt((x1.var(ddof=1) + x0.var(ddof=1)) / 2)  # Austin 2009, eq. 1
        else:
            p1, p0 = x1.mean(), x0.mean()
            denom = np.sqrt((p1 * (1 - p1) + p0 * (1 - p0)) / 2)  # Austin 2009, eq. 2
        # Stuart 2010: after adjustment, the before-adjustment denominator
        assert row["smd_after"] == pytest.approx((m1 - m0) / denom, rel=1e-10)
