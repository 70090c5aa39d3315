"""The stratum layout (stratagap._base.layout): codes, sizes, estimand weights, unit weights.

Reference values are counted by hand on a table small enough to read, or computed
independently with pandas group-bys. The estimand weights are those of Imbens & Rubin (2015,
ch. 17; from memory): ATE n_s / n, ATT n1_s / n1.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings, strategies as st

from stratagap._base.layout import StratumLayout, stratum_codes
from stratagap.stratify.strata import stratum_weights, unit_weights

# two strata, labels 3 and 7: stratum 3 holds 3 units (1 exposed), stratum 7 holds 5 (2 exposed)
LABELS = np.array([7, 3, 7, 3, 7, 7, 3, 7])
T = np.array([1, 1, 0, 0, 0, 1, 0, 0], dtype=np.int8)


def test_counts_and_weights_by_hand():
    lay = StratumLayout.build(LABELS, T, "ate")
    assert lay.ids.tolist() == [3, 7] and lay.n_strata == 2 and lay.n_rows == 8
    assert lay.codes.tolist() == [1, 0, 1, 0, 1, 1, 0, 1]
    assert lay.n.tolist() == [3, 5] and lay.n1.tolist() == [1, 2] and lay.n0.tolist() == [2, 3]
    np.testing.assert_allclose(lay.weights, [3 / 8, 5 / 8], rtol=1e-15)  # n_s / n
    att = StratumLayout.build(LABELS, T, "att")
    np.testing.assert_allclose(att.weights, [1 / 3, 2 / 3], rtol=1e-15)  # n1_s / n1
    # unit weights: exposed w_s / n1_s, reference w_s / n0_s
    expected = {(3, 1): 3 / 8, (3, 0): 3 / 16, (7, 1): 5 / 16, (7, 0): 5 / 24}
    np.testing.assert_allclose(lay.unit_weights(T),
                               [expected[(s, int(e))] for s, e in zip(LABELS, T)], rtol=1e-15)


def test_an_unknown_estimand_is_refused():
    with pytest.raises(ValueError, match="estimand"):
        StratumLayout.build(LABELS, T, "atc")


def test_a_stratum_without_exposed_units_is_described_not_refused():
    lay = StratumLayout.build(np.array([0, 0, 1, 1]), np.array([1, 0, 0, 0]), "ate")
    assert lay.has_both_groups().tolist() == [True, False]
    assert lay.n1.tolist() == [1, 0]


def test_from_codes_equals_build_on_compact_labels():
    labels = np.array([0, 2, 1, 1, 0, 2, 2])
    t = np.array([1, 0, 1, 0, 0, 1, 0])
    a = StratumLayout.build(labels, t, "att")
    b = StratumLayout.from_codes(labels, t, "att")
    for name in ("ids", "codes", "n", "n1", "n0", "weights"):
        assert np.array_equal(getattr(a, name), getattr(b, name))


def test_stratum_codes_equal_numpy_unique_for_small_and_sparse_labels():
    rng = np.random.default_rng(0)
    for labels in (rng.integers(0, 6, 50), rng.integers(0, 10**9, 50), np.array([5, 5, 2])):
        ids, codes = stratum_codes(labels)
        u_ids, u_codes = np.unique(labels, return_inverse=True)
        assert np.array_equal(ids, u_ids) and np.array_equal(codes, u_codes)


@settings(max_examples=60, deadline=None)
@given(st.lists(st.tuples(st.integers(0, 4), st.integers(0, 1), st.floats(-50, 50)),
                min_size=2, max_size=40), st.sampled_from(["ate", "att"]))
def test_layout_agrees_with_pandas_group_sums(rows, estimand):
    frame = pd.DataFrame(rows, columns=["s", "t", "v"])
    if frame["t"].sum() == 0:
        frame.loc[0, "t"] = 1
    lay = StratumLayout.build(frame["s"].to_numpy(), frame["t"].to_numpy(), estimand)
    g = frame.groupby("s")
    assert lay.ids.tolist() == sorted(frame["s"].unique())
    np.testing.assert_array_equal(lay.n, g.size().to_numpy())
    np.testing.assert_array_equal(lay.n1, g["t"].sum().to_numpy())
    share = g.size() / len(frame) if estimand == "ate" else g["t"].sum() / frame["t"].sum()
    np.testing.assert_allclose(lay.weights, share.to_numpy(), rtol=1e-14)
    v = frame[["v"]].to_numpy()
    np.testing.assert_allclose(lay.totals(v)[0], g["v"].sum().to_numpy(), rtol=1e-12,
                               atol=1e-12)
    exposed = frame.assign(e=frame["v"] * frame["t"]).groupby("s")["e"].sum().to_numpy()
    np.testing.assert_allclose(lay.exposed_sums(v, frame["t"].to_numpy())[0], exposed,
                               rtol=1e-12, atol=1e-12)


def test_unit_weights_give_stratum_weighted_group_means():
    rng = np.random.default_rng(4)
    labels = rng.integers(0, 4, 300)
    t = (rng.random(300) < 0.4).astype(np.int8)
    y = rng.normal(size=300) + labels
    for estimand in ("ate", "att"):
        lay = StratumLayout.build(labels, t, estimand)
        u = lay.unit_weights(t)
        assert u[t == 1].sum() == pytest.approx(1, abs=1e-12)
        assert u[t == 0].sum() == pytest.approx(1, abs=1e-12)
        direct = sum(w * (y[(labels == s) & (t == 1)].mean() - y[(labels == s) & (t == 0)].mean())
                     for s, w in zip(lay.ids, lay.weights))
        assert np.sum(u * y * t) - np.sum(u * y * (1 - t)) == pytest.approx(direct, abs=1e-12)


def test_the_public_weight_functions_are_the_layout_bit_for_bit():
    labels = np.array([0, 0, 1, 1, 1, -1, 2, 2, 2, 2])
    t = np.array([1, 0, 1, 0, 0, 1, 1, 1, 0, 0], dtype=np.int8)
    keep = labels >= 0
    for estimand in ("ate", "att"):
        lay = StratumLayout.build(labels[keep], t[keep], estimand)
        assert np.array_equal(stratum_weights(labels, t, estimand), lay.weights)
        u = unit_weights(labels, t, estimand)
        assert u[~keep].tolist() == [0.0]
        assert np.array_equal(u[keep], lay.unit_weights(t[keep]))
    # a label with no unit keeps its place with weight 0 (indexed by label)
    np.testing.assert_allclose(stratum_weights(np.array([0, 0, 2, 2]), np.array([1, 0, 1, 0]),
                                               "ate"), [0.5, 0.0, 0.5])


def test_every_stage_given_the_layout_gives_the_bits_it_builds_and_refuses_another():
    from stratagap.errors import InputError
    from stratagap.estimation import effects
    from stratagap.inference import residualize
    from stratagap.sensitivity import gamma_bounds, sensitivity_value

    rng = np.random.default_rng(12)
    n = 240
    X = rng.normal(size=(n, 2))
    labels = rng.integers(0, 4, n)
    t = (rng.random(n) < 0.4).astype(np.int8)
    y = X @ [0.5, 0.2] + 0.4 * t + rng.normal(size=n)
    r = residualize(y, X, labels)
    lay = StratumLayout.build(labels, t, "att")
    calls = {
        "regression": lambda **k: effects.stratified_regression(y, t, X, labels, estimand="att", **k),
        "plain": lambda **k: effects.plain_stratified_difference(y, t, labels, estimand="att", **k),
        "bounds": lambda **k: gamma_bounds(r, t, labels, estimand="att", **k),
        "value": lambda **k: sensitivity_value(r, t, labels, estimand="att", **k),
        "inversion": lambda **k: effects.constant_effect(y, t, X, labels, estimand="att",
                                                         resamples=199, seed=2, **k),
    }
    other = StratumLayout.build(labels[:-1], t[:-1], "att")
    for name, call in calls.items():
        assert call(layout=lay).to_dict() == call().to_dict(), name
        with pytest.raises(InputError, match="`layout` must be the StratumLayout"):
            call(layout=other)
