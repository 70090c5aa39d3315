"""Subclassification on the propensity score.

Units are grouped into strata of similar scores; comparisons are then made within strata and
combined with the estimand's stratum weights. Three ways to form strata: score quantiles (five
by default, after Cochran 1968), a data-driven split that keeps halving blocks while the
linearized score is still imbalanced inside them (Imbens & Rubin 2015, ch. 13), or strata given
by the user (matched sets, say), which are kept exactly as given.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field

import numpy as np

from .._base.layout import ESTIMANDS, StratumLayout
from ..errors import InputError, StrataWarning
from .scores import check_score

__all__ = ["Strata", "make_strata", "stratum_weights", "unit_weights", "METHODS"]

METHODS = ("quantile", "adaptive")
#: Our default t-statistic threshold for the data-driven split: the two-sided 5 % normal
#: critical value, the value used by Imbens & Rubin (2015, ch. 13) (from memory).
T_MAX_DEFAULT = 1.96


@dataclass(frozen=True)
class Strata:
    """Stratum labels and their description.

    Attributes
    ----------
    labels : ndarray of int64 (n,)
        Stratum of each unit, ``0..S-1``; ``-1`` = set aside (user strata lacking a group).
    n_strata : int
        Number of strata used, ``S``.
    table : list of dict
        One entry per stratum: ``stratum, score_low, score_high, n_exposed, n_reference, n,
        weight`` (the estimand's stratum weight) and, for user strata, ``given_label``.
    merges : list of str
        Every merge of adjacent strata, in plain words.
    method : str
        ``"quantile"``, ``"adaptive"`` or ``"user"``.
    settings : dict
        Thresholds and choices used (requested strata, min_per_group, t_max, min_block, ...).
    set_aside : dict
        Units set aside per group (user strata lacking a group).
    estimand : str
    cut_points : list of float
        Interior score cut points (quantile and adaptive methods).
    notes : list of str
        Other decisions (tied cut points, where the adaptive split stopped and why).
    """

    labels: np.ndarray
    n_strata: int
    table: list
    merges: list
    method: str
    settings: dict
    set_aside: dict
    estimand: str = "ate"
    cut_points: list = field(default_factory=list)
    notes: list = field(default_factory=list)

    def to_dict(self) -> dict:
        """JSON-ready description (per-unit labels are left out)."""
        return {
            "n_strata": int(self.n_strata),
            "method": self.method,
            "estimand": self.estimand,
            "table": [dict(row) for row in self.table],
            "merges": list(self.merges),
            "settings": dict(self.settings),
            "set_aside": {k: int(v) for k, v in self.set_aside.items()},
            "cut_points": [float(c) for c in self.cut_points],
            "notes": list(self.notes),
        }


def _check_int(value, name, minimum):
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < minimum:
        raise InputError(f"`{name}` must be an integer >= {minimum}, got {value!r}")
    return int(value)


def make_strata(score, t, *, estimand, n_strata=5, method="quantile", min_per_group=3,
                user_labels=None, logit=None, t_max=T_MAX_DEFAULT, min_block=3) -> Strata:
    """Form strata on the propensity score.

    Parameters
    ----------
    score : array_like (n,)
        Propensity scores (any increasing transform gives the same quantile strata).
    t : array_like (n,)
        Exposure, 1 = exposed, 0 = reference.
    estimand : {"ate", "att"}
        Decides where quantile cut points come from (pooled scores for the ATE, the exposed
        group's scores for the ATT) and the stratum weights in ``table``.
    n_strata : int, default 5
        Number of quantile strata requested.
    method : {"quantile", "adaptive"}, default "quantile"
    min_per_group : int, default 3
        Quantile strata with fewer units of either group are merged with a neighbour; the
        adaptive split only splits when each half keeps this many of each group.
    user_labels : array_like (n,) or None
        Strata given by the user; kept as given (no merging), strata lacking a group set aside.
    logit : array_like (n,) or None
        Linearized score for the adaptive split (computed from ``score`` when None).
    t_max : float, default 1.96
        Adaptive split: a block is split while the |t|-statistic of the difference in mean
        linearized score between the groups exceeds ``t_max``.
    min_block : int, default 3
        Adaptive split: minimum units in each new block. Imbens & Rubin use K + 2 for K
        covariates; pass ``len(design_names) + 2`` to follow them.

    Returns
    -------
    Strata

    Notes
    -----
    Quantile strata are intervals ``(c_{j-1}, c_j]`` between distinct cut points; tied cut
    points are collapsed (and reported). A stratum with fewer than ``min_per_group`` units of a
    group is merged into its neighbour with fewer units, repeatedly, the most deficient first.

    The adaptive split follows Imbens & Rubin (2015, section 13.5): start with one block; in a
    block compute ``t = (mean l1 - mean l0) / sqrt(s2 (1/n1 + 1/n0))`` with ``s2`` the pooled
    within-group variance of the logit ``l``; if ``|t| > t_max`` split the block at its median
    score, provided both halves keep ``min_per_group`` units of each group and ``min_block``
    units in all; repeat on every new block.

    References
    ----------
    Cochran WG (1968). The effectiveness of adjustment by subclassification in removing bias in
    observational studies. Biometrics 24:295-313.
    Rosenbaum PR, Rubin DB (1984). Reducing bias in observational studies using
    subclassification on the propensity score. JASA 79:516-524.
    Imbens GW, Rubin DB (2015). Causal Inference for Statistics, Social, and Biomedical
    Sciences. Cambridge University Press, ch. 13 and 17.
    """
    score, t = check_score(score, t, probabilities=False)
    estimand = str(estimand).lower()
    if estimand not in ("ate", "att"):
        raise InputError(f"`estimand` must be 'ate' or 'att', got {estimand!r}")
    min_per_group = _check_int(min_per_group, "min_per_group", 1)
    if user_labels is not None:
        return _user_strata(score, t, estimand, user_labels)
    if method not in METHODS:
        raise InputError(f"strata `method` must be one of {', '.join(METHODS)}, got {method!r}")
    n, n1 = t.size, int(t.sum())
    n0 = n - n1
    if min(n1, n0) < min_per_group:
        raise InputError(f"only {n1} exposed and {n0} reference units to stratify; each stratum "
                         f"needs min_per_group={min_per_group} of each group: lower "
                         "`min_per_group` or revisit the overlap rule")
    if method == "adaptive":
        return _adaptive(score, t, estimand, logit, float(t_max), min_per_group,
                         _check_int(min_block, "min_block", 1))
    n_strata = _check_int(n_strata, "n_strata", 1)
    supported = max(1, min(n // (2 * min_per_group), min(n1, n0) // 2))
    if n_strata > supported:
        raise InputError(
            f"`n_strata={n_strata}` is more than the data support: {n1} exposed and {n0} "
            f"reference units allow at most {supported} {'stratum' if supported == 1 else 'strata'} "
            f"(at least {min_per_group} units "
            f"of each group per stratum, 2 at the very least); use `n_strata={supported}` or fewer")
    if n_strata == 1:
        warnings.warn("`n_strata=1`: one stratum, so there is no subclassification on the score; "
                      "the comparison rests on the covariance adjustment alone", StrataWarning,
                      stacklevel=2)
    return _quantile(score, t, estimand, n_strata, min_per_group)


def _quantile(score, t, estimand, n_strata, min_per_group):
    base = score if estimand == "ate" else score[t == 1]  # ATT: exposed scores (common practice)
    edges = np.quantile(base, np.arange(1, n_strata) / n_strata)
    cuts = np.unique(edges)
    notes, merges = [], []
    if cuts.size < edges.size:
        notes.append(f"tied score quantiles: only {cuts.size} distinct cut points for "
                     f"{n_strata} strata, so at most {cuts.size + 1} strata")
    raw = np.searchsorted(cuts, score, side="left")  # stratum j holds (c_{j-1}, c_j]
    _, labels = np.unique(raw, return_inverse=True)  # drop empty strata
    labels = labels.astype(np.int64)
    if np.unique(raw).size < cuts.size + 1:
        notes.append("some score intervals were empty and were dropped")
    while True:
        S = int(labels.max()) + 1
        n1 = np.bincount(labels, weights=t, minlength=S).astype(int)
        n0 = np.bincount(labels, minlength=S) - n1
        short = np.minimum(n1, n0)
        if S == 1 or short.min() >= min_per_group:
            break
        s = int(np.argmin(short))  # the most deficient stratum first
        if s == 0:
            nb = 1
        elif s == S - 1:
            nb = S - 2
        else:
            nb = s - 1 if n1[s - 1] + n0[s - 1] <= n1[s + 1] + n0[s + 1] else s + 1
        lo_s, hi_s = _range(score, labels == s)
        lo_b, hi_b = _range(score, labels == nb)
        merges.append(
            f"strata with scores [{lo_s:.4g}, {hi_s:.4g}] and [{lo_b:.4g}, {hi_b:.4g}] merged: "
            f"the first had {n1[s]} exposed and {n0[s]} reference units, fewer than "
            f"min_per_group={min_per_group} of a group")
        labels[labels == s] = nb
        _, labels = np.unique(labels, return_inverse=True)
        labels = labels.astype(np.int64)
    if merges:
        warnings.warn(f"{len(merges)} merge(s) of adjacent score strata (fewer than "
                      f"{min_per_group} units of a group); {int(labels.max()) + 1} strata remain: "
                      + "; ".join(merges), StrataWarning, stacklevel=3)
    if cuts.size < edges.size:  # the empty-interval note that may follow is not warned about
        warnings.warn(notes[0], StrataWarning, stacklevel=3)
    S = int(labels.max()) + 1
    kept_cuts = [float(c) for c in cuts
                 if np.any(score <= c) and np.any(score > c) and _separates(score, labels, c)]
    settings = {"n_strata_requested": n_strata, "min_per_group": min_per_group,
                "cut_points_from": "pooled scores" if estimand == "ate" else "exposed scores"}
    return Strata(labels=labels, n_strata=S, table=_table(score, t, labels, estimand),
                  merges=merges, method="quantile", settings=settings,
                  set_aside={"exposed": 0, "reference": 0}, estimand=estimand,
                  cut_points=kept_cuts, notes=notes)


def _separates(score, labels, c):
    """True when cut point ``c`` is a boundary between two strata after merging."""
    return labels[score <= c].max() < labels[score > c].min()


def _range(score, mask):
    return float(score[mask].min()), float(score[mask].max())


def _adaptive(score, t, estimand, logit, t_max, min_per_group, min_block):
    if not np.isfinite(t_max) or t_max <= 0:
        raise InputError(f"`t_max` must be a positive number, got {t_max!r}")
    if logit is None:
        s = np.clip(score, 1e-6, 1 - 1e-6)
        logit = np.log(s / (1 - s))
    logit = np.asarray(logit, dtype=np.float64)
    if logit.shape != score.shape or not np.all(np.isfinite(logit)):
        raise InputError("`logit` must be finite and one per unit; pass the score model's logit")
    notes = []
    stack, final = [np.arange(score.size)], []
    while stack:
        idx = stack.pop()
        tstat = _block_t(logit[idx], t[idx])
        lo, hi = float(score[idx].min()), float(score[idx].max())
        if abs(tstat) <= t_max:
            final.append(idx)
            continue
        halves = _median_split(idx, score, t, min_per_group, min_block)
        if halves is None:
            notes.append(f"block [{lo:.4g}, {hi:.4g}] kept whole with |t| = {abs(tstat):.2f} > "
                         f"{t_max:g}: a split at the median would leave fewer than "
                         f"{min_per_group} units of a group or {min_block} units in a half")
            final.append(idx)
            continue
        stack.extend(halves)
    final.sort(key=lambda ix: score[ix].min())
    labels = np.empty(score.size, dtype=np.int64)
    for s, idx in enumerate(final):
        labels[idx] = s
    cuts = [float(score[ix].max()) for ix in final[:-1]]
    settings = {"t_max": t_max, "min_per_group": min_per_group, "min_block": min_block,
                "t_statistic": "pooled-variance t of the mean logit difference",
                "split_at": "median score of the block"}
    return Strata(labels=labels, n_strata=len(final), table=_table(score, t, labels, estimand),
                  merges=[], method="adaptive", settings=settings,
                  set_aside={"exposed": 0, "reference": 0}, estimand=estimand, cut_points=cuts,
                  notes=notes)


def _block_t(l, t):
    """Pooled-variance t-statistic of the mean linearized score, exposed minus reference."""
    l1, l0 = l[t == 1], l[t == 0]
    n1, n0 = l1.size, l0.size
    if n1 < 2 or n0 < 2:
        return 0.0
    s2 = ((n1 - 1) * l1.var(ddof=1) + (n0 - 1) * l0.var(ddof=1)) / (n1 + n0 - 2)
    diff = l1.mean() - l0.mean()
    if s2 <= 0:
        return 0.0 if diff == 0 else np.inf
    return float(diff / np.sqrt(s2 * (1.0 / n1 + 1.0 / n0)))  # Imbens & Rubin 2015, sec. 13.5


def _median_split(idx, score, t, min_per_group, min_block):
    e = score[idx]
    med = np.median(e)
    for lower in (e <= med, e < med):
        a, b = idx[lower], idx[~lower]
        if all(ix.size >= min_block and t[ix].sum() >= min_per_group
               and ix.size - t[ix].sum() >= min_per_group for ix in (a, b)):
            return [a, b]
    return None


def _user_strata(score, t, estimand, user_labels):
    given = np.asarray(user_labels)
    if given.shape != t.shape:
        raise InputError(f"`strata_column` has {given.size} values for {t.size} units")
    values, inv = np.unique(given, return_inverse=True)
    S0 = values.size
    n1 = np.bincount(inv, weights=t, minlength=S0).astype(int)
    n0 = np.bincount(inv, minlength=S0) - n1
    usable = (n1 > 0) & (n0 > 0)
    if not usable.any():
        raise InputError(f"`strata_column`: none of the {S0} given strata holds both exposed "
                         "and reference units; check the column (it should group comparable "
                         "units of both groups)")
    new = np.full(S0, -1, dtype=np.int64)
    new[usable] = np.arange(int(usable.sum()))
    labels = new[inv]
    out = labels < 0
    set_aside = {"exposed": int(t[out].sum()), "reference": int(out.sum() - t[out].sum())}
    if out.any():
        warnings.warn(
            f"{int((~usable).sum())} of {S0} given strata lack one group and were set aside "
            f"({set_aside['exposed']} exposed, {set_aside['reference']} reference units)",
            StrataWarning, stacklevel=3)
    table = _table(score, t, labels, estimand)
    for row, value in zip(table, values[usable]):
        row["given_label"] = value.item() if hasattr(value, "item") else value
    settings = {"given_strata": int(S0), "usable_strata": int(usable.sum()),
                "merging": "none (user strata kept as given)"}
    return Strata(labels=labels, n_strata=int(usable.sum()), table=table, merges=[],
                  method="user", settings=settings, set_aside=set_aside, estimand=estimand)


def _table(score, t, labels, estimand):
    _, layout = _checked_layout(labels, t, estimand)
    rows = []
    for s in range(layout.n_strata):
        m = labels == layout.ids[s]
        rows.append({"stratum": s, "score_low": float(score[m].min()),
                     "score_high": float(score[m].max()), "n_exposed": int(layout.n1[s]),
                     "n_reference": int(layout.n0[s]), "n": int(layout.n[s]),
                     "weight": float(layout.weights[s])})
    return rows


def _checked_layout(labels, t, estimand):
    """Rows in a stratum (label >= 0) and their layout, after checking the arguments."""
    labels = np.asarray(labels)
    t = np.asarray(t)
    if labels.shape != t.shape:
        raise InputError(f"`labels` and `t` must have equal length, got {labels.shape} and "
                         f"{t.shape}")
    ok = labels >= 0
    if not ok.any():
        raise InputError("no unit is in a stratum (all labels are -1)")
    est = str(estimand).lower()
    if est not in ESTIMANDS:
        raise InputError(f"`estimand` must be 'ate' or 'att', got {estimand!r}")
    return ok, StratumLayout.build(labels[ok], t[ok], est)


def _by_label(layout, a):
    """Per-stratum values indexed by label 0..max (a label with no unit gets 0)."""
    out = np.zeros(int(layout.ids.max()) + 1)
    out[layout.ids] = a
    return out


def stratum_weights(labels, t, estimand) -> np.ndarray:
    """Stratum weights of the estimand: ATE ``n_s / n``, ATT ``n1_s / n1`` (summing to 1).

    Indexed by label ``0..max(labels)``; units labelled -1 are ignored. A thin wrapper over
    :class:`stratagap._base.layout.StratumLayout`, the one home of these weights.
    """
    _, layout = _checked_layout(labels, t, estimand)
    return _by_label(layout, layout.weights)


def unit_weights(labels, t, estimand) -> np.ndarray:
    """Per-unit weights so that weighted group means are the stratum-weighted means.

    An exposed unit in stratum ``s`` gets ``w_s / n1_s``, a reference unit ``w_s / n0_s``;
    units labelled -1 get 0. The weights of each group sum to 1 (see
    :meth:`stratagap._base.layout.StratumLayout.unit_weights`).
    """
    ok, layout = _checked_layout(labels, t, estimand)
    n1, n0 = _by_label(layout, layout.n1), _by_label(layout, layout.n0)
    if np.any(n1 == 0) or np.any(n0 == 0):
        bad = int(np.flatnonzero((n1 == 0) | (n0 == 0))[0])
        raise InputError(f"stratum {bad} lacks one group; every stratum needs exposed and "
                         "reference units (set it aside with label -1)")
    out = np.zeros(ok.size)
    out[ok] = layout.unit_weights(np.asarray(t)[ok])
    return out
