"""The cross-check table's types: one row per estimator, the weight diagnostics, the table.

Also the comparison of each row with the headline (:func:`compare_with_headline`).
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field, replace

from .._base.jsonable import jsonable

__all__ = ["CrossCheckRow", "WeightDiagnostics", "CrossCheckResult", "compare_with_headline",
           "DIFFERS_Z"]


@dataclass(frozen=True)
class CrossCheckRow:
    """One row of the cross-check table.

    ``se`` is on the scale the CI is built on: the difference itself, or log RR / log OR for
    ratios (``se_scale`` says which). ``mu1``/``mu0`` are the estimated marginal means (risks)
    under exposure and under reference in the estimand's population.
    """

    method: str
    estimate: float
    se: float
    ci_low: float
    ci_high: float
    measure: str
    se_scale: str
    estimand: str
    estimand_kind: str
    population: str
    mu1: float
    mu0: float
    se_method: str
    notes: tuple = ()
    details: dict = field(default_factory=dict)
    headline_gap_z: float | None = None      # (this - headline) / sqrt(SE^2 + SE_headline^2)
    differs_from_headline: bool | None = None  # |headline_gap_z| > 1.96

    def to_dict(self) -> dict:
        return jsonable(asdict(self))


#: |z| beyond which a cross-check is said to differ from the headline. The two estimates are
#: positively correlated (same data), so sqrt(SE^2 + SE_h^2) overstates the SE of their gap and
#: the rule under-flags: a flagged gap is a real disagreement, an unflagged one is not proof of
#: agreement.
DIFFERS_Z = 1.96


def compare_with_headline(result: "CrossCheckResult", headline) -> "CrossCheckResult":
    """The cross-checks with each row's gap from the headline in units of their combined SE.

    ``headline`` is an :class:`~stratagap.estimation.Estimate` on the same measure; ratios are
    compared on the log scale, where both SEs live.
    """
    ratio = headline.scale == "log"
    h = math.log(headline.estimate) if ratio and headline.estimate > 0 else headline.estimate
    rows = []
    for r in result.rows:
        z = None
        if r.measure == result.measure and all(map(math.isfinite, (r.estimate, r.se, headline.se))):
            c = math.log(r.estimate) if ratio and r.estimate > 0 else r.estimate
            spread = math.sqrt(r.se ** 2 + headline.se ** 2)
            z = (c - h) / spread if spread > 0 else None
        rows.append(replace(r, headline_gap_z=z,
                            differs_from_headline=None if z is None else abs(z) > DIFFERS_Z))
    return replace(result, rows=tuple(rows))


@dataclass(frozen=True)
class WeightDiagnostics:
    """Hájek IPW weight diagnostics per group ("exposed", "reference").

    ``max_share`` is the largest normalized weight (unit weight / group total); ``ess`` the Kish
    effective sample size (sum w)^2 / sum w^2. The ``*_truncated`` fields and
    ``truncation_bounds`` are filled only when truncation was requested.
    """

    estimand: str
    n: dict
    max_weight: dict
    max_share: dict
    ess: dict
    percentiles: tuple | None
    truncation_bounds: dict | None
    n_truncated: dict
    max_weight_truncated: dict | None
    ess_truncated: dict | None
    share_flag: float

    def to_dict(self) -> dict:
        return jsonable(asdict(self))


@dataclass(frozen=True)
class CrossCheckResult:
    """The cross-check table and the IPW weight diagnostics."""

    rows: tuple
    weights: WeightDiagnostics | None
    estimand: str
    measure: str
    outcome_type: str
    alpha: float
    score_source: str
    notes: tuple = ()

    def to_dict(self) -> dict:
        return {
            "estimand": self.estimand,
            "measure": self.measure,
            "outcome_type": self.outcome_type,
            "alpha": float(self.alpha),
            "score_source": self.score_source,
            "notes": list(self.notes),
            "rows": [r.to_dict() for r in self.rows],
            "weights": None if self.weights is None else self.weights.to_dict(),
        }

    def to_frame(self):
        """The table as a pandas DataFrame (one row per method)."""
        import pandas as pd

        cols = ["method", "estimate", "ci_low", "ci_high", "se", "measure", "estimand",
                "estimand_kind", "se_method"]
        return pd.DataFrame([{c: getattr(r, c) for c in cols} for r in self.rows], columns=cols)
