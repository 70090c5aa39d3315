"""Shared Monte Carlo draws are an explicit object (stratagap.inference.draws), and the test
takes the stratum layout its caller built.

Sharing must change no bit: every comparison here is exact equality with a separate run.
"""

from __future__ import annotations

import numpy as np
import pytest

from stratagap._base.layout import StratumLayout
from stratagap.errors import InputError
from stratagap.estimation import effects as E
from stratagap.inference import permutation as P
from stratagap.inference._engines import monte_carlo as _mc


def _data(seed=0, n=800):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, 2))
    labels = rng.integers(0, 3, n)
    t = (rng.random(n) < 0.35).astype(np.int8)
    y = X @ [0.8, -0.3] + 0.3 * t + rng.normal(size=n)
    return y, t, X, labels


@pytest.fixture
def passes(monkeypatch):
    """Number of columns of each Monte Carlo pass over the permutations."""
    seen = []
    real = _mc.iter_batches
    monkeypatch.setattr(_mc, "iter_batches", lambda plan, *a, **k: (seen.append(plan.k),
                                                                     real(plan, *a, **k))[1])
    return seen


def test_draws_are_shared_only_by_the_calls_given_them(passes):
    y, t, X, labels = _data()
    kw = dict(estimand="ate", engine="monte_carlo", resamples=400, seed=3)
    draws = P.shared_draws(t, labels, columns=[y])
    alone = P.stratified_test(y, t, labels, **kw)
    again = P.stratified_test(y, t, labels, **kw)
    assert passes == [1, 1]  # an object that is not passed changes nothing
    first = P.stratified_test(y, t, labels, draws=draws, **kw)
    second = P.stratified_test(y, t, labels, draws=draws, **kw)
    other = P.stratified_test(y, t, labels, draws=P.shared_draws(), **kw)
    assert passes == [1, 1, 1, 1]  # one pass for the two calls given `draws`, one for `other`
    for r in (again, first, second, other):
        assert r.to_dict() == alone.to_dict()
        assert np.array_equal(r.null_distribution, alone.null_distribution)


def test_the_inversion_reuses_the_tests_draws_bit_for_bit(passes):
    y, t, X, labels = _data(1)
    r = P.residualize(y, X, labels)
    rt = P.residualize(t.astype(float), X, labels)
    kw = dict(estimand="att", resamples=300, seed=8, engine="monte_carlo")
    separate = E.constant_effect(y, t, X, labels, **kw)
    draws = P.shared_draws(t, labels, columns=[r, rt])
    P.stratified_test(r, t, labels, draws=draws, **kw)
    shared = E.constant_effect(y, t, X, labels, draws=draws, **kw)
    assert passes == [2, 2]  # the separate inversion, then one pass for test and inversion
    assert shared.to_dict() == separate.to_dict()


def test_a_given_layout_gives_the_same_bits_and_a_wrong_one_is_refused():
    y, t, X, labels = _data(2)
    kw = dict(engine="monte_carlo", resamples=200, seed=1)
    layout = StratumLayout.build(labels, t, "att")
    built = P.stratified_test(y, t, labels, estimand="att", **kw)
    given = P.stratified_test(y, t, labels, estimand="att", layout=layout, **kw)
    assert given.to_dict() == built.to_dict()
    with pytest.raises(InputError, match="`layout` must be the StratumLayout"):
        P.stratified_test(y, t, labels, estimand="ate", layout=layout, **kw)
    with pytest.raises(InputError, match="`layout` must be the StratumLayout"):
        P.stratified_test(y[:-5], t[:-5], labels[:-5], estimand="att", layout=layout, **kw)
    with pytest.raises(InputError, match="`layout` must be the StratumLayout"):
        E.constant_effect(y, t, X, labels, estimand="ate", layout=layout, **kw)
