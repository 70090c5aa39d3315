"""Monte Carlo core of the permutation engine: within-stratum shuffles in batches.

Every statistic of :mod:`stratagap.inference.permutation` is a function of the per-stratum sums of the
value columns over the exposed units. Under within-stratum shuffles of the exposure labels the
exposed set of stratum ``s`` is a uniformly random subset of size ``n1_s`` of its ``n_s`` units,
so only that subset has to be drawn. This module draws it as cheaply as an exact draw allows:

* only the *smaller* group of each stratum is drawn (``m_s = min(n1_s, n0_s)`` units); the sum
  over the exposed units is then either the sum over the draw or the stratum total minus it;
* strata of more than ``ROWS_MAX_N`` units with ``m_s < n_s / 6`` use numpy's
  ``Generator.choice(..., replace=False, shuffle=False)`` (Floyd's algorithm or a partial
  Fisher--Yates, in C, O(m_s));
* other strata above ``SMALL`` units use a *random-byte threshold*: every unit gets one
  random byte per resample; the units below the byte value ``c`` at which the count first
  reaches ``m_s`` are drawn, and the remaining few are picked among the units at ``c`` by
  64-bit random keys (the ``m_s`` smallest of i.i.d. keys, the byte being the leading digit:
  exactly uniform, up to ties of 64-bit keys, probability below 1e-12). No sort of the
  stratum. The count, the selection and the sums run in :mod:`stratagap.inference._engines.compiled`:
  compiled (numba, GIL released) or its numpy twin, bit-identical (one fixed summation order).
  Measured at n = 10^6 in 5 strata (2-core machine under load, one thread): about 1.9 ms per
  resample compiled (random bytes ~0.55 ns per unit, count ~0.15, selection ~0.25, sums ~0.5)
  against ~6 ms for the numpy version and ~15 ms for ``argpartition`` of random keys;
* small strata (at most ``SMALL`` units, e.g. matched sets) are shuffled together, vectorized,
  by sorting random keys within each stratum;
* a single binary value column needs no shuffle at all: the exposed sum of stratum ``s`` is
  hypergeometric (``n_s`` units, ``R_s`` events, ``n1_s`` draws), one
  ``Generator.hypergeometric`` draw per stratum and resample.

Streams: resample ``b`` is drawn from block ``b // stratagap._base.rng.BLOCK`` of
:func:`stratagap._base.rng.block_generators`; each block is always drawn whole (small strata from one
child stream, the others stratum by stratum from a second), whatever the batch size, so the
output is identical for every ``batch_size`` and every number of worker threads (threads draw
whole blocks). The sums are numpy reductions, not BLAS, so BLAS threads do not matter either.

Memory: :func:`stratagap.inference.permutation.null_exposed_sums` returns ``8 k S B`` bytes. While
drawing, a batch of ``b`` resamples holds ``8 k S b`` bytes of sums (default ``b``: about
B/20 and at most ~0.5 s of drawing, whole blocks, within 32 MiB); ``2 workers + 1`` blocks of
``8 k S BLOCK`` bytes are in flight with threads; ``8 k n`` bytes hold the sorted copy of the
values; each worker needs ``THRESHOLD_CHUNK`` bytes (1 MiB) of random bytes plus ``9 n_max``
bytes (compiled; the numpy twin about 25 bytes per random byte), and ``16 n_small`` bytes per
row of small-strata keys (rows in chunks of at most 2**21 keys).

The rows of every stratum are sorted by their values before drawing, so the draws do not depend
on the order of the input rows either.
"""

from __future__ import annotations

import os
from collections import deque
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass

import numpy as np

from . import compiled as _jit
from ..._base.rng import BLOCK, block_generators

#: Strata with at most this many units are shuffled together by sorting random keys.
SMALL = 64
#: Strata above ROWS_MAX_N units with m_s * CHOICE_RATIO < n_s use Generator.choice.
CHOICE_RATIO = 6
#: Random bytes per chunk of rows for the threshold draw (compiled: ~1 byte each in memory;
#: numpy twin: ~25 bytes each).
THRESHOLD_CHUNK = 2**20
#: Generator.choice is considered only for strata above this size.
ROWS_MAX_N = 32768
#: Keys per chunk of rows for the small-strata path.
SMALL_CHUNK_KEYS = 2**21
#: Default budget (bytes) for the sums of one batch.
BATCH_BYTES = 32 * 2**20


@dataclass
class Plan:
    """Per-stratum data prepared once for all resamples (rows sorted within strata)."""

    k: int
    n_strata: int
    n: np.ndarray  # (S,) units per stratum
    n1: np.ndarray  # (S,) exposed per stratum
    m: np.ndarray  # (S,) size of the smaller group
    draw_exposed: np.ndarray  # (S,) bool: the smaller group is the exposed one
    totals: np.ndarray  # (k, S) sum of each column per stratum
    large: list  # [(s, values (k, n_s) C-contiguous, method)]
    small_idx: np.ndarray  # strata in the small path
    small_values: np.ndarray  # (k, n_small) values of the small strata, stratum by stratum
    small_seg: np.ndarray  # (n_small,) position of the unit's stratum in small_idx
    small_start: np.ndarray  # (len(small_idx),) first unit of each small stratum
    binary: bool  # one binary column: hypergeometric path
    jit: bool = False  # compiled kernels (same results as the numpy twins)
    order: np.ndarray | None = None  # row order used (stratum, then values)


def make_plan(values: np.ndarray, t: np.ndarray, codes: np.ndarray, n_strata: int,
              jit: bool | None = None) -> Plan:
    """Prepare the engine for ``values`` (n, k), labels ``t`` and stratum codes 0..S-1.

    ``jit``: use the compiled kernels (None: when available, see :mod:`stratagap.inference._engines.compiled`).
    """
    k = values.shape[1]
    n = np.bincount(codes, minlength=n_strata)
    n1 = np.bincount(codes, weights=t, minlength=n_strata).astype(np.int64)
    draw_exposed = n1 <= n - n1
    m = np.where(draw_exposed, n1, n - n1)
    totals = np.stack([np.bincount(codes, weights=values[:, j], minlength=n_strata)
                       for j in range(k)])
    binary = k == 1 and bool(np.all((values == 0) | (values == 1)))
    # sort rows by stratum, then by value (row-order invariance of the draws)
    if k == 1:  # two stable sorts = lexsort by (stratum, value), faster for one column
        by_value = np.argsort(values[:, 0], kind="stable")
        order = by_value[np.argsort(codes[by_value], kind="stable")]
    else:
        order = np.lexsort([values[:, j] for j in range(k - 1, -1, -1)] + [codes])
    sv = values[order].T  # (k, n)
    starts = np.concatenate([[0], np.cumsum(n)])
    large, small = [], []
    for s in range(n_strata):
        if n[s] <= SMALL:
            small.append(s)
            continue
        choice = n[s] > ROWS_MAX_N and m[s] * CHOICE_RATIO < n[s]
        method = "choice" if choice else "threshold"
        large.append((s, np.ascontiguousarray(sv[:, starts[s]:starts[s + 1]]), method))
    small_idx = np.asarray(small, dtype=np.int64)
    if small:
        small_values = np.ascontiguousarray(
            np.concatenate([sv[:, starts[s]:starts[s + 1]] for s in small], axis=1))
        sizes = n[small_idx]
        small_seg = np.repeat(np.arange(len(small)), sizes)
        small_start = np.concatenate([[0], np.cumsum(sizes)[:-1]])
    else:
        small_values = np.empty((k, 0))
        small_seg = np.empty(0, dtype=np.int64)
        small_start = np.empty(0, dtype=np.int64)
    return Plan(k, n_strata, n, n1, m, draw_exposed, totals, large, small_idx, small_values,
                small_seg, small_start, binary, _jit.jit_available() if jit is None else jit,
                order)


def _draw_threshold(vals: np.ndarray, m_s: int, gen, r: int, jit: bool) -> np.ndarray:
    """Sums (k, r) of ``vals`` (k, n_s) over r uniform ``m_s``-subsets (random-byte threshold).

    Each unit gets a random byte per resample. With ``c`` the byte value at which the count of
    smaller bytes first reaches ``m_s`` (``#{u < c} <= m_s < #{u <= c}``), the subset is every
    unit with ``u < c`` plus ``m_s - #{u < c}`` of the units with ``u == c``, picked by the
    smallest 64-bit random keys. This is "the ``m_s`` smallest of i.i.d. random keys" with the
    byte as the leading digit, so the subset is uniform; it needs no sort of the stratum.
    Streams, per chunk of ``max(1, THRESHOLD_CHUNK // n_s)`` resamples: the bytes of the whole
    chunk in one ``random_raw`` call, then one 64-bit key for every unit at ``c`` of every row
    of the chunk, row by row. The selection and the sums run in :mod:`stratagap.inference._engines.compiled`
    (compiled, or its numpy twin: bit-identical, fixed summation order).
    """
    n_s = vals.shape[1]
    out = np.empty((vals.shape[0], r))
    rows = max(1, THRESHOLD_CHUNK // n_s)
    for lo in range(0, r, rows):
        h = min(r, lo + rows) - lo
        u = gen.bit_generator.random_raw((h * n_s + 7) // 8).view(np.uint8)[:h * n_s]
        u = u.reshape(h, n_s)
        c, lt, nt = _jit.thresholds(u, m_s, jit)
        keys = gen.bit_generator.random_raw(int(nt.sum()))
        out[:, lo:lo + h] = _jit.masked_sums(u, c, lt, nt, keys, m_s, vals, jit)
    return out


def _draw_small(plan: Plan, gen, out: np.ndarray) -> None:
    """Fill ``out[:, small strata, :]`` (k, S, r) for r resamples by sorting random keys.

    Each unit gets a random 64-bit key whose top bits hold its stratum's position, so one sort
    per resample orders every small stratum at random; the first ``m_s`` units of each stratum
    in that order are the draw. (Ties among the remaining key bits have probability below
    1e-9 per stratum and resample; they keep the sorted-by-value order.)
    """
    n_small = plan.small_values.shape[1]
    n_seg = plan.small_idx.size
    r_total = out.shape[2]
    rows = max(1, SMALL_CHUNK_KEYS // max(n_small, 1))
    m_small = plan.m[plan.small_idx]
    shift = np.uint64(64 - max(1, int(n_seg - 1).bit_length()))
    seg_bits = plan.small_seg.astype(np.uint64) << shift if n_seg > 1 else np.uint64(0)
    rank = np.arange(n_small) - plan.small_start[plan.small_seg]
    chosen_pos = np.flatnonzero(rank < m_small[plan.small_seg])  # sorted positions drawn
    seg_first = np.concatenate([[0], np.cumsum(m_small)[:-1]])  # every m_s >= 1
    flip = ~plan.draw_exposed[plan.small_idx]
    for lo in range(0, r_total, rows):
        hi = min(r_total, lo + rows)
        keys = gen.integers(0, 2**64, size=(hi - lo, n_small), dtype=np.uint64)
        keys >>= np.uint64(64) - shift if n_seg > 1 else np.uint64(0)
        keys |= seg_bits
        unit = np.argsort(keys, axis=1)[:, chosen_pos]  # (r, sum m) drawn unit indices
        for j in range(plan.k):
            sums = np.add.reduceat(plan.small_values[j][unit], seg_first, axis=1)  # (r, S_small)
            sums[:, flip] = plan.totals[j, plan.small_idx[flip]] - sums[:, flip]
            out[j, plan.small_idx, lo:hi] = sums.T


def _fill_block(plan: Plan, gen, out: np.ndarray) -> None:
    """Fill ``out`` (k, S, r) with the resamples of one block, drawn from ``gen``."""
    r = out.shape[2]
    if plan.binary:
        # only the number of exposed events moves: one hypergeometric draw per stratum
        events = np.rint(plan.totals[0]).astype(np.int64)
        draws = gen.hypergeometric(events, plan.n - events, plan.n1,
                                   size=(r, plan.n_strata))
        out[0] = draws.T
        return
    g_small, g_large = gen.spawn(2)
    if plan.small_idx.size:
        _draw_small(plan, g_small, out)
    for s, vals, method in plan.large:
        m_s = int(plan.m[s])
        if method == "choice":
            drawn = np.empty((plan.k, r))
            for b in range(r):
                idx = g_large.choice(vals.shape[1], m_s, replace=False, shuffle=False)
                drawn[:, b] = [row[idx].sum() for row in vals]  # per row: same for any k
        else:
            drawn = _draw_threshold(vals, m_s, g_large, r, plan.jit)
        out[:, s, :] = drawn if plan.draw_exposed[s] else plan.totals[:, s, None] - drawn


#: Rough cost of one resample per unit (s), for batches that report progress every ~0.5 s.
UNIT_SECONDS = 3e-9
PROGRESS_SECONDS = 0.5


def default_batch(plan: Plan, resamples: int) -> int:
    """Resamples per batch: about 20 batches (progress steps) and at most ~0.5 s of drawing per
    batch (estimated from the number of units), whole blocks, sums within ``BATCH_BYTES``."""
    per = 8 * plan.k * max(plan.n_strata, 1)
    by_memory = max(BLOCK, (BATCH_BYTES // per) // BLOCK * BLOCK)
    by_progress = max(BLOCK, -(-resamples // (20 * BLOCK)) * BLOCK)
    units = plan.n_strata if plan.binary else int(plan.n.sum()) * plan.k  # binary: per stratum
    units = max(1, units)
    by_time = max(BLOCK, int(PROGRESS_SECONDS / (UNIT_SECONDS * units)) // BLOCK * BLOCK)
    return int(min(resamples, by_memory, by_progress, by_time))


def default_workers(plan: Plan) -> int:
    """Threads drawing blocks: every core with the compiled kernels (they release the GIL),
    else 1 (numpy's per-call overhead holds the GIL often enough that 2 threads measured no
    faster than 1 on a loaded 2-core machine)."""
    return (os.cpu_count() or 1) if plan.jit else 1


def iter_batches(plan: Plan, resamples: int, seed: int, batch_size: int | None = None,
                 progress=None, workers: int | None = None):
    """Yield ``(lo, hi, sums)`` with ``sums`` (k, S, hi-lo) for consecutive batches.

    Blocks of ``BLOCK`` resamples are the unit of randomness; a batch is a run of resamples
    (``batch_size`` of them, any positive int) made of pieces of blocks. With ``workers > 1``
    whole blocks are drawn in parallel threads (at most the CPU count); the result is the same.
    ``workers=None``: :func:`default_workers`.
    """
    if batch_size is None:
        batch_size = default_batch(plan, resamples)
    gens = block_generators(seed, resamples)
    bounds = [(j * BLOCK, min(resamples, (j + 1) * BLOCK)) for j in range(len(gens))]
    if workers is None:
        workers = default_workers(plan)
    workers = max(1, min(int(workers), os.cpu_count() or 1, len(bounds) or 1))
    # Each block is drawn whole (its draws do not depend on how it is cut into batches);
    # blocks are then cut into batches of ``batch_size``.
    done = 0
    executor = ThreadPoolExecutor(workers) if workers > 1 else None

    def draw(j):
        lo, hi = bounds[j]
        arr = np.empty((plan.k, plan.n_strata, hi - lo))
        _fill_block(plan, gens[j], arr)
        return arr

    try:
        if executor is not None:  # a bounded window of blocks in flight, consumed in order
            def blocks_iter():
                window = deque()
                for j in range(len(gens)):
                    window.append(executor.submit(draw, j))
                    if len(window) > 2 * workers:
                        yield window.popleft().result()
                while window:
                    yield window.popleft().result()
            blocks = blocks_iter()
        else:
            blocks = (draw(j) for j in range(len(gens)))
        buffered = []
        have = 0
        for arr in blocks:
            buffered.append(arr)
            have += arr.shape[2]
            while have >= batch_size or (have > 0 and done + have == resamples):
                cat = np.concatenate(buffered, axis=2) if len(buffered) > 1 else buffered[0]
                take = min(batch_size, have)
                chunk, rest = cat[:, :, :take], cat[:, :, take:]
                buffered = [rest] if rest.shape[2] else []
                have -= take
                yield done, done + take, chunk
                done += take
                if progress is not None:
                    progress(done, resamples)
    finally:
        if executor is not None:
            executor.shutdown(wait=True)
