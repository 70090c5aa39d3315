"""Tests of stratagap.sensitivity.negative_control: the residual-bias check on a negative-control
outcome (Lipsitch, Tchetgen Tchetgen & Cohen 2010)."""

import json

import numpy as np
import pytest

from stratagap.errors import InputError
from stratagap.estimation.effects import stratified_regression
from stratagap.inference.permutation import residualize, stratified_test
from stratagap.sensitivity.negative_control import NegativeControl, negative_control_check

OPTIONS = dict(names=["x"], estimand="ate", alpha=0.05, engine="auto", resamples=499, seed=9,
               batch_size=None, interaction_min_extra=10)


def _rows(n=240, seed=1):
    rng = np.random.default_rng(seed)
    labels = np.repeat(np.arange(4), n // 4).astype(np.int64)
    x = rng.normal(size=n) + labels
    t = (rng.random(n) < 0.4 + 0.05 * labels).astype(np.int8)
    nc = 0.8 * x + rng.normal(size=n)  # depends on the covariate only: no exposure effect
    return nc, t, x[:, None], labels


def test_check_is_the_residualized_test_and_the_regression_on_recorded_rows():
    nc, t, X, labels = _rows()
    nc[[3, 50, 100]] = np.nan
    out = negative_control_check(nc, t, X, labels, column="nc", **OPTIONS)
    ok = np.isfinite(nc)
    assert isinstance(out, NegativeControl) and out.n == int(ok.sum()) == len(nc) - 3
    # the same stages called directly on the recorded rows give the same numbers
    test = stratified_test(residualize(nc[ok], X[ok], labels[ok]), t[ok], labels[ok],
                           estimand="ate", alternative="two-sided", engine="auto", resamples=499,
                           seed=9)
    est = stratified_regression(nc[ok], t[ok], X[ok], labels[ok], estimand="ate",
                                measure="difference", alpha=0.05, interaction_min_extra=10,
                                names=["x"])
    assert out.test.p_value == test.p_value and out.test.statistic == test.statistic
    assert out.estimate.estimate == est.estimate and out.estimate.se == est.se
    assert out.alarm == (test.p_value < 0.05)
    assert out.test.alternative == "two-sided"


def test_round_trip_and_declared_keys():
    nc, t, X, labels = _rows()
    out = negative_control_check(nc, t, X, labels, column="nc", **OPTIONS)
    d = out.to_dict()
    assert json.loads(json.dumps(d, allow_nan=False)) == d
    assert list(d) == ["column", "n", "estimate", "test", "alarm"]


def test_fewer_than_four_recorded_values_is_an_input_error():
    nc, t, X, labels = _rows()
    nc[3:] = np.nan
    with pytest.raises(InputError, match="'nc' has fewer than 4 non-missing values"):
        negative_control_check(nc, t, X, labels, column="nc", **OPTIONS)
