"""The caliper graph of the matching and its solution, piece by piece (private to matching.py).

The graph is built from the sorted reference logits: each exposed unit keeps its ``L`` nearest
reference units within the caliper (a window of ``L`` positions on either side of its
insertion point holds them). The objective (most pairs, then least total distance) adds up over
the connected pieces of that graph, so each piece is solved on its own by
:func:`scipy.sparse.csgraph.min_weight_full_bipartite_matching`; see ``matching.py`` for the
edge weights and the private "unmatched" columns.
"""

from __future__ import annotations

import numpy as np
from scipy import sparse
from scipy.sparse.csgraph import connected_components, min_weight_full_bipartite_matching

__all__ = ["match_group"]


def _candidates(le, lr, width, L):
    """Per exposed logit, up to L nearest reference positions (sorted ``lr``) within ``width``.

    Returns (rows, cols, dist) of the kept pairs. The L nearest of a sorted array lie among
    the L positions on either side of the insertion point.
    """
    L = min(L, lr.size)
    pos = np.searchsorted(lr, le)
    window = pos[:, None] + np.arange(-L, L)[None, :]
    valid = (window >= 0) & (window < lr.size)
    idx = np.clip(window, 0, lr.size - 1)
    dist = np.where(valid, np.abs(le[:, None] - lr[idx]), np.inf)
    dist = np.where(dist <= width, dist, np.inf)
    part = np.argpartition(dist, L - 1, axis=1)[:, :L]
    idx = np.take_along_axis(idx, part, axis=1)
    dist = np.take_along_axis(dist, part, axis=1)
    ok = np.isfinite(dist)
    rows = np.broadcast_to(np.arange(le.size)[:, None], ok.shape)[ok]
    return rows, idx[ok], dist[ok]


def match_group(logit, e, r, K, C, sd, width, nearest):
    """Optimal matching of exposed ``e`` to reference ``r`` (indices); [(exposed, reference)].

    The objective adds up over the connected pieces of the caliper graph, so each piece is
    solved on its own (the solver's work grows faster than the size of a piece).
    """
    r = r[np.argsort(logit[r], kind="stable")]
    rows, cols, dist = _candidates(logit[e], logit[r], width, nearest * K)
    has = np.zeros(e.size, dtype=bool)
    has[rows] = True
    lonely = int((~has).sum())
    if not has.any():
        return [], 0, 0, lonely
    keep = np.flatnonzero(has)                 # exposed units with an edge, renumbered
    renum = np.full(e.size, -1)
    renum[keep] = np.arange(keep.size)
    rows = renum[rows]
    used, cols = np.unique(cols, return_inverse=True)   # reference units with an edge
    r = r[used]
    m, nr = keep.size, r.size
    weight = 1.0 + (dist / sd if sd > 0 else np.zeros_like(dist))  # +1: a tie keeps its edge
    adj = sparse.csr_matrix((np.ones(rows.size), (rows, cols)), shape=(m, nr))
    n_piece, piece = connected_components(sparse.bmat([[None, adj], [adj.T, None]]),
                                          directed=False)
    pe, pr = piece[:m], piece[m:]
    e_order, r_order = np.argsort(pe, kind="stable"), np.argsort(pr, kind="stable")
    e_cut = np.searchsorted(pe[e_order], np.arange(n_piece + 1))
    r_cut = np.searchsorted(pr[r_order], np.arange(n_piece + 1))
    e_local = np.empty(m, dtype=np.int64)
    e_local[e_order] = np.arange(m) - e_cut[pe[e_order]]
    r_local = np.empty(nr, dtype=np.int64)
    r_local[r_order] = np.arange(nr) - r_cut[pr[r_order]]
    edge_order = np.argsort(pe[rows], kind="stable")
    edge_cut = np.searchsorted(pe[rows][edge_order], np.arange(n_piece + 1))
    pairs = []
    for c in range(n_piece):
        ed = edge_order[edge_cut[c]:edge_cut[c + 1]]
        mc, rc = int(e_cut[c + 1] - e_cut[c]), int(r_cut[c + 1] - r_cut[c])
        got = _solve_piece(e_local[rows[ed]], r_local[cols[ed]], weight[ed], mc, rc, K, C)
        for i, j in got:
            pairs.append((int(e[keep[e_order[e_cut[c] + i]]]), int(r[r_order[r_cut[c] + j]])))
    return pairs, int(rows.size * K), int(m * K), lonely


def _solve_piece(rows, cols, weight, m, nr, K, C):
    """One minimum-weight full bipartite matching: K slots per exposed unit (rows k * m + i),
    the nr reference columns, and a private unmatched column per slot."""
    N = m * K
    price = N * (1.0 + C) + 1.0                        # above any N matched edges
    all_rows = np.concatenate(((np.arange(K)[:, None] * m + rows[None, :]).ravel(),
                               np.arange(N)))
    all_cols = np.concatenate((np.tile(cols, K), nr + np.arange(N)))
    all_w = np.concatenate((np.tile(weight, K), np.full(N, price)))
    graph = sparse.csr_matrix((all_w, (all_rows, all_cols)), shape=(N, nr + N))
    assigned = min_weight_full_bipartite_matching(graph)[1]
    real = np.flatnonzero(assigned < nr)
    return list(zip((real % m).tolist(), assigned[real].tolist()))
