"""Pipeline layer: the outcome stages of a rate outcome (events over person-time).

Called by :func:`stratagap._followup_wiring.followup_parts` with the stratified analysed rows.
Only wires: the test's values come from :mod:`stratagap.inference.rate_scores`, the effects
and cross-checks from :mod:`stratagap.estimation.rates`, the sensitivity block from
:mod:`stratagap.sensitivity.rates`.

* Test: the stratified mean-difference statistic (estimand-weighted,
  ``sum_s w_s S_s n_s / (n1_s n0_s)`` since the values sum to 0 per stratum) on events minus
  expected from a Poisson model without exposure (``statistic="adjusted"``: covariates and
  stratum effects; ``"difference"``: stratum effects only), and for "adjusted" its studentized
  companion on the same values. The Gamma bounds are of that same statistic.
* Headline (``adjusted``): the standardized rate difference per unit of person-time; ``plain``:
  the same without covariates (the stratum rates, person-time standardized); ``crude``: the
  rate difference on all complete-case rows; ``mantel_haenszel``: the MH rate ratio and rate
  difference; ``risk_ratio``: None (the rate ratio is in ``adjusted.rate_ratio``).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from ._base.jsonable import jsonable
from .estimation import heterogeneity as _heterogeneity
from .estimation import rates as _rates
from .estimation._crosscheck_result import compare_with_headline
from .inference import permutation as _permutation
from .inference.rate_scores import rate_scores
from .result import PermutationTests
from .sensitivity.rates import rate_sensitivity

__all__ = ["rate_parts", "RateFollowup", "PER"]

#: The rates are also shown per this many units of person-time.
PER = 1000

TEST_LABELS = {
    "adjusted": "stratified difference in events minus expected, Poisson model of the "
                "covariates with log person-time offset and stratum effects, no exposure term",
    "difference": "stratified difference in events minus expected from the stratum rates "
                  "(no covariates)",
}


def _interval(est) -> dict:
    """An Estimate as a small block; ``se`` is on the ``scale`` ("log" for a ratio)."""
    return {"estimate": est.estimate, "ci_low": est.ci_low, "ci_high": est.ci_high,
            "se": est.se, "scale": est.scale, "method": est.method}


def _scaled(est, per) -> dict:
    return {"estimate": est.estimate * per, "ci_low": est.ci_low * per,
            "ci_high": est.ci_high * per}


@dataclass(frozen=True)
class RateFollowup:
    """The ``followup`` block of a rate outcome (see docs/results.md)."""

    outcome_type: str
    person_time_column: str
    unit: str
    per: int
    events_by_group: dict
    person_time_by_group: dict
    rates_by_group: dict
    complete_case: dict
    crude_rate_ratio: object
    rate_ratio: object
    mantel_haenszel_rate_difference: object
    standardized_rates: dict
    rate_difference_per: dict
    per_stratum: list
    test_values: str
    test_statistic_form: str
    scores_converged: bool
    notes: list = field(default_factory=list)

    def adjusted_fields(self) -> dict:
        """Keys merged into results.json's ``adjusted`` block."""
        return {"rate_ratio": _interval(self.rate_ratio), "unit": self.unit, "per": self.per,
                "rate_difference_per": self.rate_difference_per,
                "rate_exposed": self.standardized_rates["exposed"],
                "rate_reference": self.standardized_rates["reference"]}

    def to_dict(self) -> dict:
        out = {k: getattr(self, k) for k in self.__dataclass_fields__}
        out["crude_rate_ratio"] = _interval(self.crude_rate_ratio)
        out["rate_ratio"] = _interval(self.rate_ratio)
        out["mantel_haenszel_rate_difference"] = _interval(self.mantel_haenszel_rate_difference)
        return jsonable(out)


def _tests(spec, values, t, labels, layout, progress):
    common = dict(estimand=spec.estimand, alternative=spec.alternative, engine=spec.engine,
                  resamples=spec.resamples, seed=spec.seed, batch_size=spec.batch_size,
                  layout=layout)
    companion = spec.statistic == "adjusted" and min(layout.n1.min(), layout.n0.min()) >= 2
    draws = _permutation.shared_draws(t, labels, columns=[values],
                                      studentized=[values] if companion else [])
    main = _permutation.stratified_test(values, t, labels, statistic="mean_difference",
                                        progress=progress, draws=draws, **common)
    studentized = None
    if companion:
        studentized = _permutation.stratified_test(values, t, labels, statistic="studentized",
                                                   draws=draws, **common)
    return PermutationTests(main=main, statistic_kind=spec.statistic,
                            statistic_label=TEST_LABELS[spec.statistic], studentized=studentized)


def _by_group(y, t, pt) -> tuple[dict, dict, dict]:
    events = {"exposed": float(y[t == 1].sum()), "reference": float(y[t == 0].sum())}
    time = {"exposed": float(pt[t == 1].sum()), "reference": float(pt[t == 0].sum())}
    rates = {g: events[g] / time[g] if time[g] > 0 else None for g in events}
    return events, time, rates


def rate_parts(ctx) -> dict:
    """The outcome fields of the result for a rate outcome (see the module docstring)."""
    spec, prepared = ctx.spec, ctx.prepared
    y, t, pt, X, labels = ctx.y, ctx.t, ctx.followup, ctx.X, ctx.labels
    n_linear = X.shape[1] if ctx.n_linear is None else ctx.n_linear
    scores = rate_scores(y, pt, labels, X, statistic=spec.statistic)
    tests = _tests(spec, scores.values, t, labels, ctx.layout, ctx.progress)

    crude_all = _rates.crude_rates(prepared.y, prepared.t, prepared.followup, alpha=spec.alpha)
    adjusted = _rates.standardized_rate_difference(
        y, t, pt, X, labels, estimand=spec.estimand, alpha=spec.alpha,
        population=ctx.population, n_linear=n_linear)
    plain = _rates.standardized_rate_difference(
        y, t, pt, np.zeros((y.size, 0)), labels, estimand=spec.estimand, alpha=spec.alpha,
        population=ctx.population)
    table = _rates.rate_table(y, t, pt, labels)
    mh = _rates.mantel_haenszel_rates(table, alpha=spec.alpha, population=ctx.population)
    cross = _rates.rate_cross_checks(y, t, pt, X, estimand=spec.estimand, alpha=spec.alpha,
                                     score=ctx.propensity.score[ctx.used],
                                     estimand_label=ctx.population)
    cross = compare_with_headline(cross, adjusted)
    heterogeneity = _heterogeneity.heterogeneity_across_strata(adjusted.per_stratum, y, t,
                                                               labels, binary=False)
    sensitivity = rate_sensitivity(
        scores.values, t, labels, X[:, :n_linear], y, pt, ctx.terms, test=tests.main,
        estimand=spec.estimand, alternative=spec.alternative, alpha=spec.alpha,
        gammas=spec.gamma_grid, adjusted=adjusted, rate_ratio=mh["rate_ratio"],
        seed=spec.seed)

    events, time, rates = _by_group(y, t, pt)
    cc_events, cc_time, cc_rates = _by_group(prepared.y, prepared.t, prepared.followup)
    unit = f"events per unit of '{spec.person_time}'"
    followup = RateFollowup(
        outcome_type="rate", person_time_column=spec.person_time, unit=unit, per=PER,
        events_by_group=events, person_time_by_group=time, rates_by_group=rates,
        complete_case={"events_by_group": cc_events, "person_time_by_group": cc_time,
                       "rates_by_group": cc_rates,
                       "rate_difference": crude_all["rate_difference"].to_dict()},
        crude_rate_ratio=crude_all["rate_ratio"], rate_ratio=mh["rate_ratio"],
        mantel_haenszel_rate_difference=mh["rate_difference"],
        standardized_rates={"exposed": adjusted.risk_exposed,
                            "reference": adjusted.risk_reference},
        rate_difference_per=_scaled(adjusted, PER), per_stratum=table.rows(),
        test_values=f"events minus expected ({scores.form})",
        test_statistic_form="estimand-weighted exposed sum sum_s w_s S_s n_s / (n1_s n0_s) "
                            "(the stratified mean difference of values summing to 0 per stratum)",
        scores_converged=scores.converged,
        notes=["the headline weights target units by person-time within strata and strata by "
               "the target's person-time; it assumes the exposure does not change follow-up "
               "time itself",
               "the rate ratio is the Mantel-Haenszel common rate ratio (conditional); the "
               "headline rate difference is marginal (standardized)"])
    return dict(tests=tests, crude=crude_all["rate_difference"], adjusted=adjusted, plain=plain,
                constant_effect=None, mantel_haenszel=mh, risk_ratio=None, cross_checks=cross,
                heterogeneity=heterogeneity, sensitivity=sensitivity, followup=followup)
