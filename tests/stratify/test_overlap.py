"""Overlap rules: which units are set aside, and how the estimand is relabelled."""

import json
import warnings

import numpy as np
import pytest

from stratagap.errors import EstimandWarning, InputError, OverlapWarning
from stratagap.stratify.overlap import apply_overlap


def scores():
    # exposed scores in [0.3, 0.95], reference scores in [0.05, 0.8]
    e1 = np.array([0.3, 0.4, 0.5, 0.6, 0.7, 0.85, 0.9, 0.95])
    e0 = np.array([0.05, 0.08, 0.1, 0.2, 0.35, 0.45, 0.55, 0.65, 0.8])
    score = np.concatenate([e1, e0])
    t = np.concatenate([np.ones(e1.size), np.zeros(e0.size)]).astype(np.int8)
    return score, t


def test_att_auto_sets_aside_comparison_units_outside_exposed_range():
    score, t = scores()
    with pytest.warns(OverlapWarning, match="3 of 8 exposed"):
        res = apply_overlap(score, t, estimand="att")
    # comparison units below min exposed score 0.3: 0.05, 0.08, 0.1, 0.2 -> 4 set aside
    expected = (t == 1) | ((score >= 0.3) & (score <= 0.95))
    np.testing.assert_array_equal(res.keep, expected)
    assert res.set_aside == {"exposed": 0, "reference": 4}
    assert res.estimand_label == "ATT"  # estimand unchanged (Dehejia & Wahba 1999)
    assert res.outside_other_range == {"exposed": 3, "reference": 4}  # 0.85, 0.9, 0.95 > 0.8
    assert res.bounds == (0.3, 0.95)
    assert res.ranges == {"exposed": [0.3, 0.95], "reference": [0.05, 0.8]}


def test_ate_auto_keeps_everyone_and_warns_on_poor_overlap():
    score, t = scores()
    with pytest.warns(OverlapWarning, match="poor overlap"):
        res = apply_overlap(score, t, estimand="ate")
    assert res.keep.all() and res.estimand_label == "ATE" and res.poor_overlap
    assert res.set_aside == {"exposed": 0, "reference": 0}


def test_ate_auto_silent_when_overlap_is_good():
    rng = np.random.default_rng(1)
    score = rng.uniform(0.2, 0.8, 400)
    t = (rng.random(400) < score).astype(np.int8)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        res = apply_overlap(score, t, estimand="ate")
    assert not res.poor_overlap and res.common_support_share > 0.9


def test_common_support_relabels_ate():
    score, t = scores()
    with pytest.warns(EstimandWarning, match="common-support"):
        res = apply_overlap(score, t, estimand="ate", rule="common")
    lo, hi = 0.3, 0.8  # [max(min1, min0), min(max1, max0)]
    np.testing.assert_array_equal(res.keep, (score >= lo) & (score <= hi))
    assert res.set_aside == {"exposed": 3, "reference": 4}
    assert res.estimand_label == "ATE in the common-support population"


def test_crump_rule_relabels_ate_and_att():
    score, t = scores()
    with pytest.warns(EstimandWarning):
        res = apply_overlap(score, t, estimand="ate", rule="crump")
    np.testing.assert_array_equal(res.keep, (score >= 0.1) & (score <= 0.9))
    assert res.set_aside == {"exposed": 1, "reference": 2}
    assert res.estimand_label == "ATE in the overlap population [0.1, 0.9]"
    with pytest.warns(EstimandWarning):
        att = apply_overlap(score, t, estimand="att", rule="crump")
    assert att.estimand_label == "ATT among exposed units with comparable scores"


def test_att_trimming_only_comparison_units_keeps_label():
    score = np.array([0.3, 0.4, 0.5, 0.6, 0.05, 0.35, 0.45, 0.7, 0.95])
    t = np.array([1, 1, 1, 1, 0, 0, 0, 0, 0], dtype=np.int8)
    with warnings.catch_warnings():
        warnings.simplefilter("error", EstimandWarning)
        res = apply_overlap(score, t, estimand="att", rule="common")
    assert res.set_aside == {"exposed": 0, "reference": 3}  # 0.05, 0.7, 0.95 outside [0.3, 0.6]
    assert res.estimand_label == "ATT"


def test_none_keeps_all():
    score, t = scores()
    with pytest.warns(OverlapWarning):
        res = apply_overlap(score, t, estimand="att", rule="none")
    assert res.keep.all() and res.estimand_label == "ATT"


def test_no_overlap_is_an_input_error_that_says_what_to_do():
    score = np.array([0.6, 0.7, 0.8, 0.1, 0.2, 0.3])
    t = np.array([1, 1, 1, 0, 0, 0], dtype=np.int8)
    with pytest.raises(InputError, match="no overlap.*determines exposure"):
        apply_overlap(score, t, estimand="ate")


def test_too_few_left_is_an_input_error():
    score = np.array([0.95, 0.96, 0.5, 0.1, 0.2, 0.97])
    t = np.array([1, 1, 1, 0, 0, 0], dtype=np.int8)
    with pytest.raises(InputError, match="trim=crump.*leaves 1 exposed"):
        apply_overlap(score, t, estimand="ate", rule="crump")


@pytest.mark.parametrize("kwargs, match", [
    ({"estimand": "atc"}, "`estimand`"),
    ({"estimand": "ate", "rule": "trim"}, "`trim`"),
])
def test_bad_arguments(kwargs, match):
    score, t = scores()
    with pytest.raises(InputError, match=match):
        apply_overlap(score, t, **kwargs)


def test_to_dict_is_json_ready():
    score, t = scores()
    with pytest.warns(OverlapWarning):
        d = apply_overlap(score, t, estimand="att").to_dict()
    assert json.loads(json.dumps(d)) == d
    assert d["n_kept"] == 13


def test_complete_separation_ends_in_no_overlap_error():
    # Separation is handled by a penalized fit; a covariate that determines exposure still
    # leaves disjoint score ranges, which is the user error (exit 2 on the CLI).
    from stratagap.errors import SeparationWarning
    from stratagap.stratify.scores import fit_propensity

    rng = np.random.default_rng(0)
    x = rng.normal(size=200)
    t = (x > 0).astype(np.int8)
    with pytest.warns(SeparationWarning, match="x"):
        fit = fit_propensity(x[:, None], t, ["x"])
    with pytest.raises(InputError, match="no overlap"):
        apply_overlap(fit.score, t, estimand="ate")
