"""Shared Monte Carlo null draws, and the batches of the Monte Carlo engine that use them.

An explicit object (:class:`SharedDraws`) passed as ``draws=`` to each call that should share,
so the data path shows where the draws go: the pipeline makes one for the default test, its
studentized companion and the constant-effect inversion.
"""

from __future__ import annotations

import hashlib

import numpy as np

from ._engines import monte_carlo as _mc
from .statistic import studentized_columns

__all__ = ["SharedDraws", "shared_draws", "mc_batches", "SHARED_BYTES"]

#: Largest array of null sums (bytes) that :func:`shared_draws` keeps; beyond it, no sharing.
SHARED_BYTES = 256 * 2**20


class SharedDraws:
    """Monte Carlo null sums computed once per value column and reused by every call given it.

    Make it with :func:`shared_draws` and pass it as ``draws=`` to :func:`~stratagap.inference.permutation.stratified_test`,
    :func:`~stratagap.inference.permutation.null_statistics` or the constant-effect inversion. The draws of the Monte Carlo
    engine depend only on the stratum sizes, the exposed counts, the seed and the number of
    resamples; a column's exposed sums depend, besides, only on the column's values in the
    engine's row order (sorted within strata). So a column's null sums are keyed by exactly
    those, and a later call (any statistic) that needs the same column gets the same numbers
    it would have computed: results are bit-identical to running the calls separately.
    ``columns`` (raw rows of ``t``/``labels``) and the centred values and squares of
    ``studentized`` columns (what the studentized statistic draws) are drawn together with the
    first Monte Carlo call on the same ``t`` and ``labels``, so one pass over the permutations
    serves several tests (e.g. the default test, its studentized companion and the
    constant-effect inversion). Arrays above ``SHARED_BYTES`` are not kept (the calls then run
    as usual). The cache lives as long as the object.
    """

    def __init__(self, t=None, labels=None, columns=(), studentized=()):
        self.extra = None
        if t is not None:
            self.extra = (np.asarray(t), np.asarray(labels),
                          [np.asarray(c, dtype=float) for c in columns],
                          [np.asarray(c, dtype=float) for c in studentized])
        self.cache = {}


def shared_draws(t=None, labels=None, *, columns=(), studentized=()) -> SharedDraws:
    """Null draws to share between calls: ``draws = shared_draws(t, labels, columns=[...])``.

    See :class:`SharedDraws`; pass the object as ``draws=`` to each call that should share.
    """
    return SharedDraws(t, labels, columns, studentized)


def _column_keys(plan, v, seed, resamples):
    tail = (plan.n.tobytes() + plan.n1.tobytes()
            + f"|{seed}|{resamples}|{plan.binary}".encode())
    return [hashlib.blake2b(np.ascontiguousarray(v[plan.order, j]).tobytes() + tail,
                            digest_size=20).digest() for j in range(v.shape[1])]


def mc_batches(v, tk, layout, resamples, seed, batch_size, progress, workers, raw, draws):
    """Monte Carlo batches ``(lo, hi, sums (k, S, hi - lo))``; reused through ``draws``."""
    k = v.shape[1]
    codes, n_strata = layout.codes, layout.n_strata
    if draws is None or 8 * (k + 4) * n_strata * resamples > SHARED_BYTES:
        plan = _mc.make_plan(v, tk, codes, n_strata)
        yield from _mc.iter_batches(plan, resamples, seed, batch_size, progress, workers)
        return
    plan = _mc.make_plan(v, tk, codes, n_strata)
    keys = _column_keys(plan, v, seed, resamples)
    cache = draws.cache
    if not all(key in cache for key in keys):
        extra, full = draws.extra, v
        if (extra is not None and not plan.binary and np.array_equal(extra[0], raw[0])
                and np.array_equal(extra[1], raw[1])):
            keep = raw[2]
            more = [c[keep][:, None] for c in extra[2]]
            more += [studentized_columns(c[keep], layout) for c in extra[3]]
            more = np.column_stack([v[:, :0]] + more)
            # a column the request draws anyway is not drawn twice
            more = more[:, [j for j in range(more.shape[1])
                            if not any(np.array_equal(more[:, j], v[:, i])
                                       for i in range(k))]]
            full = np.column_stack([v, more])
            plan = _mc.make_plan(full, tk, codes, n_strata)  # rows sorted by v first: same
        sums = np.empty((full.shape[1], n_strata, resamples))
        for lo, hi, part in _mc.iter_batches(plan, resamples, seed, batch_size, progress,
                                             workers):
            sums[:, :, lo:hi] = part
        for key, j in zip(_column_keys(plan, full, seed, resamples), range(full.shape[1])):
            cache.setdefault(key, sums[j])
    elif progress is not None:
        progress(resamples, resamples)
    yield 0, resamples, np.stack([cache[key] for key in keys])
