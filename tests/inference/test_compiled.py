"""The compiled kernels give the SAME numbers as their numpy twins; sharing draws changes nothing.

References: the fixed summation order of ``stratagap.inference._engines.compiled`` written out as a plain Python
loop (8 lanes, sequential within a lane, lanes combined in pairs); the draw rule "every unit
below the byte threshold plus the tied units with the smallest 64-bit keys" written out with
Python's ``sorted``; separate engine runs for the shared-draw cache.
"""

from __future__ import annotations

import numpy as np
import pytest

from stratagap.inference._engines import compiled as J
from stratagap.inference._engines import monte_carlo as _mc
from stratagap.estimation import effects as E
from stratagap.inference import permutation as P

needs_numba = pytest.mark.skipif(J._numba is None, reason="numba not installed")


def _lane_sum_reference(x):
    lanes = [0.0] * 8
    for q, value in enumerate(x):
        lanes[q % 8] += float(value)
    return ((lanes[0] + lanes[1]) + (lanes[2] + lanes[3])) + ((lanes[4] + lanes[5])
                                                              + (lanes[6] + lanes[7]))


def test_lane_sum_follows_the_documented_order():
    rng = np.random.default_rng(1)
    x = rng.normal(size=(3, 1003)) * 10.0 ** rng.integers(-8, 8, size=(3, 1003))
    got = J.lane_sum_rows(x)
    for i in range(3):
        assert got[i] == _lane_sum_reference(x[i])  # bit for bit


def _draw_reference(row, keys, m_s, vals):
    """The draw rule spelled out: bytes below c, then ties at c by (key, position)."""
    c = next(c for c in range(256) if np.sum(row <= c) > m_s)
    below = np.flatnonzero(row < c)
    tied = np.flatnonzero(row == c)
    picked = [q for _, q in sorted(zip(keys.tolist(), tied.tolist()))[: m_s - below.size]]
    keep = np.zeros(row.size, dtype=bool)
    keep[below] = True
    keep[picked] = True
    return c, keep, [_lane_sum_reference(v * keep) for v in vals]


@pytest.mark.parametrize("n,m", [(65, 1), (200, 60), (1003, 501), (4097, 4000), (9, 4)])
@pytest.mark.parametrize("jit", [False, pytest.param(True, marks=needs_numba)])
def test_kernels_match_the_spelled_out_rule(n, m, jit):
    rng = np.random.default_rng(n + m)
    h = 6
    u = rng.integers(0, 256, size=(h, n)).astype(np.uint8)
    vals = rng.normal(size=(2, n))
    c, lt, nt = J.thresholds(u, m, jit)
    keys = rng.integers(0, 2**64, size=int(nt.sum()), dtype=np.uint64)
    sums = J.masked_sums(u, c, lt, nt, keys, m, vals, jit)
    first = np.concatenate([[0], np.cumsum(nt)])
    for i in range(h):
        c_ref, keep, ref = _draw_reference(u[i], keys[first[i]:first[i + 1]], m, vals)
        assert c[i] == c_ref and keep.sum() == m
        assert sums[0, i] == ref[0] and sums[1, i] == ref[1]


@needs_numba
@pytest.mark.parametrize("chunk", [None, 3000])
def test_compiled_and_numpy_engines_identical(chunk, monkeypatch):
    if chunk is not None:  # several chunks of rows per block
        monkeypatch.setattr(_mc, "THRESHOLD_CHUNK", chunk)
    rng = np.random.default_rng(5)
    sizes = [40, 900, 7, 3001, 200, 40000]  # small, threshold, small, threshold, ..., choice
    labels = np.repeat(np.arange(len(sizes)), sizes)
    t = np.zeros(labels.size, dtype=np.int8)
    for s, (size, share) in enumerate(zip(sizes, [0.3, 0.5, 0.4, 0.7, 0.1, 0.05])):
        rows = np.flatnonzero(labels == s)
        t[rng.choice(rows, max(1, int(share * size)), replace=False)] = 1
    values = np.column_stack([rng.normal(size=labels.size), rng.exponential(size=labels.size)])
    compiled = P.null_exposed_sums(values, t, labels, 600, seed=3, workers=1)
    monkeypatch.setenv("STRATAGAP_NO_JIT", "1")
    assert not J.jit_available()
    plain = P.null_exposed_sums(values, t, labels, 600, seed=3, workers=1)
    assert np.array_equal(compiled, plain)
    monkeypatch.delenv("STRATAGAP_NO_JIT")
    assert np.array_equal(compiled, P.null_exposed_sums(values, t, labels, 600, seed=3,
                                                        workers=2, batch_size=77))


def _design(seed=0, n=3000):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, 2))
    labels = rng.integers(0, 4, n)
    t = (rng.random(n) < 0.3 + 0.1 * (X[:, 0] > 0)).astype(np.int8)
    y = X @ [1.0, -0.5] + 0.2 * t + rng.normal(size=n)
    return y, t, X, labels


def test_shared_draws_give_the_separate_results_in_one_pass(monkeypatch):
    y, t, X, labels = _design()
    r = P.residualize(y, X, labels)
    rt = P.residualize(t.astype(float), X, labels)
    kw = dict(estimand="ate", engine="monte_carlo", resamples=700, seed=11)
    alone = [P.stratified_test(r, t, labels, **kw),
             P.stratified_test(r, t, labels, statistic="studentized", **kw)]
    inv = E.constant_effect(y, t, X, labels, estimand="ate", resamples=700, seed=11,
                            engine="monte_carlo")
    passes = []
    real = _mc.iter_batches
    monkeypatch.setattr(_mc, "iter_batches", lambda plan, *a, **k: (passes.append(plan.k),
                                                                     real(plan, *a, **k))[1])
    draws = P.shared_draws(t, labels, columns=[r, rt], studentized=[r])
    shared = [P.stratified_test(r, t, labels, draws=draws, **kw),
              P.stratified_test(r, t, labels, statistic="studentized", draws=draws, **kw)]
    # passed on to the inversion, as the pipeline does
    inv2 = E.constant_effect(y, t, X, labels, estimand="ate", resamples=700, seed=11,
                             engine="monte_carlo", draws=draws)
    assert passes == [4]  # r, r_t, centred r, its square: one pass for all three
    for a, b in zip(alone, shared):
        assert a.to_dict() == b.to_dict()
        assert np.array_equal(a.null_distribution, b.null_distribution)
    assert inv.to_dict() == inv2.to_dict()


def test_shared_draws_respect_the_seed_and_binary_path():
    y, t, X, labels = _design(1)
    yb = (y > 0).astype(float)
    kw = dict(estimand="ate", engine="monte_carlo", resamples=300)
    draws = P.shared_draws(t, labels, columns=[y])
    a = P.stratified_test(y, t, labels, seed=1, draws=draws, **kw)
    b = P.stratified_test(y, t, labels, seed=2, draws=draws, **kw)
    s = P.stratified_test(yb, t, labels, statistic="sum", seed=1, draws=draws, **kw)
    assert np.array_equal(a.null_distribution,
                          P.stratified_test(y, t, labels, seed=1, **kw).null_distribution)
    assert np.array_equal(b.null_distribution,
                          P.stratified_test(y, t, labels, seed=2, **kw).null_distribution)
    assert np.array_equal(s.null_distribution, P.stratified_test(
        yb, t, labels, statistic="sum", seed=1, **kw).null_distribution)


def test_large_runs_report_progress_every_block():
    rng = np.random.default_rng(0)
    n = 400_000
    labels = rng.integers(0, 5, n)
    t = (rng.random(n) < 0.3).astype(np.int8)
    plan = _mc.make_plan(rng.normal(size=(n, 1)), t, labels, 5)
    # 3 ns per unit and resample x 4e5 units x 250 resamples = 0.3 s per block: one per batch
    assert _mc.default_batch(plan, 10_000) == _mc.BLOCK


def test_engine_note_says_why_normal_is_not_automatic():
    y, t, X, labels = _design(2, n=400)
    res = P.stratified_test(y, t, labels, estimand="ate", resamples=200)
    assert "Berry-Esseen" in res.to_dict()["engine_note"]
    assert np.isfinite(res.normal_p_value)
