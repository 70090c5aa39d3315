"""Pipeline layer: the outcome stages of a time-to-event outcome (see stratagap._followup_wiring).

Calls, in order: the horizon (given, or the default rule) and the censoring check; the test on
scores fixed under the sharp null (martingale residuals of the covariates-only Cox model for
``statistic="adjusted"``, log-rank scores for ``"difference"``), its Gamma bounds; the headline
risk difference at the horizon, the plain and crude Kaplan-Meier differences, the risk ratio
at the horizon, the RMST difference, the stratified Cox hazard ratio and the stratum hazard
ratios; the IP-weighted cross-checks; the E-values; the adjusted survival curves for the report.
Cox models use the linear design (one column per covariate, ``X[:, :n_linear]``).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from . import sensitivity as _sensitivity
from ._base.jsonable import jsonable
from .estimation import Estimate, StratifiedEstimate
from .estimation import survival as _surv
from .estimation._crosscheck_result import compare_with_headline
from .estimation.heterogeneity import heterogeneity_across_strata
from .inference import stratified_test
from .inference.survival_scores import survival_scores
from .result import PermutationTests

__all__ = ["survival_parts", "SurvivalBlock", "SURVIVAL_TEST_LABELS", "CURVE_POINTS"]

#: the test's label for each `statistic` (the result's TEST_LABELS describe mean outcomes)
SURVIVAL_TEST_LABELS = {
    "adjusted": "covariance-adjusted stratified test: martingale residuals of a Cox model of "
                "the covariates alone, estimand-weighted exposed sums (Rosenbaum 2002)",
    "difference": "stratified log-rank scores, estimand-weighted exposed sums",
}
#: grid points of the adjusted survival curves drawn in the report
CURVE_POINTS = 120


@dataclass(frozen=True)
class SurvivalBlock:
    """The ``followup`` block of results.json for a time-to-event outcome."""

    outcome_type: str
    time_column: str
    horizon: dict
    scores: dict
    events_by_group: dict
    person_time_by_group: dict
    censoring: dict
    risk_ratio: dict
    rmst_difference: dict
    hazard_ratio: dict
    hazard_ratio_e_value: dict | None
    stratum_hazard_ratios: list
    headline_rule: str
    bootstrap: dict
    curves: dict = field(repr=False)

    def adjusted_fields(self) -> dict:
        """Keys merged into results.json's ``adjusted`` block."""
        hr = self.hazard_ratio
        return {"horizon": self.horizon["value"], "horizon_reason": self.horizon["reason"],
                "horizon_chosen_by": self.horizon["chosen_by"],
                "hazard_ratio": {k: hr[k] for k in ("estimate", "ci_low", "ci_high", "label",
                                                    "reason")},
                "rmst_difference": {k: self.rmst_difference[k] for k in (
                    "estimate", "se", "ci_low", "ci_high", "mean_exposed", "mean_reference")},
                "risk_ratio_at_horizon": self.risk_ratio}

    def to_dict(self) -> dict:
        return jsonable({k: getattr(self, k) for k in self.__dataclass_fields__})


def _by_group(values, t):
    return {"exposed": float(np.sum(values[t == 1])), "reference": float(np.sum(values[t == 0]))}


def survival_parts(ctx) -> dict:
    """The outcome fields of the result for a time-to-event outcome."""
    spec, layout = ctx.spec, ctx.layout
    time, event, t, labels = ctx.followup, ctx.y, ctx.t, ctx.labels
    codes, weights = layout.codes, layout.weights
    n_linear = ctx.n_linear if ctx.n_linear is not None else ctx.X.shape[1]
    X = ctx.X[:, :n_linear]
    names = list(ctx.names)[:n_linear]
    horizon = _surv.choose_horizon(time, t, codes, spec.horizon)
    H = horizon.value
    measure = f"risk difference at time {H:g}"
    censoring = _surv.censoring_difference(time, event, t, codes, weights, H)

    kind = "logrank" if spec.statistic == "difference" else "martingale"
    scores = survival_scores(time, event, labels, X, kind=kind, names=names)
    main = stratified_test(scores.values, t, labels, estimand=spec.estimand,
                           statistic="mean_difference", alternative=spec.alternative,
                           engine=spec.engine, resamples=spec.resamples, seed=spec.seed,
                           batch_size=spec.batch_size, progress=ctx.progress, layout=layout)
    tests = PermutationTests(main=main, statistic_kind=spec.statistic,
                             statistic_label=SURVIVAL_TEST_LABELS[spec.statistic])

    rd = _surv.adjusted_risk_difference(time, event, t, X, codes, weights, H,
                                        estimand=spec.estimand, alpha=spec.alpha,
                                        seed=spec.seed, progress=ctx.progress)
    label = ctx.population
    units = (f"{layout.n_rows} units in {layout.n_strata} strata ({int(layout.n1.sum())} "
             f"exposed, {int(layout.n0.sum())} reference)")
    adjusted = StratifiedEstimate(
        rd.estimate, rd.se, rd.ci_low, rd.ci_high, measure, label, units,
        "risk = 1 - S(H) within propensity-score strata: " + rd.rule, spec.alpha, "identity",
        rd.per_stratum, [rd.rule], rd.risk_exposed, rd.risk_reference,
        f"bootstrap within stratum-groups, B = {rd.bootstrap['resamples']}, stream "
        f"'{rd.bootstrap['stream']}'", {"events_per_column": _surv.risk_difference.EVENTS_PER_COLUMN,
                                        "estimand": spec.estimand})
    plain_d = _surv.plain_risk_difference(time, event, t, codes, weights, H, alpha=spec.alpha)
    plain = Estimate(plain_d["estimate"], plain_d["se"], plain_d["ci_low"], plain_d["ci_high"],
                     measure, label, units, "estimand-weighted Kaplan-Meier of the strata "
                     "(unadjusted within strata), Greenwood variance", spec.alpha)
    prepared = ctx.prepared
    crude_d = _surv.crude_risk_difference(prepared.followup, prepared.y, prepared.t, H,
                                          alpha=spec.alpha)
    crude = Estimate(crude_d["estimate"], crude_d["se"], crude_d["ci_low"], crude_d["ci_high"],
                     measure, "crude (unadjusted)", f"all complete-case rows before trimming "
                     f"(n = {prepared.t.size})", "Kaplan-Meier of each group, Greenwood "
                     "variance, Wald interval", spec.alpha)
    rr = rd.risk_ratio
    risk_ratio = Estimate(rr["estimate"], rr["se_log"], rr["ci_low"], rr["ci_high"],
                          f"risk ratio at time {H:g}", label, units, "ratio of the adjusted "
                          "risks at the horizon; log-scale bootstrap SE", spec.alpha,
                          scale="log")
    rmst = _surv.rmst_difference(time, event, t, codes, weights, H, alpha=spec.alpha)
    hr = _surv.hazard_ratio(time, event, t, X, codes, alpha=spec.alpha)
    strata_hr = _surv.stratum_hazard_ratios(time, event, t, codes, alpha=spec.alpha)

    cross = _surv.weighting_cross_checks(time, event, t, X, ctx.propensity.score[ctx.used], H,
                                         estimand=spec.estimand, population=label,
                                         alpha=spec.alpha, seed=spec.seed,
                                         progress=ctx.progress)
    cross = compare_with_headline(cross, adjusted)
    heterogeneity = heterogeneity_across_strata(rd.per_stratum, event, t, labels, binary=False)
    sensitivity = _sensitivity.sensitivity_analysis(
        scores.values, t, labels, X, event, ctx.terms, test=main, statistic="mean_difference",
        estimand=spec.estimand, alternative=spec.alternative, alpha=spec.alpha,
        gammas=spec.gamma_grid, adjusted=adjusted, risk_ratio=risk_ratio, binary=True,
        seed=spec.seed, measure="difference")
    hr_e = None
    if hr.estimate is not None:
        incidence = 1.0 - float(_surv.kaplan_meier(time, event).at(time.max())[0])
        hr_e = _sensitivity.hazard_ratio_e_value(hr.estimate, hr.ci_low, hr.ci_high,
                                                 incidence=incidence, alpha=spec.alpha).to_dict()
    grid = np.linspace(0.0, H, CURVE_POINTS + 1)
    curves = _surv.combine_curves(time, event, t, codes, weights, grid, alpha=spec.alpha)
    block = SurvivalBlock(
        outcome_type="time-to-event", time_column=spec.time, horizon=horizon.to_dict(), scores=scores.to_dict(),
        events_by_group={k: int(v) for k, v in _by_group(event, t).items()},
        person_time_by_group=_by_group(time, t), censoring=censoring,
        risk_ratio=risk_ratio.to_dict(), rmst_difference=rmst.to_dict(),
        hazard_ratio=hr.to_dict(), hazard_ratio_e_value=hr_e, stratum_hazard_ratios=strata_hr,
        headline_rule=rd.rule, bootstrap=rd.bootstrap, curves=curves.to_dict())
    return {"tests": tests, "crude": crude, "adjusted": adjusted, "plain": plain,
            "constant_effect": None, "mantel_haenszel": None, "risk_ratio": risk_ratio,
            "cross_checks": cross, "heterogeneity": heterogeneity, "sensitivity": sensitivity,
            "followup": block}
