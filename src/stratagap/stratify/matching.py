"""Matched sets built on the logit of the propensity score.

Each exposed unit is given up to ``K`` reference units (default 1), without replacement, whose
logit of the score lies within a caliper of ``C`` times the pooled standard deviation of the
logit, sqrt((s1^2 + s0^2) / 2) (default C = 0.2; Austin 2011), optionally only among reference
units with the same values of named columns. Among all such matchings the one chosen first
covers every exposed slot it can (the largest number of matched pairs), then has the smallest
total logit distance.

Optimality comes from one minimum-weight full bipartite matching
(:func:`scipy.sparse.csgraph.min_weight_full_bipartite_matching`) per connected piece of the
caliper graph within each group of equal values (built and solved in ``_caliper_graph.py``):

* rows are exposed slots (each exposed unit repeated K times), columns the reference units plus
  one private "unmatched" column per slot;
* an edge within the caliper weighs 1 + gap / SD (the +1 keeps an exact tie, whose gap is 0,
  as an edge: the sparse solver reads an explicit zero as no edge);
* the unmatched column costs N (1 + C) + 1 for N slots, more than any N matched edges, so a
  matching with one more pair is always cheaper; among equally many pairs the cost is the
  number of pairs plus the total gap.

Scale: a caliper of 0.2 SD can join one exposed unit to a great many reference units, so the
graph keeps each exposed unit's ``20 K`` nearest reference units within the caliper (found in the
sorted logits), and the solution is optimal on that graph; the graph's size is recorded.

Nothing here looks at the outcome.

References
----------
Austin PC (2011). Optimal caliper widths for propensity-score matching when estimating
differences in means and differences in proportions in observational studies. Pharmaceutical
Statistics 10:150-161.
Rosenbaum PR (1989). Optimal matching for observational studies. JASA 84:1024-1032.
Crouse DF (2016). On implementing 2D rectangular assignment algorithms. IEEE Transactions on
Aerospace and Electronic Systems 52:1679-1696 (the solver behind scipy's routine).
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace

import numpy as np

from .._base.jsonable import fields_dict
from ..errors import InputError
from ._caliper_graph import match_group
from .balance import balance_table
from .strata import Strata

__all__ = ["Matching", "match_on_score", "DEFAULT_CALIPER_SD", "DEFAULT_PER_EXPOSED",
           "NEAREST_PER_SLOT"]

#: Caliper in pooled SDs of the logit of the score (Austin 2011).
DEFAULT_CALIPER_SD = 0.2
#: Reference units per exposed unit (pair matching).
DEFAULT_PER_EXPOSED = 1
#: Reference units kept per exposed slot in the caliper graph (the graph's size bound).
NEAREST_PER_SLOT = 20

_REASONS = {
    "no_reference_with_same_values": "no reference unit has the same values of the "
                                     "`same_value_on` columns",
    "none_within_caliper": "no reference unit lies within the caliper",
    "candidates_used_by_others": "every reference unit within its caliper went to another "
                                 "exposed unit (so that more exposed units, or closer pairs, "
                                 "are matched)",
}


@dataclass(frozen=True)
class Matching:
    """The matched sets and the facts of how they were built (the ``matching`` block).

    Attributes
    ----------
    labels : ndarray of int64 (n,)
        Matched set of each unit, ``0..M-1`` in the order of the exposed units' rows; ``-1`` for
        exposed units left unmatched and reference units not used. Not in ``to_dict()``.
    gap : ndarray of float (n,)
        For a matched reference unit, its logit's distance to its exposed unit's; 0 for a
        matched exposed unit; NaN otherwise. Not in ``to_dict()``.
    per_exposed, caliper_sd, caliper, pooled_sd, same_value_on
        The settings, the caliper on the logit scale and the pooled SD it came from.
    n_exposed, n_reference : int
        Units offered to the matching.
    matched_exposed, reference_used : int
    unmatched_exposed : dict
        Exposed units left unmatched, by reason (keys of ``reasons``).
    matches_per_exposed : dict
        Number of exposed units with k reference units, for k = 1..K.
    total_gap, mean_gap, max_gap : float
        Logit distances over the matched pairs.
    graph : dict
        Size of the caliper graph the optimum is taken on and the words that say so.
    """

    labels: np.ndarray = field(repr=False)
    gap: np.ndarray = field(repr=False)
    per_exposed: int
    caliper_sd: float
    caliper: float
    pooled_sd: float
    same_value_on: list
    n_exposed: int
    n_reference: int
    matched_exposed: int
    reference_used: int
    unmatched_exposed: dict
    matches_per_exposed: dict
    total_gap: float
    mean_gap: float
    max_gap: float
    graph: dict
    estimand: str = "effect in the matched exposed units"
    reasons: dict = field(default_factory=lambda: dict(_REASONS))

    @property
    def n_sets(self) -> int:
        return int(self.matched_exposed)

    def to_dict(self) -> dict:
        out = fields_dict(self)
        del out["labels"], out["gap"]
        return out


def _check(logit, t, per_exposed, caliper_sd, same_value, nearest):
    logit = np.asarray(logit, dtype=np.float64)
    t = np.asarray(t)
    if logit.ndim != 1 or t.shape != logit.shape:
        raise InputError(f"`logit` and `t` must be 1-D of one length, got {logit.shape} and "
                         f"{t.shape}")
    if not np.isfinite(logit).all():
        raise InputError("`logit` has missing or infinite values; pass the score model's logit")
    if not np.isin(t, (0, 1)).all():
        raise InputError("`t` must hold only 0 (reference) and 1 (exposed)")
    if isinstance(per_exposed, bool) or not isinstance(per_exposed, (int, np.integer)) \
            or per_exposed < 1:
        raise InputError(f"`per_exposed` must be a whole number >= 1, got {per_exposed!r}")
    n1 = int(t.sum())
    n0 = t.size - n1
    if n1 == 0 or n0 == 0:
        raise InputError(f"matching needs both groups; got {n1} exposed and {n0} reference "
                         "units")
    if per_exposed * n1 > n0:
        raise InputError(f"`per_exposed={per_exposed}` asks for {per_exposed * n1:,} reference "
                         f"units for {n1:,} exposed units but only {n0:,} are available "
                         f"without replacement; use `per_exposed={max(1, n0 // n1)}` or fewer")
    try:
        caliper_sd = float(caliper_sd)
    except (TypeError, ValueError):
        raise InputError(f"`caliper_sd` must be a positive number, got {caliper_sd!r}") from None
    if not np.isfinite(caliper_sd) or caliper_sd <= 0:
        raise InputError(f"`caliper_sd` must be a positive number of pooled SDs of the logit "
                         f"(0.2 is the usual choice), got {caliper_sd!r}")
    if same_value is None:
        codes = np.zeros(t.size, dtype=np.int64)
    else:
        same_value = np.asarray(same_value)
        if same_value.ndim == 1:
            same_value = same_value[:, None]
        if same_value.shape[0] != t.size:
            raise InputError(f"`same_value` has {same_value.shape[0]} rows for {t.size} units")
        codes = np.unique(same_value, axis=0, return_inverse=True)[1].ravel().astype(np.int64)
    if isinstance(nearest, bool) or not isinstance(nearest, (int, np.integer)) or nearest < 1:
        raise InputError(f"`nearest` must be a whole number >= 1, got {nearest!r}")
    return logit, t.astype(np.int8), int(per_exposed), caliper_sd, codes, int(nearest)


def pooled_logit_sd(logit, t) -> float:
    """sqrt((s1^2 + s0^2) / 2), the SD the caliper is measured in (Austin 2011)."""
    var = [np.var(logit[t == g], ddof=1) if np.sum(t == g) > 1 else 0.0 for g in (1, 0)]
    return float(np.sqrt((var[0] + var[1]) / 2.0))  # Austin 2011, sec. 2


def match_on_score(logit, t, *, per_exposed=DEFAULT_PER_EXPOSED, caliper_sd=DEFAULT_CALIPER_SD,
                   same_value=None, same_value_on=(), nearest=NEAREST_PER_SLOT) -> Matching:
    """Optimal matching on the logit of the score within a caliper, without replacement.

    Parameters
    ----------
    logit : array_like (n,)
        Logit of the propensity score.
    t : array_like (n,)
        1 exposed, 0 reference.
    per_exposed : int, default 1
        K, reference units per exposed unit (1:K matching).
    caliper_sd : float, default 0.2
        Caliper in pooled SDs of the logit (Austin 2011).
    same_value : array_like (n,) or (n, k), optional
        Values that matched units must share (exact agreement); a missing value is a value of
        its own.
    same_value_on : sequence of str
        Names of those columns, for the record.
    nearest : int, default 20
        Reference units kept per exposed slot in the caliper graph: each exposed unit keeps
        its ``nearest * K`` nearest reference units within the caliper.

    Returns
    -------
    Matching

    Notes
    -----
    First the number of matched pairs is the largest possible, then the total logit distance
    is the smallest, over all matchings on the caliper graph (every pair within the caliper
    when ``nearest * K`` covers the reference units within each exposed unit's caliper). With
    K > 1 the number maximized is the number of pairs, so an exposed unit may get fewer than K.
    """
    logit, t, K, C, codes, nearest = _check(logit, t, per_exposed, caliper_sd, same_value,
                                            nearest)
    sd = pooled_logit_sd(logit, t)
    width = C * sd
    n = t.size
    labels = np.full(n, -1, dtype=np.int64)
    gap = np.full(n, np.nan)
    partner = np.full(n, -1, dtype=np.int64)   # reference unit -> its exposed unit
    reason = {k: 0 for k in _REASONS}
    edges_total = rows_total = 0
    for g in np.unique(codes):
        members = np.flatnonzero(codes == g)
        e = members[t[members] == 1]
        r = members[t[members] == 0]
        if e.size == 0:
            continue
        if r.size == 0:
            reason["no_reference_with_same_values"] += int(e.size)
            continue
        got, n_edges, n_rows, lonely = match_group(logit, e, r, K, C, sd, width, nearest)
        reason["none_within_caliper"] += lonely
        edges_total += n_edges
        rows_total += n_rows
        for ex, ref in got:
            partner[ref] = ex
    matched_ref = np.flatnonzero(partner >= 0)
    counts = np.bincount(partner[matched_ref], minlength=n)
    exposed_matched = np.flatnonzero(counts > 0)
    labels[exposed_matched] = np.arange(exposed_matched.size)
    labels[matched_ref] = labels[partner[matched_ref]]
    gap[exposed_matched] = 0.0
    gap[matched_ref] = np.abs(logit[matched_ref] - logit[partner[matched_ref]])
    n1 = int(t.sum())
    reason["candidates_used_by_others"] = (n1 - exposed_matched.size
                                           - reason["none_within_caliper"]
                                           - reason["no_reference_with_same_values"])
    per = np.bincount(counts[exposed_matched], minlength=K + 1)
    gaps = gap[matched_ref]
    return Matching(
        labels=labels, gap=gap, per_exposed=K, caliper_sd=C, caliper=float(width),
        pooled_sd=sd, same_value_on=list(same_value_on), n_exposed=n1,
        n_reference=int(n - n1), matched_exposed=int(exposed_matched.size),
        reference_used=int(matched_ref.size), unmatched_exposed=reason,
        matches_per_exposed={str(k): int(per[k]) for k in range(1, K + 1)},
        total_gap=float(gaps.sum()), mean_gap=float(gaps.mean()) if gaps.size else float("nan"),
        max_gap=float(gaps.max()) if gaps.size else float("nan"),
        graph={"nearest_per_slot": nearest, "slots": int(rows_total), "edges": int(edges_total),
               "optimal_on": (f"the caliper graph keeping each exposed unit's {nearest * K} "
                              "nearest reference units within the caliper"),
               "objective": "the most matched pairs, then the smallest total logit distance",
               "solver": "scipy.sparse.csgraph.min_weight_full_bipartite_matching"})


# ----------------------------------------------------------------------------- the study design
def matched_design(score, logit, t, keep, *, table, row_ids, per_exposed, caliper_sd,
                   same_value_on):
    """Matched sets of the rows kept by the overlap rule, as the strata of the analysis.

    Parameters
    ----------
    score, logit, t : arrays (n,)
        Score, its logit and the exposure of the prepared rows.
    keep : bool array (n,)
        Rows kept by the overlap rule; the matching uses only these.
    table, row_ids
        The input table and the prepared rows' positions in it (for ``same_value_on``).
    per_exposed, caliper_sd, same_value_on
        As in :class:`stratagap.spec.AnalysisSpec`.

    Returns
    -------
    (Matching, Strata)
        ``Strata.labels`` are the matched sets of the kept rows (``-1``: not matched), method
        ``"matched"``, weights of the effect in the matched exposed units (each set 1 / M).
    """
    same = None
    cols = list(same_value_on or ())
    if cols:
        missing = [c for c in cols if c not in table.columns]
        if missing:
            raise InputError(f"`same_value_on` names {', '.join(map(repr, missing))}, not a "
                             f"column of the data; columns include "
                             f"{', '.join(map(str, list(table.columns)[:8]))}")
        rows = table.iloc[np.asarray(row_ids)[keep]]
        # missing values: a value of their own (code -1)
        same = np.column_stack([rows[c].factorize()[0] for c in cols])
    t_kept = np.asarray(t)[keep]
    m = match_on_score(np.asarray(logit)[keep], t_kept, per_exposed=per_exposed,
                       caliper_sd=caliper_sd, same_value=same, same_value_on=cols)
    if m.matched_exposed == 0:
        raise InputError(f"`caliper_sd={caliper_sd:g}`: no exposed unit has a reference unit "
                         "within the caliper (or with the same `same_value_on` values); widen "
                         "the caliper or use `design=strata`")
    labels = m.labels
    table_rows = _set_table(np.asarray(score)[keep], t_kept, labels, m.n_sets)
    set_aside = {"exposed": int(m.n_exposed - m.matched_exposed),
                 "reference": int(m.n_reference - m.reference_used)}
    settings = {"per_exposed": m.per_exposed, "caliper_sd": m.caliper_sd,
                "same_value_on": list(cols), "merging": "none (matched sets kept as built)"}
    strata = Strata(labels=labels, n_strata=m.n_sets, table=table_rows, merges=[],
                    method="matched", settings=settings, set_aside=set_aside, estimand="att",
                    notes=[f"{m.matched_exposed} of {m.n_exposed} exposed units matched; the "
                           "estimand is the effect in the matched exposed units"])
    return m, strata


def _set_table(score, t, labels, n_sets):
    """One row per matched set (vectorized: sets can number in the hundreds of thousands)."""
    ok = labels >= 0
    lab, sc, tt = labels[ok], score[ok], t[ok]
    n = np.bincount(lab, minlength=n_sets)
    n1 = np.bincount(lab, weights=tt, minlength=n_sets).astype(int)
    lo = np.full(n_sets, np.inf)
    hi = np.full(n_sets, -np.inf)
    np.minimum.at(lo, lab, sc)
    np.maximum.at(hi, lab, sc)
    w = 1.0 / n_sets  # ATT weights n1_s / n1 with one exposed unit per set
    return [{"stratum": s, "score_low": float(lo[s]), "score_high": float(hi[s]),
             "n_exposed": int(n1[s]), "n_reference": int(n[s] - n1[s]), "n": int(n[s]),
             "weight": w} for s in range(n_sets)]


def matched_sets_rows(matching: Matching, t, row_ids, keep) -> dict:
    """Columns of the matched-set file, one row per matched unit, by set, exposed unit first:
    set, row (0-based row of the input file), group, logit_gap (0 for the exposed unit)."""
    kept = np.flatnonzero(keep)
    ok = np.flatnonzero(matching.labels >= 0)
    exposed = np.asarray(t)[kept][ok] == 1
    rows = np.asarray(row_ids)[kept][ok]
    order = np.lexsort((rows, ~exposed, matching.labels[ok]))
    return {"set": matching.labels[ok][order], "row": rows[order],
            "group": np.where(exposed[order], "exposed", "reference"),
            "logit_gap": matching.gap[ok][order]}


def population_label(base: str, matching: Matching) -> str:
    """The estimand's label with a matched design: the effect in the matched exposed units."""
    who = (f"the {matching.matched_exposed:,} matched exposed units (of "
           f"{matching.n_exposed:,} exposed offered to the matching)")
    return f"effect in {who}" if base == "ATT" else f"{base}, restricted to {who}"


def matched_balance(prepared, keep, used, weights, logit):
    """Balance before matching (every unit offered to it) and after (the matched sample).

    ``weights`` are the unit weights of the analysed rows ``used`` (matched units); units left
    out of the sets weigh 0 after matching.
    """
    kept = np.flatnonzero(keep)
    after = np.zeros(kept.size)
    after[np.searchsorted(kept, used)] = weights
    terms = [replace(term, values=None if term.values is None else term.values[kept])
             for term in prepared.terms]
    return balance_table(prepared.X[kept], prepared.t[kept], terms, weights_after=after,
                         logit=np.asarray(logit)[kept])
