"""The result of one analysis, and its single path to JSON.

:class:`AnalysisResult` holds every stage's result. ``to_dict()`` is exactly what
``results.json`` holds (field by field in ``docs/results.md``); the CLI summary, the HTML report
and the notebook view only render it and never recompute.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from importlib import metadata
from typing import Any

from ._base.jsonable import jsonable
from .spec import AnalysisSpec

__all__ = ["AnalysisResult", "CAUTIONS", "to_json", "jsonable"]

SCHEMA = "stratagap.results/1"

#: Shown in the CLI summary, results.json and the report.
CAUTIONS = (
    "Observational evidence only: the groups were not randomized, and adjustment can only "
    "remove bias from the confounders that were measured and modelled.",
    "Residual and unmeasured confounding remain possible; read the sensitivity analysis before "
    "drawing conclusions.",
    "Not medical advice. Decisions about individual care belong to licensed practitioners; "
    "research use of these data should follow local review-board (ethics committee) approval.",
)

TEST_LABELS = {
    "adjusted": "covariance-adjusted stratified difference in mean residuals (Rosenbaum 2002)",
    "difference": "stratified difference in means (unadjusted within strata)",
    "studentized": "studentized covariance-adjusted stratified difference (weak null)",
    "sum": "sum of exposed outcomes across strata (Mantel-Haenszel / CMH for binary outcomes)",
}


def versions() -> dict:
    out = {}
    for name in ("stratagap", "numpy", "scipy", "pandas", "scikit-learn", "statsmodels",
                 "matplotlib"):
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:  # pragma: no cover
            out[name] = None
    return out



def to_json(data: dict) -> str:
    """Deterministic JSON text (same inputs and seed give the same bytes)."""
    return json.dumps(jsonable(data), indent=2, ensure_ascii=False, allow_nan=False) + "\n"


@dataclass(frozen=True)
class AnalysisResult:
    """Everything one analysis found. See ``docs/results.md``."""

    spec: AnalysisSpec
    source: dict
    prepared_summary: dict
    flow: dict
    propensity: Any
    overlap: Any
    strata: Any
    balance: Any
    tests: dict
    crude: Any
    adjusted: Any
    plain: Any
    constant_effect: Any
    mantel_haenszel: Any
    risk_ratio: Any
    cross_checks: Any
    heterogeneity: dict
    sensitivity: dict
    negative_control: Any
    verdict: str
    warnings: tuple
    cautions: tuple
    run: dict = field(compare=False)
    arrays: dict = field(compare=False, repr=False)

    # -- convenience -----------------------------------------------------------------
    @property
    def n_used(self) -> int:
        return int(self.prepared_summary["n_used"])

    @property
    def test(self):
        """The default (headline) permutation test."""
        return self.tests["main"]

    @property
    def tables(self):
        from .render.tables import ResultTables
        return ResultTables(self)

    def _repr_html_(self) -> str:  # notebooks
        from .render.report import render_html
        return render_html(self, compact=True)

    # -- JSON --------------------------------------------------------------------------
    def to_dict(self) -> dict:
        spec = self.spec
        main = self.tests["main"]
        test = jsonable(main)
        test["statistic_kind"] = spec.statistic
        test["statistic_label"] = TEST_LABELS[spec.statistic]
        if "studentized" in self.tests:
            test["studentized"] = jsonable(self.tests["studentized"])
        if "sum" in self.tests:
            test["sum_statistic"] = jsonable(self.tests["sum"])

        adjusted = jsonable(self.adjusted)
        adjusted["plain_stratified"] = jsonable(self.plain)
        adjusted["constant_effect"] = jsonable(self.constant_effect)
        adjusted["mantel_haenszel"] = jsonable(self.mantel_haenszel)
        if self.risk_ratio is not None and self.risk_ratio is not self.adjusted:
            adjusted["standardized_risk_ratio"] = jsonable(self.risk_ratio)

        sens = self.sensitivity
        bounds = jsonable(sens["bounds"])
        threshold = jsonable(sens["threshold"])
        sensitivity = {
            "e_value": jsonable(sens["e_value"]),
            "gamma_threshold": threshold["gamma"],
            "gamma_threshold_detail": threshold,
            "gamma_level": sens["level"],
            "gamma_direction": sens["direction"],
            "gamma_curve": bounds["curve"],
            "gamma_bounds": bounds,
            "tipping": jsonable(sens["tipping"]),
        }
        cross = jsonable(self.cross_checks)
        strata = jsonable(self.strata)
        out = {
            "schema": SCHEMA,
            "question": {
                "exposure": spec.exposure, "outcome": spec.outcome,
                "exposed_value": self.prepared_summary["exposure_levels"].get("exposed"),
                "reference_value": self.prepared_summary["exposure_levels"].get("reference"),
                "outcome_type": self.prepared_summary["outcome_type"],
                "estimand": spec.estimand.upper(),
                "population": self.overlap.estimand_label,
            },
            "source": self.source,
            "spec": {k: v for k, v in spec.to_dict().items() if k != "data_path"},
            "n_used": self.n_used,
            "flow": self.flow,
            "covariates": {k: self.prepared_summary[k] for k in ("covariates", "design_columns")},
            "propensity": jsonable(self.propensity),
            "overlap": jsonable(self.overlap),
            "strata": strata.get("table", []),
            "strata_info": {k: v for k, v in strata.items() if k != "table"},
            "balance": jsonable(self.balance),
            "test": test,
            "crude": jsonable(self.crude),
            "adjusted": adjusted,
            "heterogeneity": jsonable(self.heterogeneity),
            "cross_checks": cross["rows"],
            "cross_check_weights": cross["weights"],
            "sensitivity": sensitivity,
            "negative_control": jsonable(self.negative_control),
            "verdict": self.verdict,
            "warnings": [dict(w) for w in self.warnings],
            "cautions": list(self.cautions),
        }
        return jsonable(out)

    def to_json(self) -> str:
        return to_json(self.to_dict())
