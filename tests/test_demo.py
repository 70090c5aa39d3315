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
