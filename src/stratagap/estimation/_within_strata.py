"""Regression adjustment inside one stratum: Lin's interacted least squares with HC2 errors.

Private helper of :mod:`stratagap.estimation.effects`. One call fits one stratum and says which model it
used and why. The model ladder, tried in order until one is estimable:

1. covariate columns that are constant within the stratum, or constant except for a single unit
   (a rare dummy level, which would give that unit leverage 1), are dropped; so are columns that
   are linear combinations of the constant, the exposure and earlier columns (this leaves the
   column space, hence the fit, unchanged);
2. ``interactions``: ``y ~ 1 + t + Xc + t:Xc`` (Lin 2013), when each group has at least
   ``p + min_extra`` units (``p`` = covariate columns kept), the design has full column rank
   and no leverage reaches 1. A column that one group cannot estimate (constant, or constant
   but for one unit, within that group; or whose interaction is a linear combination of the
   columns before it) enters as a main effect only, its slope shared by the groups: the model
   is then ``partial interactions`` and the shared columns are recorded. An interacted design
   is refused when the effect's design variance ``[(D'D)^-1]_tt`` exceeds
   :data:`EXTRAPOLATION_RATIO` times that under main effects (a group-specific fit
   extrapolating to the other group's covariates); the rule uses the design only. A refused,
   rank-deficient or leverage-1 interacted set gives way column by column from the last
   covariate: the longest passing prefix of the interacted columns is used;
3. ``main effects``: ``y ~ 1 + t + Xc`` under the same rank and leverage checks;
4. ``difference of means`` with the Neyman variance ``s1^2/n1 + s0^2/n0`` (Imbens & Rubin 2015,
   ch. 6); with a group of one unit its variance comes from the pooled within-stratum variance.

``Xc`` is ``X`` centred at the stratum mean (ATE) or at the stratum's exposed mean (ATT), so the
exposure coefficient is the stratum's average effect for that population and the intercept is
the mean predicted reference-group outcome there (the standardized reference risk for binary y).
Centred columns are also scaled to unit SD inside the fit: this changes neither the exposure
coefficient nor the intercept, nor their HC2 covariance, and keeps the QR well conditioned.

References
----------
Lin, W. (2013). Agnostic notes on regression adjustments to experimental data: reexamining
Freedman's critique. Annals of Applied Statistics 7, 295-318.
MacKinnon, J. G. & White, H. (1985). Some heteroskedasticity-consistent covariance matrix
estimators with improved finite sample properties. Journal of Econometrics 29, 305-325 (HC2).
Imbens, G. W. & Rubin, D. B. (2015). Causal Inference for Statistics, Social, and Biomedical
Sciences. Cambridge University Press, ch. 6-7 and 17.
"""

from __future__ import annotations

import numpy as np
from scipy.linalg import solve_triangular

from .._base.linalg import LEVERAGE_TOL, hc2_ols, ordered_independent_columns  # noqa: F401 (LEVERAGE_TOL: effects reads it here)

#: Overfitting guard with spline columns: units per design column (each group for the interacted
#: model, the stratum for main effects). Common practice: about 10 observations per parameter
#: (Harrell 2015, section 4.4, from memory).
SPLINE_UNITS_PER_COLUMN = 10
#: A covariate's spline needs this many distinct values per column of its own (its linear and
#: spline columns) in each group of a stratum (our rule): a covariate measured on clusters has
#: only as many values as clusters, and a nearly saturated spline in each group extrapolates
#: wildly to the other group's values. An integer age (about 45 values) keeps its 5-knot spline.
SPLINE_DISTINCT_PER_COLUMN = 4
#: Interactions give way to main effects when the effect's design variance ``[(D'D)^-1]_tt``
#: under interactions exceeds this multiple of that under main effects (our rule: the SE from
#: the design alone would double). Seen without it: an ATT stratum of 204 exposed and 59
#: reference units whose reference-group spline, fitted on the lower end of the exposed units'
#: range, put the stratum effect at 27 (truth 2.4).
EXTRAPOLATION_RATIO = 4.0
#: Above this condition number of ``D'D`` the extrapolation rule reads the design variance from
#: a QR of the design instead of the inverse of ``D'D`` (relative error about cond x 1e-16).
GRAM_CONDITION = 1e10


def _screen_columns(Xc: np.ndarray, t: np.ndarray, names):
    """Drop constant, near-constant (single odd unit) and collinear columns; scale the rest."""
    notes = []
    n = Xc.shape[0]
    keep = []
    constant, singleton = [], []
    for j in range(Xc.shape[1]):
        col = Xc[:, j]
        values, counts = np.unique(col, return_counts=True)
        if len(values) == 1 or np.ptp(col) <= 1e-12 * max(1.0, np.abs(col).max()):
            constant.append(names[j])
        elif len(values) == 2 and counts.min() == 1 and n > 2:
            singleton.append(names[j])
        else:
            keep.append(j)
    if constant:
        notes.append("constant within the stratum: " + ", ".join(constant))
    if singleton:
        notes.append("constant except for one unit (leverage 1): " + ", ".join(singleton))
    Z = Xc[:, keep]
    if Z.shape[1]:
        Z = Z / Z.std(axis=0)
        D = np.column_stack([np.ones(n), t, Z])
        kept = ordered_independent_columns(D)  # the constant and the exposure come first
        dependent = ~np.isin(np.arange(2, D.shape[1]), kept)
        if dependent.any():
            notes.append("linear combination of other columns (or of the exposure): "
                         + ", ".join(names[keep[j]] for j in np.flatnonzero(dependent)))
            keep = [keep[j] for j in np.flatnonzero(~dependent)]
            Z = Z[:, ~dependent]
    return keep, Z, notes


def difference_of_means(y: np.ndarray, t: np.ndarray):
    """``(tau, cov of (a, tau), reason)`` for the plain within-stratum difference of means.

    Neyman variance ``s1^2/n1 + s0^2/n0`` (Imbens & Rubin 2015, ch. 6); when a group has a
    single unit its variance is replaced by the pooled within-stratum variance
    ``((n1-1) s1^2 + (n0-1) s0^2) / (n - 2)`` (equal variances assumed for that stratum only);
    with one unit in each group the variance is not estimable (NaN).
    """
    y1, y0 = y[t == 1], y[t == 0]
    n1, n0 = len(y1), len(y0)
    a, tau = y0.mean(), y1.mean() - y0.mean()
    note = None
    if n1 >= 2 and n0 >= 2:
        v1, v0 = y1.var(ddof=1), y0.var(ddof=1)
    elif n1 + n0 > 2:
        ss = (((y1 - y1.mean()) ** 2).sum() + ((y0 - y0.mean()) ** 2).sum())
        v1 = v0 = ss / (n1 + n0 - 2)  # pooled within-stratum variance
        note = "a group of one unit: pooled within-stratum variance"
    else:
        v1 = v0 = np.nan
        note = "one unit per group: variance not estimable within the stratum"
    var_a = v0 / n0
    cov = np.array([[var_a, -var_a], [-var_a, v1 / n1 + v0 / n0]])  # Imbens & Rubin 2015, ch. 6
    return a, tau, cov, note


def _drop_thin_splines(X, t, names, n_linear, k):
    """``X`` and ``names`` without the spline columns of covariates too thin for them, and notes.

    Why: a covariate with too few distinct values in a group cannot carry a spline there.

    The guard of k units per column counts units; a covariate measured on clusters (a hospital's
    size) has only as many values as there are clusters, and a spline in it, fitted in each group
    apart, then extrapolates wildly to the other group's values (seen: one stratum estimate of
    -20,000 on an outcome of SD 1.5). Each covariate with spline columns needs k distinct values
    per column of its own (its linear column and its spline columns) in each group
    (:data:`SPLINE_DISTINCT_PER_COLUMN`).
    """
    width = {}
    for name in names[n_linear:]:
        base = name.split(": spline")[0]
        width[base] = width.get(base, 1) + 1
    linear = {name: j for j, name in enumerate(names[:n_linear])}
    thin, notes = set(), []
    for base, q in width.items():
        j = linear.get(base)
        if j is None:
            continue
        for label, g in (("exposed", 1), ("reference", 0)):
            distinct = np.unique(X[t == g, j]).size
            if distinct < k * q:
                thin.add(base)
                notes.append(f"'{base}' linear here: its spline needs >= {k * q} distinct values "
                             f"in each group ({k} per column), the {label} group has {distinct}")
                break
    if not thin:
        return X, names, notes
    cols = list(range(n_linear)) + [j for j in range(n_linear, X.shape[1])
                                    if names[j].split(": spline")[0] not in thin]
    return X[:, cols], [names[j] for j in cols], notes


def fit_stratum(y, t, X, *, estimand: str, min_extra: int, names, n_linear=None):
    """Fit one stratum. Returns a dict: a, tau, cov (2x2 of (a, tau)), model, reason, columns.

    ``n_linear``: the first ``n_linear`` columns of ``X`` are the linear design and the rest
    spline columns (None: all linear). With spline columns the ladder is the overfitting guard
    of :data:`SPLINE_UNITS_PER_COLUMN` (k): each group carries ``q = min(n1, n0) // k``
    interacted columns, taken covariate by covariate in design order (a covariate's linear and
    spline columns together), the rest shared by the groups ("partial interactions" when
    ``q < p``), when the stratum holds ``k (p + min(p, q))`` units; else main-effect splines
    when it holds ``k p``; else, when none of these is estimable, the same rungs with spline
    columns given up one by one from the last covariate's last (:func:`_splines_give_way`);
    else the linear ladder (interactions, main effects) on the linear columns; else the
    difference of means.
    """
    n_linear = X.shape[1] if n_linear is None else int(n_linear)
    thin_notes = []
    if n_linear < X.shape[1]:
        X, names, thin_notes = _drop_thin_splines(X, t, list(names), n_linear,
                                                  SPLINE_DISTINCT_PER_COLUMN)
    if n_linear >= X.shape[1]:
        fit = _fit_ladder(y, t, X, estimand=estimand, min_extra=min_extra, names=names)
        if thin_notes:
            fit["reason"] = "; ".join(thin_notes + [fit["reason"]])
        return fit
    n = len(y)
    n1 = int(t.sum())
    n0 = n - n1
    tf = t.astype(float)
    centre = X.mean(axis=0) if estimand == "ate" else X[t == 1].mean(axis=0)
    keep, Z, notes = _screen_columns(X - centre, tf, names)
    notes = thin_notes + notes
    p = Z.shape[1]
    k = SPLINE_UNITS_PER_COLUMN
    q = min(n1, n0) // k  # interacted columns each group can carry, k units per column
    tried = []
    if p and q and n >= k * (p + min(p, q)):
        tried.append("interactions")
        if q < p:
            notes.append(f"each group carries {q} interacted columns of {p} ({k} units per "
                         f"column; {min(n1, n0)} units in the smaller group)")
    if p and n >= k * p:
        tried.append("main effects")
    elif p:
        notes.append(f"splines need >= {k * p} units ({k} per column, {p} columns); found {n}")
    fit = _first_estimable(tried, y, tf, Z, notes, [names[j] for j in keep], limit=q)
    if fit is None:
        fit = _splines_give_way(tried, y, tf, Z, notes, [names[j] for j in keep], limit=q)
    if fit is not None:
        return fit
    fit = _fit_ladder(y, t, X[:, :n_linear], estimand=estimand, min_extra=min_extra,
                      names=names[:n_linear])
    if fit["model"] != "difference of means":
        fit["model"] = "linear " + fit["model"]
    fit["reason"] = "; ".join(notes + ([] if fit["reason"] == "all checks passed"
                                       else [fit["reason"]]))
    return fit


def _splines_give_way(models, y, tf, Z, notes, columns, limit):
    """The spline ladder again with spline columns given up one by one from the last covariate's
    last one (linear columns always kept); None when only the linear columns would be left.

    Why: a unit alone in its range of a covariate within the stratum (an exposed unit at
    x = -3.3 among units above 0.57 in an extreme stratum) gets leverage 1 from that
    covariate's spline columns in every design, and the stratum used to fall to linear terms in
    every covariate (bias +0.33 there, where the confounder is quadratic).
    """
    spline = [j for j in reversed(_covariate_order(columns)) if ": spline" in columns[j]]
    for m in range(1, len(spline)):
        keep = [j for j in range(len(columns)) if j not in spline[:m]]
        given_up = ", ".join(columns[j] for j in sorted(spline[:m]))
        fit = _first_estimable(models, y, tf, Z[:, keep],
                               notes + [f"spline columns given up: {given_up}"],
                               [columns[j] for j in keep], limit)
        if fit is not None:
            return fit
    return None


def _design_variances(D: np.ndarray, k_main: int):
    """``[(D'D)^-1]_tt`` of the exposure column (column 1) for ``D`` and for its first
    ``k_main`` columns: the effect's variance per unit of residual variance, from the design
    alone (no outcome enters the model choice).

    From the Gram matrix ``D'D`` when its condition number is below :data:`GRAM_CONDITION`
    (then its inverse is accurate to about 1e-6 relative), else from the R factor of one QR of
    ``D`` (the R of the leading columns is R's leading block): ``[(D'D)^-1]_tt = |x|^2`` with
    ``R' x = e_t``. Why not always the inverse of ``D'D``: on a nearly collinear interacted
    design (a spline column almost linear on the reference units of an extreme stratum,
    condition number 2e8) it returned a negative value, which passed the extrapolation rule and
    let through a stratum estimate of -1,226 (truth about 2). Why not always the QR: at 200,000
    rows x 40 columns it took 0.45 s against 0.01 s for the Gram matrix and its inverse (one
    thread). A singular leading block gives inf.
    """
    G = D.T @ D
    if np.linalg.cond(G) < GRAM_CONDITION:
        return (float(np.linalg.inv(G)[1, 1]), float(np.linalg.inv(G[:k_main, :k_main])[1, 1]))
    R = np.linalg.qr(D, mode="r")
    variances = []
    for k in (D.shape[1], k_main):
        e_t = np.zeros(k)
        e_t[1] = 1.0
        try:
            x = solve_triangular(R[:k, :k], e_t, trans="T")
        except np.linalg.LinAlgError:
            x = np.array([np.inf])
        variances.append(float(x @ x))
    return tuple(variances)


def _covariate_order(columns):
    """Column indices grouped by covariate (a covariate's linear and spline columns together),
    covariates in the order of their first column."""
    bases = [name.split(": spline")[0] for name in columns]
    first = {b: bases.index(b) for b in bases}
    return sorted(range(len(columns)), key=lambda j: (first[bases[j]], j))


def _interacted_columns(Z: np.ndarray, tf: np.ndarray, columns, limit=None):
    """Indices of the columns of ``Z`` that can carry an interaction with the exposure.

    Why: the interacted model is a separate regression in each group, so a column must be
    estimable within each group, not only in the stratum. A column constant within one group
    (a dummy level absent from the reference group of an extreme stratum) makes ``[1, t, Z, tZ]``
    rank deficient; one constant except for a single unit in a group gives that unit leverage 1.
    Such columns, and interactions that are linear combinations of the columns before them
    (an outer-knot spline column that is linear on one group's units), enter as main effects
    only: the slope is shared by the groups, as it must be when one group cannot estimate it.
    ``limit`` keeps the first ``limit`` of them, covariate by covariate in the order of the
    covariates (a covariate's linear and spline columns together: its curvature in the effect
    is interacted before the next covariate's slope), the overfitting guard. The indices come
    in that order, so a prefix of them is the model with the later covariates' slopes shared.
    """
    n = Z.shape[0]
    candidates = []
    for j in range(Z.shape[1]):
        ok = True
        for g in (1.0, 0.0):
            col = Z[tf == g, j]
            values, counts = np.unique(col, return_counts=True)
            if len(values) == 1 or np.ptp(col) <= 1e-12 * max(1.0, np.abs(col).max()) or (
                    len(values) == 2 and counts.min() == 1):
                ok = False
                break
        if ok:
            candidates.append(j)
    if not candidates:
        return []
    D = np.column_stack([np.ones(n), tf, Z, tf[:, None] * Z[:, candidates]])
    kept = ordered_independent_columns(D)  # main effects first: only interactions are dropped
    start = 2 + Z.shape[1]
    chosen = {candidates[i - start] for i in kept if i >= start}
    chosen = [j for j in _covariate_order(columns) if j in chosen]
    return chosen if limit is None else chosen[:max(int(limit), 0)]


def _fit_record(beta, cov, model, notes, columns, inter):
    """The dict :func:`fit_stratum` returns, from an HC2 fit whose first columns are (1, t)."""
    name = model
    notes = list(notes)
    if model == "interactions" and len(inter) < len(columns):
        name = "partial interactions"
        shared = [columns[j] for j in range(len(columns)) if j not in inter]
        notes.append("main effect only (slope shared by the groups): " + ", ".join(shared))
    return {"a": float(beta[0]), "tau": float(beta[1]), "cov": cov[:2, :2], "model": name,
            "reason": "; ".join(notes) or "all checks passed", "columns": columns,
            "interacted": [columns[j] for j in sorted(inter)]}


def _interacted_fit(y, tf, Z, inter, check_extrapolation):
    """``(beta, cov, None)`` of ``[1, t, Z, t Z[:, inter]]``, or ``(None, None, why)`` when the
    extrapolation rule refuses the design or HC2 OLS cannot fit it."""
    n = len(y)
    main = np.column_stack([np.ones(n), tf, Z])
    D = np.column_stack([main, tf[:, None] * Z[:, inter]])
    if check_extrapolation:
        full, shared = _design_variances(D, main.shape[1])
        ratio = full / shared
        if not ratio <= EXTRAPOLATION_RATIO:  # NaN (both singular) refused too
            return None, None, (f"the effect's design variance is {ratio:.3g} times that of main "
                                f"effects (> {EXTRAPOLATION_RATIO:g}: the group-specific fits "
                                "extrapolate)")
    return hc2_ols(D, y)


def _first_estimable(models, y, tf, Z, notes, columns, limit=None):
    """The first of ``models`` ("interactions", "main effects") that HC2 OLS can estimate.

    "interactions" interacts the columns of :func:`_interacted_columns` (at most ``limit``, in
    covariate order). When the full set fails (rank, leverage 1, or the extrapolation rule when
    main effects are the next rung), interactions give way column by column from the last
    covariate: the longest prefix that passes is used. Why: one extreme column (a spline
    column of the last covariate, thin on the reference units of an extreme ATT stratum) used
    to send the whole stratum to main effects, whose exposure coefficient weights the effect by
    the within-stratum variance of the exposure, not by the target units (bias -0.35 there).
    When some columns enter as main effects only, the model is "partial interactions" and the
    note names them. Each failure is added to ``notes``; None when none is estimable.
    """
    n = len(y)
    for model in models:
        if model == "main effects":
            beta, cov, why = hc2_ols(np.column_stack([np.ones(n), tf, Z]), y)
            if beta is not None:
                return _fit_record(beta, cov, model, notes, columns, [])
            notes.append(f"{model}: {why}")
            continue
        order = _interacted_columns(Z, tf, columns, limit)
        if not order:
            notes.append("interactions: no column varies within each group")
            continue
        check = "main effects" in models
        first_failure = None
        for m in range(len(order), 0, -1):
            beta, cov, why = _interacted_fit(y, tf, Z, order[:m], check)
            if beta is not None:
                fit_notes = list(notes)
                if m < len(order):
                    fit_notes.append(f"interactions of {columns[order[m]]} and later columns "
                                     f"given up ({first_failure})")
                return _fit_record(beta, cov, model, fit_notes, columns, order[:m])
            first_failure = first_failure or why
        notes.append(f"interactions: {first_failure}")
    return None


def _fit_ladder(y, t, X, *, estimand: str, min_extra: int, names):
    """The ladder of the module docstring on the columns of ``X``."""
    n = len(y)
    n1 = int(t.sum())
    n0 = n - n1
    tf = t.astype(float)
    centre = X.mean(axis=0) if estimand == "ate" else X[t == 1].mean(axis=0)
    Xc = X - centre
    keep, Z, notes = _screen_columns(Xc, tf, names)
    p = Z.shape[1]
    tried = []
    if p:
        if n1 >= p + min_extra and n0 >= p + min_extra:
            tried.append("interactions")
        else:
            notes.append(f"interactions need >= {p + min_extra} units of each group "
                         f"({p} covariates + {min_extra}); found {n1} exposed, {n0} reference")
        tried.append("main effects")
    else:
        notes.append("no covariate varies within the stratum")
    fit = _first_estimable(tried, y, tf, Z, notes, [names[j] for j in keep])
    if fit is not None:
        return fit
    a, tau, cov, note = difference_of_means(y, tf)
    if note:
        notes.append(note)
    return {"a": float(a), "tau": float(tau), "cov": cov, "model": "difference of means",
            "reason": "; ".join(notes), "columns": [], "interacted": []}
