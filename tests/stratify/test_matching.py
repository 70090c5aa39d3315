"""Optimal caliper matching on the logit of the score: checked against brute-force enumeration of
every matching on tiny data, and against scipy.optimize.linear_sum_assignment on dense problems."""

import itertools
import statistics

import numpy as np
import pytest
from scipy.optimize import linear_sum_assignment

from stratagap.errors import InputError
from stratagap.stratify.matching import match_on_score, pooled_logit_sd


def _brute(logit, t, K, width, codes=None):
    """(most pairs, least total gap) over every assignment of reference units to exposed units
    (at most K each, within ``width``, equal codes)."""
    e = np.flatnonzero(t == 1)
    r = np.flatnonzero(t == 0)
    codes = np.zeros(t.size) if codes is None else codes
    best = (0, 0.0)
    for choice in itertools.product(range(-1, e.size), repeat=r.size):
        load = np.bincount([c for c in choice if c >= 0], minlength=e.size)
        if (load > K).any():
            continue
        pairs, total, ok = 0, 0.0, True
        for j, c in enumerate(choice):
            if c < 0:
                continue
            d = abs(logit[e[c]] - logit[r[j]])
            if d > width or codes[e[c]] != codes[r[j]]:
                ok = False
                break
            pairs += 1
            total += d
        if ok and (pairs > best[0] or (pairs == best[0] and total < best[1])):
            best = (pairs, total)
    return best


def _check_sets(m, logit, t, K, width, codes=None):
    """Each set: one exposed unit, 1..K reference units within the caliper, equal codes."""
    total = 0.0
    for s in range(m.n_sets):
        members = np.flatnonzero(m.labels == s)
        ex = members[t[members] == 1]
        ref = members[t[members] == 0]
        assert ex.size == 1 and 1 <= ref.size <= K
        gaps = np.abs(logit[ref] - logit[ex[0]])
        assert (gaps <= width + 1e-12).all()
        if codes is not None:
            assert (codes[ref] == codes[ex[0]]).all()
        total += gaps.sum()
    assert total == pytest.approx(m.total_gap, abs=1e-12)
    assert m.reference_used == int(((m.labels >= 0) & (t == 0)).sum())


@pytest.mark.parametrize("K", [1, 2])
def test_optimal_against_every_matching_on_tiny_data(K):
    # brute-force enumeration of all matchings (independent value); random tiny designs whose
    # caliper leaves some exposed units short, with ties from rounding the logits
    rng = np.random.default_rng(12)
    for _ in range(60):
        m1 = int(rng.integers(1, 4))
        n0 = int(rng.integers(m1 * K, 7))
        logit = np.round(rng.normal(size=m1 + n0), 1)
        t = np.r_[np.ones(m1), np.zeros(n0)].astype(int)
        C = float(rng.choice([0.1, 0.3, 1.0]))
        m = match_on_score(logit, t, per_exposed=K, caliper_sd=C)
        width = C * pooled_logit_sd(logit, t)
        pairs, total = _brute(logit, t, K, width)
        assert m.reference_used == pairs
        assert m.total_gap == pytest.approx(total, abs=1e-9)
        _check_sets(m, logit, t, K, width)


def test_more_pairs_before_shorter_pairs():
    # Greedy nearest-first would pair e1 with r1 (gap 0.01) and leave e2 without a partner; the
    # optimum matches both (e1-r2, e2-r1) although its total gap is larger.
    logit = np.array([0.0, 0.1, 0.01, -0.09, 3.0, -3.0])
    t = np.array([1, 1, 0, 0, 0, 0])
    width = 0.1 + 1e-9
    C = width / pooled_logit_sd(logit, t)
    m = match_on_score(logit, t, caliper_sd=C)
    assert m.matched_exposed == 2
    assert _brute(logit, t, 1, width) == (2, pytest.approx(m.total_gap, abs=1e-12))
    assert m.labels[3] == m.labels[0] and m.labels[2] == m.labels[1]


def test_exact_ties_keep_their_edge():
    # gap 0 edges: without the +1 offset the sparse solver would see no edge
    logit = np.array([0.5, -0.2, 0.5, -0.2, 0.5])
    t = np.array([1, 1, 0, 0, 0])
    m = match_on_score(logit, t)
    assert m.matched_exposed == 2 and m.total_gap == 0.0


def test_dense_problem_matches_linear_sum_assignment():
    # a caliper wider than every gap: the optimum is the rectangular assignment problem
    rng = np.random.default_rng(3)
    for _ in range(20):
        m1, n0 = int(rng.integers(2, 8)), int(rng.integers(8, 15))
        logit = np.round(rng.normal(size=m1 + n0), 1)   # rounding: many tied gaps
        t = np.r_[np.ones(m1), np.zeros(n0)].astype(int)
        cost = np.abs(logit[:m1, None] - logit[None, m1:])
        rows, cols = linear_sum_assignment(cost)
        m = match_on_score(logit, t, caliper_sd=1e3)
        assert m.matched_exposed == m1
        assert m.total_gap == pytest.approx(cost[rows, cols].sum(), abs=1e-9)


def test_caliper_excludes_and_reasons_are_counted():
    logit = np.array([0.0, 5.0, 0.1, 0.05, -0.5, 0.5])
    t = np.array([1, 1, 1, 0, 0, 0])
    m = match_on_score(logit, t, caliper_sd=0.05)
    width = 0.05 * pooled_logit_sd(logit, t)
    assert _brute(logit, t, 1, width)[0] == m.matched_exposed == 1
    assert m.unmatched_exposed == {"no_reference_with_same_values": 0, "none_within_caliper": 1,
                                   "candidates_used_by_others": 1}
    _check_sets(m, logit, t, 1, width)


def test_pooled_sd_is_the_mean_of_the_two_variances():
    # Austin 2011, sec. 2: sqrt((s1^2 + s0^2) / 2), sample variances
    logit = np.array([0.3, 1.1, -0.4, 0.0, 0.9, 2.0, -1.0])
    t = np.array([1, 1, 1, 0, 0, 0, 0])
    s1 = statistics.variance(logit[t == 1].tolist())
    s0 = statistics.variance(logit[t == 0].tolist())
    assert pooled_logit_sd(logit, t) == pytest.approx(np.sqrt((s1 + s0) / 2), rel=1e-14)
    assert match_on_score(logit, t).caliper == pytest.approx(0.2 * np.sqrt((s1 + s0) / 2))


def test_same_values_are_respected_and_brute_force_agrees():
    rng = np.random.default_rng(8)
    for _ in range(30):
        n = 7
        logit = np.round(rng.normal(size=n), 1)
        t = np.r_[np.ones(3), np.zeros(4)].astype(int)
        codes = rng.integers(0, 2, size=n)
        m = match_on_score(logit, t, caliper_sd=1.0, same_value=codes, same_value_on=["sex"])
        width = pooled_logit_sd(logit, t)
        assert (m.reference_used, pytest.approx(m.total_gap, abs=1e-9)) == \
            _brute(logit, t, 1, width, codes)
        _check_sets(m, logit, t, 1, width, codes)
        lacking = sum(1 for i in np.flatnonzero(t == 1)
                      if not ((codes == codes[i]) & (t == 0)).any())
        assert m.unmatched_exposed["no_reference_with_same_values"] == lacking


def test_one_to_k_counts_and_sets():
    logit = np.array([0.0, 1.0, 0.01, 0.02, 0.03, 0.98, 1.01, 1.5])
    t = np.array([1, 1, 0, 0, 0, 0, 0, 0])
    m = match_on_score(logit, t, per_exposed=3, caliper_sd=0.2)
    width = m.caliper
    assert _brute(logit, t, 3, width)[0] == m.reference_used
    _check_sets(m, logit, t, 3, width)
    assert sum(m.matches_per_exposed.values()) == m.matched_exposed == 2


def test_same_input_same_sets():
    rng = np.random.default_rng(1)
    logit = rng.normal(size=300)
    t = (rng.random(300) < 0.3).astype(int)
    a, b = match_on_score(logit, t), match_on_score(logit, t)
    assert np.array_equal(a.labels, b.labels) and a.to_dict() == b.to_dict()


@pytest.mark.parametrize("kwargs, message", [
    (dict(caliper_sd=0), "`caliper_sd` must be a positive number"),
    (dict(caliper_sd=-1.0), "`caliper_sd` must be a positive number"),
    (dict(per_exposed=0), "`per_exposed` must be a whole number >= 1"),
    (dict(per_exposed=3), r"`per_exposed=3` asks for 6 reference units .* only 3"),
])
def test_bad_arguments_name_the_parameter(kwargs, message):
    logit = np.array([0.0, 0.1, 0.2, 0.3, 0.4])
    t = np.array([1, 1, 0, 0, 0])
    with pytest.raises(InputError, match=message):
        match_on_score(logit, t, **kwargs)
