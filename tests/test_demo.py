"""The invented demo scenario: its truth, and coverage of the headline CI over many demo seeds."""

import numpy as np
import pytest

from stratagap import data
from stratagap.estimation import effects
from stratagap.stratify import overlap, scores, strata
from stratagap.demo import DEMO_COVARIATES, make_shift_work_data, true_effects


def test_truth_is_the_mean_individual_effect_in_the_analysed_rows():
    d = make_shift_work_data(n=500, seed=3)
    ids = d["staff_id"].to_numpy()[:100]
    got = true_effects(d, ids)
    rows = d.iloc[:100]
    assert got["ate"] == pytest.approx(rows["_true_effect"].mean(), abs=1e-12)
    assert got["att"] == pytest.approx(rows.loc[rows["shift"] == "nights", "_true_effect"].mean(),
                                       abs=1e-12)


def test_null_scenario_has_no_effect_but_is_confounded():
    d = make_shift_work_data(n=4000, seed=1, null=True)
    assert (d["_true_effect"] == 0).all()
    gap = d.groupby("shift")["systolic_bp"].mean()
    assert gap["nights"] - gap["days"] > 2  # confounding alone opens a gap


def _one(seed, estimand):
    table = make_shift_work_data(n=1500, seed=seed)
    prep = data.prepare(table.drop(columns=["_true_effect"]), exposure="shift",
                        exposed_value="nights", outcome="systolic_bp",
                        covariates=list(DEMO_COVARIATES))
    ps = scores.fit_propensity(prep.X, prep.t, prep.design_names)
    ov = overlap.apply_overlap(ps.score, prep.t, estimand=estimand)
    keep = np.flatnonzero(ov.keep)
    st = strata.make_strata(ps.score[keep], prep.t[keep], estimand=estimand)
    used = keep[st.labels >= 0]
    lab = st.labels[st.labels >= 0]
    est = effects.stratified_regression(prep.y[used], prep.t[used], prep.X[used], lab,
                                        estimand=estimand)
    ids = table["staff_id"].to_numpy()[prep.row_ids[used]]
    truth = true_effects(table, ids)[estimand]
    return est.ci_low <= truth <= est.ci_high


@pytest.mark.slow
@pytest.mark.parametrize("estimand", ["ate", "att"])
def test_headline_ci_covers_the_demo_truth_at_about_95_percent(estimand):
    # 300 demo seeds: the binomial SE of a 95 % coverage rate is sqrt(.95 * .05 / 300) = 1.26
    # points, so [91 %, 99 %] is about +-3 SE around the nominal rate.
    import warnings
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        hits = [_one(1000 + s, estimand) for s in range(300)]
    coverage = np.mean(hits)
    assert 0.91 <= coverage <= 0.99, coverage


def test_sick_leave_times_follow_the_stated_hazards():
    """Independent check of the time-to-event generator: within each shift, the Kaplan-Meier
    risk at a horizon (statsmodels SurvfuncRight, Greenwood SE) estimates the group's mean of
    1 - exp(-hazard x horizon), censoring being independent of everything."""
    from statsmodels.duration.survfunc import SurvfuncRight
    from stratagap.demo import make_sick_leave_data
    d = make_sick_leave_data(n=20000, seed=11)
    # rounding up to whole days delays an event by under a day: about hazard x 1 in risk
    for shift, hazard in (("days", "_hazard_days"), ("nights", "_hazard_nights")):
        g = d[d["shift"] == shift]
        km = SurvfuncRight(g["days_followed"], g["sick_leave"])
        i = np.searchsorted(km.surv_times, 365, side="right") - 1
        risk, se = 1 - km.surv_prob[i], km.surv_prob_se[i]
        truth = float(np.mean(1 - np.exp(-g[hazard] * 365)))
        assert abs(risk - truth) < 4 * se + float(g[hazard].mean()), (shift, risk, truth, se)


def test_sick_leave_truth_and_the_unchanged_blood_pressure_columns():
    from stratagap.demo import make_sick_leave_data, true_risk_difference
    d = make_sick_leave_data(n=800, seed=4)
    base = make_shift_work_data(n=800, seed=4)
    assert d[base.columns].equals(base)  # the time-to-event stream leaves the rest as it was
    got = true_risk_difference(d, d["staff_id"].to_numpy(), 365)
    gap = np.exp(-d["_hazard_days"] * 365) - np.exp(-d["_hazard_nights"] * 365)
    assert got["ate"] == pytest.approx(gap.mean(), abs=1e-12) and got["ate"] > 0
    null = make_sick_leave_data(n=800, seed=4, null=True)
    assert true_risk_difference(null, null["staff_id"], 365)["ate"] == 0.0
