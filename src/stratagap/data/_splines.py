"""Flexible terms for continuous covariates: natural (restricted) cubic splines and their knots.

A natural cubic spline with knots ``t_1 < ... < t_K`` is cubic between knots, has continuous
first and second derivatives, and is linear below ``t_1`` and above ``t_K``; the functions of
this kind form a space of dimension ``K`` (with the constant). We write it as
``1, x, N_1(x), ..., N_{K-2}(x)`` with the truncated-power form of Harrell (2015, eq. 2.25;
Devlin & Weeks 1986)::

    N_j(x) = [(x - t_j)+^3 - (x - t_{K-1})+^3 (t_K - t_j) / (t_K - t_{K-1})
              + (x - t_K)+^3 (t_{K-1} - t_j) / (t_K - t_{K-1})] / (t_K - t_1)^2

so that the *first* column of a covariate's block is the covariate itself. That nesting is why
the basis is written here rather than taken from formulaic's ``cr(..., constraints="center")``,
which spans exactly the same space (tests/data/test_splines.py checks this, and the closed form)
but has no column equal to ``x``: the linear fallback of the within-stratum regression, the one
balance row per covariate and the sensitivity benchmarks all use the linear columns as a
subset of the design. The division by ``(t_K - t_1)^2`` puts ``N_j`` on the scale of ``x``.

Knot rule (Harrell 2015, section 2.4.6, table 2.3, from memory: 3 knots at the .10/.50/.90
quantiles, 4 at .05/.35/.65/.95, 5 at .05/.275/.5/.725/.95): ours is 3 knots when the covariate
has fewer than 20 distinct values or the sample fewer than 100 rows, 5 knots from
``FIVE_KNOTS_FROM`` rows on, 4 otherwise. Heaped values can give equal quantiles: duplicates
are dropped, and fewer than 3 distinct knots leaves a linear term. Knots are computed once, on
the analysed sample, and the same basis is used for every stratum and every prediction.

References
----------
Harrell, F. E. (2015). Regression Modeling Strategies, 2nd ed. Springer, ch. 2.4.
Devlin, T. F. & Weeks, B. J. (1986). Spline functions for logistic regression modeling.
Proceedings of the 11th Annual SAS Users Group International Conference, 646-651.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["SplineTerm", "choose_knots", "nonlinear_columns", "FIVE_KNOTS_FROM"]

#: Harrell 2015, table 2.3 (from memory): knot positions as quantiles, by number of knots.
KNOT_QUANTILES = {3: (0.10, 0.50, 0.90), 4: (0.05, 0.35, 0.65, 0.95),
                  5: (0.05, 0.275, 0.50, 0.725, 0.95)}
#: Fewer distinct values than this, or fewer rows than SMALL_SAMPLE, gives 3 knots (our rule).
FEW_DISTINCT = 20
SMALL_SAMPLE = 100
#: Rows from which a covariate gets 5 knots (our rule). Measured (docs/validation.md): in the
#: smooth-threshold null at n = 5,000 (ATE, 300 datasets) the default test rejected 18.3 % with
#: 4 knots and 4.3 % with 5.
FIVE_KNOTS_FROM = 1000


@dataclass(frozen=True)
class SplineTerm:
    """How one covariate entered the design: ``form`` "spline" (with ``knots``) or "linear"."""

    covariate: str
    form: str
    knots: tuple = ()
    note: str | None = None

    @property
    def label(self) -> str:
        """Plain words for the summary and the report, e.g. "spline(age, 4 knots)"."""
        if self.form == "spline":
            return f"spline({self.covariate}, {len(self.knots)} knots)"
        return f"linear({self.covariate})"

    def to_dict(self) -> dict:
        return {"covariate": self.covariate, "form": self.form, "label": self.label,
                "knots": [float(k) for k in self.knots], "note": self.note}


def choose_knots(x: np.ndarray, n_rows: int | None = None):
    """Knots for ``x`` by the rule above: ``(knots, note)``; ``knots`` is empty for a linear term.

    ``note`` says why fewer knots than the rule's were used (heaped values), or None.
    """
    x = np.asarray(x, dtype=float)
    x = x[np.isfinite(x)]
    n = x.size if n_rows is None else int(n_rows)
    distinct = np.unique(x).size
    if distinct < FEW_DISTINCT or n < SMALL_SAMPLE:
        k = 3
    elif n >= FIVE_KNOTS_FROM:
        k = 5
    else:
        k = 4
    knots = np.unique(np.quantile(x, KNOT_QUANTILES[k]))
    note = None
    if knots.size < k:
        note = (f"{k} knots asked, {knots.size} distinct (heaped values)"
                + ("; entered as a linear term" if knots.size < 3 else ""))
    if knots.size < 3:
        return (), note
    return tuple(float(v) for v in knots), note


def nonlinear_columns(x: np.ndarray, knots) -> np.ndarray:
    """The ``K - 2`` nonlinear columns ``N_j(x)`` of the restricted cubic spline (Harrell 2015, eq. 2.25)."""
    x = np.asarray(x, dtype=float)
    t = np.asarray(knots, dtype=float)
    K = t.size
    if K < 3:
        return np.empty((x.size, 0))
    scale = (t[-1] - t[0]) ** 2
    last, prev = t[-1], t[-2]

    def cube(u):
        return np.maximum(u, 0.0) ** 3

    cols = [(cube(x - t[j]) - cube(x - prev) * (last - t[j]) / (last - prev)
             + cube(x - last) * (prev - t[j]) / (last - prev)) / scale  # Harrell 2015, eq. 2.25
            for j in range(K - 2)]
    return np.column_stack(cols)
