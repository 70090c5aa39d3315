"""IP-weighted cross-checks of follow-up times.

Sources: the weighted Kaplan-Meier point estimate against statsmodels
``SurvfuncRight(freq_weights=)`` (Cole & Hernan 2004, eq. 1); the pooled logistic model fitted
on weighted counts against the same model fitted by statsmodels GLM on the expanded
person-interval table (What If sec. 17.2 and 17.4); the NHEFS figures are in
tests/external/test_nhefs_survival.py.
"""

import numpy as np
import pytest
import statsmodels.api as sm
from statsmodels.duration.survfunc import SurvfuncRight

from stratagap.estimation.survival import (ip_weights, pooled_logistic_risks,
                                           weighted_km_risks, weighting_cross_checks)


def _data(n=300, seed=3):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, 2))
    e = 1 / (1 + np.exp(-X[:, 0]))
    t = (rng.random(n) < e).astype(np.int8)
    ev = rng.exponential(1 / np.exp(0.5 * X[:, 0] + 0.3 * t))
    cens = rng.uniform(0.3, 3, n)
    return np.minimum(ev, cens), (ev <= cens).astype(float), t, X, e


def test_weighted_km_against_survfuncright():
    time, event, t, X, e = _data()
    w = ip_weights(e, t, "ate")
    r1, r0 = weighted_km_risks(time, event, t, w, 1.0)
    for g, r in ((1, r1), (0, r0)):
        sf = SurvfuncRight(time[t == g], event[t == g], freq_weights=w[t == g])
        k = np.searchsorted(sf.surv_times, 1.0, side="right") - 1
        assert r == pytest.approx(1 - sf.surv_prob[k], abs=1e-12)
    att = ip_weights(e, t, "att")
    assert np.all(att[t == 1] == 1) and np.allclose(att[t == 0], e[t == 0] / (1 - e[t == 0]))


def test_pooled_logistic_counts_against_expanded_table():
    time, event, t, X, e = _data()
    w = ip_weights(e, t, "ate")
    H, K = 2.0, 8
    r1, r0 = pooled_logistic_risks(time, event, t, w, H, K)
    width = H / K
    last = np.maximum(np.ceil(time / width).astype(int) - 1, 0)
    rows, ks, ds = [], [], []
    for i in range(time.size):  # the person-interval table, one row per interval at risk
        for k in range(min(last[i], K - 1) + 1):
            rows.append(i)
            ks.append(k)
            ds.append(float(event[i] == 1 and k == last[i]))
    rows, k, d = np.array(rows), np.array(ks, float), np.array(ds)
    a = t[rows].astype(float)
    Z = np.column_stack([np.ones_like(k), a, k, k**2, a * k, a * k**2])
    fit = sm.GLM(d, Z, family=sm.families.Binomial(), freq_weights=w[rows]).fit()
    for g, r in ((1.0, r1), (0.0, r0)):
        grid = np.arange(K, dtype=float)
        Zg = np.column_stack([np.ones(K), np.full(K, g), grid, grid**2, g * grid, g * grid**2])
        assert r == pytest.approx(1 - np.prod(1 - fit.predict(Zg)), abs=1e-8)


def test_cross_checks_seeded_and_cover_truth_roughly():
    time, event, t, X, e = _data(n=400)
    a = weighting_cross_checks(time, event, t, X, e, 1.0, estimand="ate", bootstrap=40, seed=5)
    b = weighting_cross_checks(time, event, t, X, e, 1.0, estimand="ate", bootstrap=40, seed=5)
    assert [r.to_dict() for r in a.rows] == [r.to_dict() for r in b.rows]
    assert len(a.rows) == 2 and all(r.se > 0 for r in a.rows)
    assert a.rows[0].ci_low < a.rows[0].estimate < a.rows[0].ci_high
