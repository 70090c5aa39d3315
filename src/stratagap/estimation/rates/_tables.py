"""Events and person-time by stratum and group; the crude and Mantel-Haenszel rate measures.

Per stratum ``s``: ``a_s`` exposed events over ``PT1_s`` exposed person-time, ``b_s``
reference events over ``PT0_s``, ``PT_s = PT1_s + PT0_s``.

* Crude rates ``a / PT1`` and ``b / PT0`` over all complete-case rows; rate difference with
  the Poisson variance ``a / PT1^2 + b / PT0^2``, rate ratio with
  ``Var(ln RR) = 1/a + 1/b`` (Rothman, Greenland & Lash 2008, ch. 14).
* Mantel-Haenszel rate ratio (Greenland & Robins 1985, Biometrics 41:55-68):
  ``RR_MH = sum_s a_s PT0_s / PT_s / sum_s b_s PT1_s / PT_s`` with
  ``Var(ln RR_MH) = sum_s (a_s + b_s) PT1_s PT0_s / PT_s^2 / (R S)``,
  ``R = sum_s a_s PT0_s / PT_s``, ``S = sum_s b_s PT1_s / PT_s``. With one stratum it is the
  crude ratio and its variance ``1/a + 1/b``. Mantel-Haenszel rate difference (same paper):
  ``sum_s (a_s PT0_s - b_s PT1_s) / PT_s / sum_s W_s``, ``W_s = PT1_s PT0_s / PT_s``, variance
  ``sum_s W_s^2 (a_s / PT1_s^2 + b_s / PT0_s^2) / (sum_s W_s)^2``.

When a group has no events (``R = 0`` or ``S = 0``; in the crude table ``a = 0`` or ``b = 0``)
the rate ratio is 0 or infinite and its log-scale variance undefined: the ratio is reported as
not estimable (estimate, limits and SE NaN, written as null) with the reason, and a
ModelWarning; the differences still have finite variances and are reported.

References
----------
Greenland, S. & Robins, J. M. (1985). Estimation of a common effect parameter from sparse
follow-up data. Biometrics 41:55-68.
Rothman, K. J., Greenland, S. & Lash, T. L. (2008). Modern Epidemiology, 3rd ed., Lippincott
Williams & Wilkins, ch. 14-15 (crude and Mantel-Haenszel person-time formulas, from memory).
"""

from __future__ import annotations

import math
import warnings
from dataclasses import asdict, dataclass

import numpy as np
from scipy import stats

from ..._base.jsonable import jsonable
from ...errors import ModelWarning
from .._estimate import Estimate

__all__ = ["RateTable", "rate_table", "crude_rates", "mantel_haenszel_rates",
           "not_estimable_reason"]


@dataclass(frozen=True)
class RateTable:
    """Events and person-time by stratum (rows) and group: ``a, pt1, b, pt0`` of shape (S,)."""

    a: np.ndarray
    pt1: np.ndarray
    b: np.ndarray
    pt0: np.ndarray

    def rows(self) -> list:
        """One dict per stratum: events and person-time by group, and the two rates."""
        out = []
        for s in range(self.a.size):
            out.append({"stratum": s, "events_exposed": float(self.a[s]),
                        "person_time_exposed": float(self.pt1[s]),
                        "events_reference": float(self.b[s]),
                        "person_time_reference": float(self.pt0[s]),
                        "rate_exposed": _ratio(self.a[s], self.pt1[s]),
                        "rate_reference": _ratio(self.b[s], self.pt0[s])})
        return out

    def to_dict(self) -> dict:
        return jsonable({k: v.tolist() for k, v in asdict(self).items()})


def _ratio(num, den):
    return float(num / den) if den > 0 else math.nan


def rate_table(y, t, person_time, labels) -> RateTable:
    """Per-stratum events and person-time by group (labels 0..S-1; -1 rows ignored)."""
    y = np.asarray(y, dtype=float)
    t = np.asarray(t)
    pt = np.asarray(person_time, dtype=float)
    labels = np.asarray(labels)
    keep = labels >= 0
    y, t, pt, labels = y[keep], t[keep], pt[keep], labels[keep]
    _, codes = np.unique(labels, return_inverse=True)
    S = int(codes.max()) + 1 if codes.size else 0
    exp = t == 1
    return RateTable(a=np.bincount(codes, weights=y * exp, minlength=S),
                     pt1=np.bincount(codes, weights=pt * exp, minlength=S),
                     b=np.bincount(codes, weights=y * ~exp, minlength=S),
                     pt0=np.bincount(codes, weights=pt * ~exp, minlength=S))


def not_estimable_reason(events_exposed, events_reference) -> str | None:
    """Why a rate ratio cannot be estimated, or None."""
    groups = [g for g, e in (("exposed", events_exposed), ("reference", events_reference))
              if e <= 0]
    if not groups:
        return None
    return (f"no events in the {' and '.join(groups)} group{'s' if len(groups) > 1 else ''}: "
            "the rate ratio is 0 or infinite and its log-scale variance undefined")


def _ratio_estimate(log_rr, var, reason, z, pop, method, alpha, estimand):
    if reason is not None:
        warnings.warn(f"{method}: not estimable ({reason})", ModelWarning, stacklevel=3)
        return Estimate(math.nan, math.nan, math.nan, math.nan, "rate ratio", estimand, pop,
                        f"{method}; not estimable: {reason}", alpha, "log")
    se = math.sqrt(var)
    return Estimate(math.exp(log_rr), se, math.exp(log_rr - z * se), math.exp(log_rr + z * se),
                    "rate ratio", estimand, pop, method, alpha, "log")


def _difference(rd, var, z, pop, method, alpha, estimand):
    se = math.sqrt(var) if var >= 0 else math.nan
    return Estimate(float(rd), se, rd - z * se, rd + z * se, "rate difference", estimand, pop,
                    method, alpha)


def crude_rates(y, t, person_time, *, alpha=0.05, population="all complete-case rows") -> dict:
    """Crude rate difference and ratio (exposed minus / over reference), Wald intervals.

    Returns ``{"rate_difference": Estimate, "rate_ratio": Estimate, "rate_exposed",
    "rate_reference", "events_exposed", "events_reference", "person_time_exposed",
    "person_time_reference"}``. Unit: events per unit of the person-time column.
    """
    table = rate_table(y, t, person_time, np.zeros(np.asarray(y).size, dtype=np.int64))
    a, pt1, b, pt0 = (float(v.sum()) for v in (table.a, table.pt1, table.b, table.pt0))
    z = float(stats.norm.isf(alpha / 2))
    r1, r0 = a / pt1, b / pt0
    rd = _difference(r1 - r0, a / pt1 ** 2 + b / pt0 ** 2, z, population,  # Poisson variance
                     "crude rate difference; Poisson (Wald) variance a/PT1^2 + b/PT0^2",
                     alpha, "crude (unadjusted)")
    reason = not_estimable_reason(a, b)
    rr = _ratio_estimate(math.log(r1 / r0) if reason is None else math.nan,
                         1.0 / a + 1.0 / b if reason is None else math.nan,  # Var ln RR
                         reason, z, population, "crude rate ratio; Var(ln RR) = 1/a + 1/b",
                         alpha, "crude (unadjusted)")
    return {"rate_difference": rd, "rate_ratio": rr, "rate_exposed": r1, "rate_reference": r0,
            "events_exposed": a, "events_reference": b, "person_time_exposed": pt1,
            "person_time_reference": pt0}


def mh_rate_parts(table: RateTable) -> dict:
    """The Greenland & Robins (1985) sums: RR_MH, Var ln RR_MH, RD_MH, Var RD_MH (floats).

    Strata lacking a group's person-time contribute nothing.
    """
    a, pt1, b, pt0 = table.a, table.pt1, table.b, table.pt0
    ok = (pt1 > 0) & (pt0 > 0)
    a, pt1, b, pt0 = a[ok], pt1[ok], b[ok], pt0[ok]
    pt = pt1 + pt0
    R = float(np.sum(a * pt0 / pt))  # Greenland & Robins 1985: numerator of RR_MH
    S = float(np.sum(b * pt1 / pt))  # denominator
    num = float(np.sum((a + b) * pt1 * pt0 / pt ** 2))  # Greenland & Robins 1985, Var ln RR_MH
    W = pt1 * pt0 / pt
    rd = float(np.sum((a * pt0 - b * pt1) / pt) / W.sum())  # MH rate difference
    var_rd = float(np.sum(W ** 2 * (a / pt1 ** 2 + b / pt0 ** 2)) / W.sum() ** 2)
    with np.errstate(divide="ignore", invalid="ignore"):
        log_rr = math.log(R / S) if R > 0 and S > 0 else math.nan
        var_log = num / (R * S) if R > 0 and S > 0 else math.nan
    return {"R": R, "S": S, "log_rr": log_rr, "var_log_rr": var_log, "rd": rd, "var_rd": var_rd}


def mantel_haenszel_rates(table: RateTable, *, alpha=0.05, population="") -> dict:
    """Mantel-Haenszel rate ratio and rate difference over strata (conditional, common effect).

    Returns ``{"rate_ratio": Estimate, "rate_difference": Estimate}``; see the module docstring
    for the variances and the not-estimable rule.
    """
    parts = mh_rate_parts(table)
    z = float(stats.norm.isf(alpha / 2))
    pop = population or f"{table.a.size} strata"
    reason = not_estimable_reason(parts["R"], parts["S"])
    rr = _ratio_estimate(parts["log_rr"], parts["var_log_rr"], reason, z, pop,
                         "Mantel-Haenszel rate ratio; Greenland & Robins 1985 variance", alpha,
                         "conditional common effect")
    rd = _difference(parts["rd"], parts["var_rd"], z, pop,
                     "Mantel-Haenszel rate difference; Greenland & Robins 1985 variance",
                     alpha, "conditional common effect")
    return {"rate_ratio": rr, "rate_difference": rd}
