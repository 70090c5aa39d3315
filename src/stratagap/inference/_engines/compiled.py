"""Compiled kernels of the random-byte threshold draw (numba), with their numpy twins.

The Monte Carlo engine (:mod:`stratagap.inference._engines.monte_carlo`) draws the smaller group of a stratum of
``n_s`` units by giving every unit one random byte per resample. This module holds the two
steps that touch every unit, in two implementations that give IDENTICAL results:

* :func:`thresholds`: per resample, the byte value ``c`` with ``#{u < c} <= m_s < #{u <= c}``
  (unique, since the counts increase with ``c``), the count below it and the count at it;
* :func:`masked_sums`: per resample, the drawn set (every unit with ``u < c`` plus the
  ``m_s - #{u < c}`` units at ``c`` with the smallest 64-bit random keys, ties of keys by
  position) and the sums of each value column over it.

The random numbers are always drawn by numpy (``Generator.bit_generator.random_raw``) in the
caller, so both implementations see the same streams. Both sum in ONE fixed order, so the
floating-point results are equal bit for bit: unit ``q`` goes to lane ``q mod 8``; each lane
adds its units in increasing ``q`` (from 0.0; numpy starts from the first unit, which
differs at most in the sign of an all-zero lane, equal under ``==``); the lanes are combined as
``((l0 + l1) + (l2 + l3)) + ((l4 + l5) + (l6 + l7))``. (Eight independent lanes let the
compiled loop run at about 0.45 ns per unit on the benchmark machine instead of about 4 ns
for one dependent chain; a numpy ``sum`` uses pairwise blocks whose order depends on the numpy
build, so it could not be matched.) The compiled kernels release the GIL (``nogil``), so
threads drawing different blocks of resamples run in parallel.

The compiled path is used when numba imports and the environment variable
``STRATAGAP_NO_JIT`` is not set to a non-empty value other than ``0``; otherwise the numpy
twins run (about 7x slower at n = 10^6: 17 against 2.4 ms per resample, one thread).
Compilation happens once per machine (``cache=True`` writes it next to the module's
``__pycache__``; about 2 s the first time).
"""

from __future__ import annotations

import os

import numpy as np

try:  # numba is optional at run time: the numpy twins give the same results
    import numba as _numba
except ImportError:  # pragma: no cover - exercised with STRATAGAP_NO_JIT in the tests
    _numba = None

LANES = 8


def jit_available() -> bool:
    """True when the compiled kernels are used (numba present, STRATAGAP_NO_JIT unset)."""
    flag = os.environ.get("STRATAGAP_NO_JIT", "")
    return _numba is not None and flag in ("", "0")


# ----------------------------------------------------------------------------- numpy twins
def thresholds_numpy(u: np.ndarray, m_s: int):
    """``(c, lt, nt)`` per row of ``u`` (h, n) uint8: threshold, count below, count at it."""
    h, n = u.shape
    c = np.full(h, (256 * m_s) // n, dtype=np.int64)
    while True:
        cu = c[:, None].astype(np.uint8)
        below = np.count_nonzero(u < cu, axis=1)
        at = np.count_nonzero(u == cu, axis=1)
        down, up = below > m_s, below + at <= m_s
        if not (down.any() or up.any()):
            return c, below.astype(np.int64), at.astype(np.int64)
        c = c - down + up  # usually 0-2 steps: the count is near its mean


def lane_sum_rows(x: np.ndarray) -> np.ndarray:
    """Sums of the rows of ``x`` (h, n) in the module's fixed order (8 lanes, then pairs)."""
    h, n = x.shape
    pad = (-n) % LANES
    if pad:
        x = np.concatenate([x, np.zeros((h, pad))], axis=1)
    z = x.reshape(h, -1, LANES)
    # Reducing the middle axis of a C-ordered (h, R, 8) array: numpy's inner loop runs along
    # the 8 lanes and adds row r into the accumulators for r = 0, 1, ...: sequential in each
    # lane (tests/inference/test_compiled.py checks it against a plain Python loop, bit for bit).
    lanes = np.add.reduce(z, axis=1)
    return (((lanes[:, 0] + lanes[:, 1]) + (lanes[:, 2] + lanes[:, 3]))
            + ((lanes[:, 4] + lanes[:, 5]) + (lanes[:, 6] + lanes[:, 7])))


def masked_sums_numpy(u, c, lt, nt, keys, m_s, vals):
    """Sums ``(k, h)`` of ``vals`` (k, n) over the drawn set of each row of ``u`` (h, n)."""
    h, n = u.shape
    cu = c[:, None].astype(np.uint8)
    keep = u < cu
    tied = np.flatnonzero(u == cu)  # row-major: row by row, positions increasing
    row = tied // n
    order = np.lexsort((keys, row))  # by row, then key; equal keys keep position order
    first = np.concatenate([[0], np.cumsum(nt)[:-1]])
    rank = np.arange(order.size) - first[row[order]]
    picked = order[rank < (m_s - lt)[row[order]]]
    keep.reshape(-1)[tied[picked]] = True
    out = np.empty((vals.shape[0], h))
    for j in range(vals.shape[0]):
        out[j] = lane_sum_rows(vals[j] * keep)
    return out


# ----------------------------------------------------------------------------- compiled
def _thresholds_py(u, m_s, c_out, lt_out, nt_out):
    h, n = u.shape
    for i in range(h):
        row = u[i]
        c = (256 * m_s) // n
        while True:
            lt = 0
            at = 0
            for q in range(n):
                x = row[q]
                lt += x < c
                at += x == c
            if lt > m_s:
                c -= 1
            elif lt + at <= m_s:
                c += 1
            else:
                break
        c_out[i] = c
        lt_out[i] = lt
        nt_out[i] = at


def _masked_sums_py(u, c, lt, nt, keys, m_s, vals, out):
    h, n = u.shape
    k = vals.shape[0]
    n8 = n - n % 8
    n64 = n - n % 64
    mask = np.empty(n, dtype=np.uint8)
    table = np.array([0.0, 1.0])  # a lookup, not a bool->float conversion: vectorizes
    kp = 0
    pos = np.empty(n, dtype=np.int64)
    for i in range(h):
        row = u[i]
        cu = np.uint8(c[i])
        need = m_s - lt[i]
        w = 0
        for q0 in range(0, n64, 64):  # the mask, and the positions of the units at byte c:
            hit = np.uint8(0)         # a vectorized any-equal test per 64 bytes (about 1 in 4
            for q in range(q0, q0 + 64):  # blocks holds one), then a scan of that block
                x = row[q]
                mask[q] = np.uint8(1) if x < cu else np.uint8(0)
                hit |= np.uint8(1) if x == cu else np.uint8(0)
            if hit:
                for z in range(q0, q0 + 64):
                    if row[z] == cu:
                        pos[w] = z
                        w += 1
        for z in range(n64, n):
            mask[z] = np.uint8(1) if row[z] < cu else np.uint8(0)
            if row[z] == cu:
                pos[w] = z
                w += 1
        if need > 0:
            order = np.argsort(keys[kp:kp + nt[i]], kind="mergesort")  # stable
            for z in range(need):
                mask[pos[order[z]]] = 1
        kp += nt[i]
        for j in range(k):
            v = vals[j]
            a0 = a1 = a2 = a3 = a4 = a5 = a6 = a7 = 0.0
            for q in range(0, n8, 8):
                a0 += v[q] * table[mask[q]]
                a1 += v[q + 1] * table[mask[q + 1]]
                a2 += v[q + 2] * table[mask[q + 2]]
                a3 += v[q + 3] * table[mask[q + 3]]
                a4 += v[q + 4] * table[mask[q + 4]]
                a5 += v[q + 5] * table[mask[q + 5]]
                a6 += v[q + 6] * table[mask[q + 6]]
                a7 += v[q + 7] * table[mask[q + 7]]
            rem = n - n8  # the tail joins lanes 0..rem-1, as in lane_sum_rows
            if rem > 0:
                a0 += v[n8] * table[mask[n8]]
            if rem > 1:
                a1 += v[n8 + 1] * table[mask[n8 + 1]]
            if rem > 2:
                a2 += v[n8 + 2] * table[mask[n8 + 2]]
            if rem > 3:
                a3 += v[n8 + 3] * table[mask[n8 + 3]]
            if rem > 4:
                a4 += v[n8 + 4] * table[mask[n8 + 4]]
            if rem > 5:
                a5 += v[n8 + 5] * table[mask[n8 + 5]]
            if rem > 6:
                a6 += v[n8 + 6] * table[mask[n8 + 6]]
            out[j, i] = ((a0 + a1) + (a2 + a3)) + ((a4 + a5) + (a6 + a7))


if _numba is not None:
    # no fastmath: the order of the additions is part of the result
    _thresholds_jit = _numba.njit(nogil=True, cache=True, boundscheck=False)(_thresholds_py)
    _masked_sums_jit = _numba.njit(nogil=True, cache=True, boundscheck=False)(_masked_sums_py)
else:  # pragma: no cover
    _thresholds_jit = _masked_sums_jit = None


def thresholds(u: np.ndarray, m_s: int, jit: bool):
    """``(c, lt, nt)`` (int64, per row of ``u``); compiled or numpy, same values."""
    if not jit:
        return thresholds_numpy(u, m_s)
    h = u.shape[0]
    c, lt, nt = (np.empty(h, dtype=np.int64) for _ in range(3))
    _thresholds_jit(u, m_s, c, lt, nt)
    return c, lt, nt


def masked_sums(u, c, lt, nt, keys, m_s, vals, jit: bool) -> np.ndarray:
    """Sums ``(k, h)`` over the drawn sets; compiled or numpy, bit-identical."""
    if not jit:
        return masked_sums_numpy(u, c, lt, nt, keys, m_s, vals)
    out = np.empty((vals.shape[0], u.shape[0]))
    _masked_sums_jit(u, c, lt, nt, keys, m_s, vals, out)
    return out
