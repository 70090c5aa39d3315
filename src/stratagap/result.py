"""The result of one analysis, and its single path to JSON.

:class:`AnalysisResult` holds every stage's result. ``to_dict()`` is exactly what
``results.json`` holds (field by field in ``docs/results.md``); the CLI summary, the HTML report
and the notebook view only render it and never recompute.

Each block is a frozen dataclass whose field names are the ``results.json`` names, so
``to_dict()`` only assembles. The blocks a stage builds live with that stage
(:class:`~stratagap.estimation.heterogeneity.Heterogeneity`,
:class:`~stratagap.sensitivity.analysis.Sensitivity`,
:class:`~stratagap.sensitivity.negative_control.NegativeControl`); the blocks the pipeline puts
together from several stages live here (:class:`PermutationTests`, :class:`ParticipantFlow`,
:class:`PreparedSummary`).
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from importlib import metadata
from typing import Any

from ._base.jsonable import fields_dict, jsonable
from .estimation.heterogeneity import Heterogeneity
from .inference.permutation import PermutationResult
from .sensitivity.analysis import Sensitivity
from .sensitivity.negative_control import NegativeControl
from .spec import AnalysisSpec

__all__ = ["AnalysisResult", "PermutationTests", "ParticipantFlow", "PreparedSummary", "CAUTIONS",
           "to_json", "jsonable"]

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
class PermutationTests:
    """The ``test`` block: the headline test's own fields, then the fields below.

    ``studentized`` (the weak-null companion of the adjusted statistic) and ``sum_statistic``
    (binary outcomes: the sum-of-exposed-events / CMH test) are absent when not run.
    """

    main: PermutationResult  # its fields open the block
    statistic_kind: str  # the `statistic` setting
    statistic_label: str  # TEST_LABELS[statistic_kind]
    studentized: PermutationResult | None = None
    sum_statistic: PermutationResult | None = None

    def to_dict(self) -> dict:
        rest = fields_dict(self, optional=("studentized", "sum_statistic"))
        del rest["main"]
        return {**jsonable(self.main), **rest}


@dataclass(frozen=True)
class ParticipantFlow:
    """The ``flow`` block: row counts from the file to the analysed rows.

    The first nine fields are the data stage's counts
    (:class:`stratagap.data.Flow`, already JSON-ready); the next four come from the overlap
    rule, the strata and the analysed rows, and ``not_matched_by_group`` (present with
    ``design=match`` only) from the matching. Built once, by :meth:`from_stages`.
    """

    rows_read: int
    dropped_missing_by_column: dict
    dropped_missing_by_group: dict
    missing_outcome_by_group: dict
    missing_outcome_p_value: float | None
    negative_control_missing: int
    rows_used: int
    used_by_group: dict
    missing_policy: str
    trimmed_by_group: dict  # set aside by the overlap rule, by group
    strata_set_aside_by_group: dict  # in a stratum lacking a group, by group
    analysed_by_group: dict
    rows_analysed: int
    not_matched_by_group: dict | None = None  # design=match: left out of the matched sets
    #: time-to-event and rate outcomes: events and person-time by group at each step
    #: (stratagap._followup_wiring.flow_by_step)
    followup_by_step: dict | None = None

    @classmethod
    def from_stages(cls, counts, *, trimmed_by_group, strata_set_aside_by_group,
                    t_analysed, not_matched_by_group=None,
                    followup_by_step=None) -> "ParticipantFlow":
        """``counts``: the data stage's Flow; ``t_analysed``: exposure of the analysed rows."""
        n1 = int(t_analysed.sum())
        return cls(**counts.to_dict(), trimmed_by_group=jsonable(dict(trimmed_by_group)),
                   strata_set_aside_by_group=jsonable(dict(strata_set_aside_by_group or {})),
                   analysed_by_group={"exposed": n1, "reference": int(len(t_analysed) - n1)},
                   rows_analysed=int(len(t_analysed)),
                   not_matched_by_group=None if not_matched_by_group is None
                   else jsonable(dict(not_matched_by_group)),
                   followup_by_step=None if followup_by_step is None
                   else jsonable(followup_by_step))

    def to_dict(self) -> dict:
        return fields_dict(self, optional=("not_matched_by_group", "followup_by_step"))


@dataclass(frozen=True)
class PreparedSummary:
    """What the data stage found, as the result reports it (``question`` and ``covariates``)."""

    outcome_type: str
    exposure_levels: dict  # "exposed", "reference" -> the group values
    outcome_levels: Any
    covariates: list
    design_columns: list
    n_used: int
    #: how each continuous covariate entered ("spline(age, 4 knots)" with the knots, or linear)
    covariate_terms: list = field(default_factory=list)


@dataclass(frozen=True)
class AnalysisResult:
    """Everything one analysis found. See ``docs/results.md``."""

    spec: AnalysisSpec
    source: dict
    prepared_summary: PreparedSummary
    flow: ParticipantFlow
    propensity: Any
    overlap: Any
    strata: Any
    balance: Any
    tests: PermutationTests
    crude: Any
    adjusted: Any
    plain: Any
    constant_effect: Any
    mantel_haenszel: Any
    risk_ratio: Any
    cross_checks: Any
    heterogeneity: Heterogeneity
    sensitivity: Sensitivity
    negative_control: NegativeControl | None
    verdict: str
    warnings: tuple
    cautions: tuple
    run: dict = field(compare=False)
    arrays: dict = field(compare=False, repr=False)
    matching: Any = None  # design=match: stratagap.stratify.matching.Matching
    clusters: Any = None  # the `clusters` block, only with `cluster` (stratagap._cluster_wiring)
    #: the `followup` block, only for time-to-event and rate outcomes (stratagap._followup_wiring)
    followup: Any = None

    # -- convenience -----------------------------------------------------------------
    @property
    def n_used(self) -> int:
        return self.prepared_summary.n_used

    @property
    def test(self):
        """The default (headline) permutation test."""
        return self.tests.main

    @property
    def tables(self):
        from .render.tables import ResultTables
        return ResultTables(self)

    def _repr_html_(self) -> str:  # notebooks: the verdict, the estimates and two figures
        from .render.notebook import notebook_html
        return notebook_html(self)

    def __repr__(self) -> str:
        a = self.adjusted
        return (f"<AnalysisResult {self.spec.outcome} by {self.spec.exposure}: "
                f"{a.measure} {a.estimate:.4g} ({a.ci_low:.4g} to {a.ci_high:.4g}), "
                f"p = {self.tests.main.p_value:.3g}, n = {self.n_used}>")

    def summary(self) -> str:
        """The plain-text summary the command line prints."""
        from .render.summary import render_summary
        return render_summary(self.to_dict())

    def save(self, folder, *, overwrite: bool = False, report: bool = True) -> list:
        """Write what the command line's ``--out`` writes into ``folder``; returns the paths."""
        from .render.files import prepare_folder, write_result
        return write_result(self, prepare_folder(folder, overwrite=overwrite), report=report)

    @property
    def figures(self) -> dict:
        """The report's figures as matplotlib Figures, by name (drawn on each access)."""
        from .render.notebook import figures
        return figures(self)

    # -- JSON --------------------------------------------------------------------------
    def to_dict(self) -> dict:
        spec, prepared = self.spec, self.prepared_summary
        adjusted = jsonable(self.adjusted)
        adjusted["plain_stratified"] = jsonable(self.plain)
        adjusted["constant_effect"] = jsonable(self.constant_effect)
        adjusted["mantel_haenszel"] = jsonable(self.mantel_haenszel)
        if self.risk_ratio is not None and self.risk_ratio is not self.adjusted:
            adjusted["standardized_risk_ratio"] = jsonable(self.risk_ratio)
        if hasattr(self.followup, "adjusted_fields"):  # horizon, hazard ratio, rate ratio, ...
            adjusted.update(jsonable(self.followup.adjusted_fields()))

        cross = jsonable(self.cross_checks)
        strata = jsonable(self.strata)
        out = {
            "schema": SCHEMA,
            "question": {
                "exposure": spec.exposure, "outcome": spec.outcome,
                "exposed_value": prepared.exposure_levels.get("exposed"),
                "reference_value": prepared.exposure_levels.get("reference"),
                "outcome_type": prepared.outcome_type,
                "estimand": spec.estimand.upper(),
                "population": self.overlap.estimand_label,
            },
            "source": self.source,
            "spec": {k: v for k, v in spec.to_dict().items() if k != "data_path"},
            "n_used": self.n_used,
            "flow": self.flow,
            "covariates": {"covariates": prepared.covariates,
                           "design_columns": prepared.design_columns,
                           "terms": prepared.covariate_terms},
            "propensity": jsonable(self.propensity),
            "overlap": jsonable(self.overlap),
            "strata": strata.get("table", []),
            "strata_info": {k: v for k, v in strata.items() if k != "table"},
            "balance": jsonable(self.balance),
            "test": self.tests,
            **({} if self.clusters is None else {"clusters": self.clusters}),
            "crude": jsonable(self.crude),
            "adjusted": adjusted,
            "heterogeneity": self.heterogeneity,
            "cross_checks": cross["rows"],
            "cross_check_weights": cross["weights"],
            "sensitivity": self.sensitivity,
            **({} if self.matching is None else {"matching": self.matching}),
            **({} if self.followup is None else {"followup": self.followup}),
            "negative_control": self.negative_control,
            "verdict": self.verdict,
            "warnings": [dict(w) for w in self.warnings],
            "cautions": list(self.cautions),
        }
        return jsonable(out)

    def to_json(self) -> str:
        return to_json(self.to_dict())
