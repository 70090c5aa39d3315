"""Strata on the score: quantile cut points, merges, the adaptive split, user strata, weights."""

import json
import warnings

import numpy as np
import pytest
from scipy.special import expit

from stratagap.errors import InputError, StrataWarning
from stratagap.stratify.strata import make_strata, stratum_weights, unit_weights


def confounded(n=2000, seed=0, slope=1.5):
    rng = np.random.default_rng(seed)
    x = rng.normal(size=n)
    score = expit(-1.0 + slope * x)
    t = (rng.random(n) < score).astype(np.int8)
    return score, t


def test_ate_cut_points_are_pooled_quintiles():
    score, t = confounded()
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        s = make_strata(score, t, estimand="ate")
    np.testing.assert_allclose(s.cut_points, np.quantile(score, [0.2, 0.4, 0.6, 0.8]))
    counts = np.bincount(s.labels)
    assert s.n_strata == 5 and counts.max() - counts.min() <= 1  # equal frequency
    # stratum j holds (c_{j-1}, c_j]
    expected = np.searchsorted(np.quantile(score, [0.2, 0.4, 0.6, 0.8]), score, side="left")
    np.testing.assert_array_equal(s.labels, expected)


def test_att_cut_points_come_from_exposed_scores():
    score, t = confounded()
    s = make_strata(score, t, estimand="att")
    exposed_q = np.quantile(score[t == 1], [0.2, 0.4, 0.6, 0.8])
    np.testing.assert_allclose(s.cut_points, exposed_q)
    assert not np.allclose(exposed_q, np.quantile(score, [0.2, 0.4, 0.6, 0.8]), atol=1e-3)
    n1 = np.array([row["n_exposed"] for row in s.table])
    assert n1.max() - n1.min() <= 2  # exposed units spread evenly over the strata
    assert s.settings["cut_points_from"] == "exposed scores"


def test_sparse_stratum_is_merged_into_smaller_neighbour_and_reported():
    # Stratum of the highest scores holds a single reference unit: it must merge.
    score = np.array([0.1, 0.12, 0.14, 0.16, 0.18, 0.2,       # low block
                      0.4, 0.42, 0.44, 0.46, 0.48, 0.5,       # middle block
                      0.8, 0.82, 0.84, 0.86, 0.88, 0.9])      # high block
    t = np.array([1, 0, 1, 0, 1, 0,
                  1, 0, 1, 0, 1, 0,
                  1, 1, 1, 0, 1, 1], dtype=np.int8)
    with pytest.warns(StrataWarning, match="merged.*1 reference"):
        s = make_strata(score, t, estimand="ate", n_strata=3, min_per_group=2)
    assert s.n_strata == 2 and len(s.merges) == 1
    assert "[0.8, 0.9]" in s.merges[0] and "[0.4, 0.5]" in s.merges[0]
    np.testing.assert_array_equal(s.labels, [0] * 6 + [1] * 12)
    assert s.cut_points == [np.quantile(score, 1 / 3)]  # the merged-away cut is gone
    for row in s.table:
        assert row["n_exposed"] >= 2 and row["n_reference"] >= 2


def test_merge_goes_to_the_neighbour_with_fewer_units():
    # ATT cut points at the exposed tertiles, 0.44 and 0.58, give strata of 13, 4 and 6 units;
    # the middle one has a single reference unit and must join the smaller neighbour (6 units).
    ref_low = np.linspace(0.05, 0.29, 10)
    score = np.concatenate([[0.30, 0.31, 0.32], ref_low, [0.50, 0.51, 0.52], [0.45],
                            [0.70, 0.71, 0.72], [0.60, 0.65, 0.75]])
    t = np.array([1] * 3 + [0] * 10 + [1] * 3 + [0] + [1] * 3 + [0] * 3, dtype=np.int8)
    with pytest.warns(StrataWarning, match="1 merge"):
        s = make_strata(score, t, estimand="att", n_strata=3, min_per_group=2)
    np.testing.assert_allclose(s.cut_points, [np.quantile(score[t == 1], 1 / 3)])
    assert [(r["n_exposed"], r["n_reference"]) for r in s.table] == [(3, 10), (6, 4)]
    assert "[0.45, 0.52]" in s.merges[0] and "[0.6, 0.75]" in s.merges[0]


def test_tied_cut_points_are_collapsed_and_reported():
    rng = np.random.default_rng(4)
    score = np.repeat([0.2, 0.5], [700, 300])
    t = (rng.random(1000) < score).astype(np.int8)
    with pytest.warns(StrataWarning, match="tied score quantiles"):
        s = make_strata(score, t, estimand="ate", n_strata=5)
    assert s.n_strata == 2


def test_too_many_strata_is_an_input_error_naming_the_option():
    score, t = confounded(n=60)
    n1 = int(t.sum())
    maximum = min(60 // 6, min(n1, 60 - n1) // 2)
    with pytest.raises(InputError, match=rf"n_strata=50.*at most {maximum}.*n_strata={maximum}"):
        make_strata(score, t, estimand="ate", n_strata=50)


def test_adaptive_split_stops_by_its_rules():
    score, t = confounded(n=4000, seed=2, slope=2.0)
    logit = np.log(score / (1 - score))
    s = make_strata(score, t, estimand="ate", method="adaptive", logit=logit)
    assert s.method == "adaptive" and s.settings["t_max"] == 1.96 and s.n_strata > 3
    for k in range(s.n_strata):
        m = s.labels == k
        l1, l0 = logit[m & (t == 1)], logit[m & (t == 0)]
        n1, n0 = l1.size, l0.size
        assert n1 >= 3 and n0 >= 3
        s2 = ((n1 - 1) * l1.var(ddof=1) + (n0 - 1) * l0.var(ddof=1)) / (n1 + n0 - 2)
        tstat = (l1.mean() - l0.mean()) / np.sqrt(s2 * (1 / n1 + 1 / n0))
        stopped_balanced = abs(tstat) <= 1.96
        stopped_small = any(f"{score[m].min():.4g}, {score[m].max():.4g}]" in note
                            for note in s.notes)
        assert stopped_balanced or stopped_small
    # blocks are contiguous in score
    order = np.argsort(score, kind="stable")
    assert np.all(np.diff(s.labels[order]) >= 0)


def test_adaptive_minimum_counts_block_splits():
    score, t = confounded(n=4000, seed=2, slope=2.0)
    loose = make_strata(score, t, estimand="ate", method="adaptive")
    strict = make_strata(score, t, estimand="ate", method="adaptive", min_per_group=300)
    assert strict.n_strata < loose.n_strata
    assert all(min(r["n_exposed"], r["n_reference"]) >= 300 for r in strict.table)
    assert strict.settings["min_per_group"] == 300
    no_split = make_strata(score, t, estimand="ate", method="adaptive", t_max=1e9)
    assert no_split.n_strata == 1


def test_user_strata_lacking_a_group_are_set_aside_and_counted():
    score = np.linspace(0.1, 0.9, 10)
    t = np.array([1, 0, 1, 1, 1, 0, 0, 0, 1, 0], dtype=np.int8)
    given = np.array([7, 7, 3, 3, 3, 9, 9, 9, 5, 5])  # set 3 has no reference unit, 9 no exposed
    with pytest.warns(StrataWarning, match="2 of 4 given strata"):
        s = make_strata(score, t, estimand="ate", user_labels=given)
    assert s.method == "user" and s.n_strata == 2 and s.merges == []
    assert s.set_aside == {"exposed": 3, "reference": 3}
    np.testing.assert_array_equal(s.labels, [1, 1, -1, -1, -1, -1, -1, -1, 0, 0])
    assert [row["given_label"] for row in s.table] == [5, 7]


def test_user_strata_none_usable_is_an_error():
    t = np.array([1, 1, 0, 0], dtype=np.int8)
    with pytest.raises(InputError, match="`strata_column`"):
        make_strata(np.full(4, 0.5), t, estimand="ate", user_labels=np.array([1, 1, 2, 2]))


def test_weights_ate_and_att():
    labels = np.array([0, 0, 0, 1, 1, 1, 1, -1])
    t = np.array([1, 0, 0, 1, 1, 0, 1, 0], dtype=np.int8)
    np.testing.assert_allclose(stratum_weights(labels, t, "ate"), [3 / 7, 4 / 7])
    np.testing.assert_allclose(stratum_weights(labels, t, "att"), [1 / 4, 3 / 4])
    w = unit_weights(labels, t, "ate")
    np.testing.assert_allclose(w, [3 / 7, 3 / 14, 3 / 14, 4 / 21, 4 / 21, 4 / 7, 4 / 21, 0])
    y = np.arange(8.0)
    # weighted group means are the stratum-weighted means of the stratum means
    by_hand = 3 / 7 * (0 - 1.5) + 4 / 7 * (np.mean([3, 4, 6]) - 5)
    assert np.sum(w[t == 1] * y[t == 1]) - np.sum(w[t == 0] * y[t == 0]) == pytest.approx(by_hand)
    watt = unit_weights(labels, t, "att")
    assert watt[t == 1].sum() == pytest.approx(1) and watt[t == 0].sum() == pytest.approx(1)


def test_unit_weights_reject_a_stratum_without_a_group():
    with pytest.raises(InputError, match="lacks one group"):
        unit_weights(np.array([0, 0, 1]), np.array([1, 0, 1], dtype=np.int8), "ate")


def test_too_few_units_of_a_group():
    score = np.linspace(0.1, 0.9, 10)
    t = np.array([1, 1, 0, 0, 0, 0, 0, 0, 0, 0], dtype=np.int8)
    with pytest.raises(InputError, match="min_per_group=3"):
        make_strata(score, t, estimand="ate")


def test_to_dict_is_json_ready():
    score, t = confounded()
    d = make_strata(score, t, estimand="att").to_dict()
    assert json.loads(json.dumps(d)) == d
    assert {"stratum", "score_low", "score_high", "n_exposed", "n_reference", "n"} <= set(
        d["table"][0])
