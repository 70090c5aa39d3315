"""The verdict paragraph: every branch, each sentence checked against the numbers it quotes.

The inputs are plain stand-ins for the result blocks (the verdict reads attributes or dict keys),
so each branch is reached on purpose; the last tests run the pipeline on a binary outcome with a
ratio measure and check the same rules on a real result (issue 10, items 1 and 2).
"""

from __future__ import annotations

import itertools
import re
import warnings
from types import SimpleNamespace as NS

import numpy as np
import pandas as pd
import pytest
from scipy.special import expit

import stratagap
from stratagap.render.summary import render_summary
from stratagap.render.verdict import write_verdict

NUMBER = re.compile(r"(?<![\w.])-?\d+(?:\.\d+)?")
CAUTION = "This is observational evidence only"


def _inputs(*, measure="mean difference", excludes=True, rejects=True, balanced=True,
            gamma_flag="ok", e_value=True, cross=None, negative=None, alpha=0.05):
    ratio = measure in ("risk ratio", "odds ratio")
    null = 1.0 if ratio else 0.0
    est, lo, hi = ((1.84, 1.31, 2.58) if ratio else (3.56, 2.72, 4.41)) if excludes else (
        (1.06, 0.89, 1.28) if ratio else (0.42, -0.31, 1.15))
    assert (not lo <= null <= hi) == excludes
    if measure == "risk difference":  # proportions: the verdict writes them x 100, in pp
        est, lo, hi = est / 100, lo / 100, hi / 100
    gamma = {"ok": 1.88, "not significant at Gamma=1": 1.0, "> cap": 1000.0}[gamma_flag]
    return dict(
        spec=NS(alpha=alpha, estimand="ate", alternative="two-sided"),
        crude={"estimate": 0.0637, "ci_low": 0.0129, "ci_high": 0.1046,
               "measure": "risk difference" if ratio or measure == "risk difference"
               else "mean difference"},
        adjusted={"measure": measure, "estimate": est, "ci_low": lo, "ci_high": hi},
        tests=NS(main={"p_value": 0.0002 if rejects else 0.4137, "alternative": "two-sided"}),
        balance={"max_abs_smd_after": 0.047 if balanced else 0.183},
        sensitivity=NS(gamma_threshold=gamma, gamma_level=alpha / 2,
                       gamma_threshold_detail={"flag": gamma_flag, "cap": 1000.0},
                       e_value={"point": 1.93, "ci_limit": 1.75} if e_value else None),
        cross_checks=cross if cross is not None else [],
        negative_control=negative, overlap={"estimand_label": "ATE"})


def _sentences(text):
    return [s for s in re.split(r"(?<=[.!?])\s+(?=[A-Z0-9])", text) if s]


def _numbers(text):
    return set(NUMBER.findall(text))


def _adjusted(text):
    m = re.search(r"Adjusted (.+?) \((.+?), regression within propensity-score strata\): "
                  r"(\S+)(?: pp)? \((\d+)% CI (\S+) to (\S+?)(?: pp)?\), which "
                  r"(excludes|includes) the null value "
                  r"(\S+)\.", text)
    assert m, text
    return m.groups()


# ----------------------------------------------------------------------- in short: every branch
BRANCHES = {
    (True, True, True): "In short: the gap survives adjustment for the measured covariates.",
    (True, True, False): ("In short: the adjusted gap is statistically clear, but residual "
                          "imbalance on measured covariates means it may still be partly "
                          "confounding."),
    (True, False, True): ("In short: the data do not show that the gap survives adjustment: the "
                          "adjusted CI excludes the null but the permutation test does not "
                          "reject at 0.05."),
    (False, True, True): ("In short: the data do not show that the gap survives adjustment: the "
                          "permutation test rejects at 0.05 but the adjusted CI includes the "
                          "null."),
    (False, False, True): "In short: the data do not show that the gap survives adjustment.",
}
# imbalance changes the sentence only when both the CI and the test speak for an effect
BRANCHES[(True, False, False)] = BRANCHES[(True, False, True)]
BRANCHES[(False, True, False)] = BRANCHES[(False, True, True)]
BRANCHES[(False, False, False)] = BRANCHES[(False, False, True)]


@pytest.mark.parametrize("measure", ["mean difference", "risk difference", "risk ratio",
                                     "odds ratio"])
@pytest.mark.parametrize("excludes,rejects,balanced",
                         list(itertools.product([True, False], repeat=3)))
def test_in_short_sentence_follows_ci_test_and_balance(measure, excludes, rejects, balanced):
    kw = _inputs(measure=measure, excludes=excludes, rejects=rejects, balanced=balanced)
    text = write_verdict(**kw)
    assert BRANCHES[(excludes, rejects, balanced)] + " " + CAUTION in text
    assert text.endswith("licensed practice and local review boards.")
    # the headline sentence quotes the headline's own numbers and the right null
    name, population, est, level, lo, hi, word, null = _adjusted(text)
    adj = kw["adjusted"]
    assert name == measure and population == "ATE" and level == "95"
    k = 100 if measure == "risk difference" else 1  # a risk difference in percentage points
    assert (est, lo, hi) == tuple(f"{k * adj[c]:.2f}" for c in ("estimate", "ci_low", "ci_high"))
    ratio = measure in ("risk ratio", "odds ratio")
    assert null == ("1" if ratio else "0")
    assert word == ("excludes" if excludes else "includes")
    # the test sentence quotes the test's p-value
    p = kw["tests"].main["p_value"]
    assert f"gives p {'= 0.0002' if p < 0.01 else f'= {p:.3f}'} (two-sided)." in text
    # the balance sentence quotes the SMD and the right side of the threshold
    smd = kw["balance"]["max_abs_smd_after"]
    assert (f"largest absolute standardized mean difference is {smd:.3f} "
            f"({'within' if balanced else 'above'} the 0.1 threshold") in text


def test_survives_needs_rejection_below_alpha_not_at_it():
    kw = _inputs()
    kw["tests"] = NS(main={"p_value": 0.05, "alternative": "two-sided"})
    assert BRANCHES[(True, False, True)] in write_verdict(**kw)


# ----------------------------------------------------------------------- ratio vs difference
@pytest.mark.parametrize("measure", ["risk ratio", "odds ratio"])
def test_ratio_verdict_never_quotes_the_crude_difference(measure):
    kw = _inputs(measure=measure)
    text = write_verdict(**kw)
    assert "Crude" not in text and "difference:" not in text
    for key in ("estimate", "ci_low", "ci_high"):
        assert f"{kw['crude'][key]:.2f}" not in _numbers(text)


@pytest.mark.parametrize("measure", ["mean difference", "risk difference"])
def test_difference_verdict_quotes_the_crude_difference_under_its_own_name(measure):
    kw = _inputs(measure=measure)
    text = write_verdict(**kw)
    crude = kw["crude"]
    if crude["measure"] == "risk difference":  # issue 10: percentage points, not "0.06"
        assert text.startswith(f"Crude risk difference: {100 * crude['estimate']:.2f} pp (95% CI "
                               f"{100 * crude['ci_low']:.2f} to {100 * crude['ci_high']:.2f} pp).")
    else:
        assert text.startswith(f"Crude {crude['measure']}: {crude['estimate']:.2f} (95% CI "
                               f"{crude['ci_low']:.2f} to {crude['ci_high']:.2f}).")


def _row(method, est, lo, hi, measure):
    return {"method": method, "estimate": est, "ci_low": lo, "ci_high": hi, "measure": measure}


DIFFERENCE_ROWS = [_row("IPW", 0.0100, -0.04, 0.05, "difference"),
                   _row("AIPW", -0.0040, -0.05, 0.04, "difference"),
                   _row("Standardization", 0.0610, 0.012, 0.11, "difference")]


def test_ratio_verdict_does_not_count_difference_scale_cross_checks_against_one():
    # issue 10 item 1: "3 of 3 have a CI excluding the null" came from difference-scale CIs
    # compared with the ratio null 1
    text = write_verdict(**_inputs(measure="risk ratio", cross=DIFFERENCE_ROWS))
    assert "excluding the null" not in text
    assert ("3 cross-check estimators are on the difference scale (see the cross-check table) "
            "and are not compared with the risk ratio's null here.") in text
    for row in DIFFERENCE_ROWS:  # no difference-scale number is quoted beside the ratio
        for key in ("estimate", "ci_low", "ci_high"):
            assert f"{row[key]:.2f}" not in _numbers(text) - {"1.00"}


def test_ratio_verdict_counts_ratio_scale_cross_checks_against_one():
    rows = [_row("IPW", 1.22, 1.05, 1.41, "rr"), _row("AIPW", 1.10, 0.96, 1.27, "rr"),
            _row("Standardization", 1.35, 1.02, 1.79, "rr")]
    text = write_verdict(**_inputs(measure="risk ratio", cross=rows))
    assert ("Cross-check estimators (risk ratio) range from 1.10 to 1.35; 2 of 3 have a CI "
            "excluding the null value 1.") in text
    assert "difference scale" not in text


def test_ratio_verdict_with_mixed_scales_counts_only_its_own():
    rows = [_row("IPW", 1.22, 1.05, 1.41, "rr"), DIFFERENCE_ROWS[2]]
    text = write_verdict(**_inputs(measure="risk ratio", cross=rows))
    assert "range from 1.22 to 1.22; 1 of 1 have a CI excluding the null value 1." in text
    assert "1 cross-check estimator is on the difference scale" in text


def test_difference_verdict_counts_cross_checks_against_zero():
    text = write_verdict(**_inputs(measure="risk difference", cross=DIFFERENCE_ROWS))
    # only the standardization CI (0.012 to 0.11) excludes 0
    assert ("Cross-check estimators (risk difference) range from -0.40 pp to 6.10 pp; 1 of 3 "
            "have a CI excluding the null value 0.") in text
    assert "difference scale" not in text


def test_no_cross_check_sentence_without_cross_checks():
    assert "Cross-check" not in write_verdict(**_inputs(cross=[]))


# ----------------------------------------------------------------------- sensitivity sentences
def test_not_significant_at_gamma_one_says_so_and_skips_the_threshold():
    # issue 10 item 2
    text = write_verdict(**_inputs(excludes=False, rejects=False, gamma_flag=
                                   "not significant at Gamma=1"))
    assert ("Without hidden bias (Γ = 1) the one-sided test is not significant at 0.025, so "
            "there is no sensitivity threshold to report.") in text
    assert "would have to change the odds" not in text and "Γ = 1.00" not in text


def test_threshold_sentence_quotes_gamma_and_the_one_sided_level():
    kw = _inputs()
    text = write_verdict(**kw)
    assert ("An unmeasured confounder would have to change the odds of exposure within a stratum "
            "by a factor of Γ = 1.88 to make the one-sided test lose significance at "
            "0.025.") in text


def test_threshold_beyond_the_search_cap():
    text = write_verdict(**_inputs(gamma_flag="> cap"))
    assert "stays significant at 0.025 for every Γ up to 1000.00, the largest searched." in text
    assert "would have to change the odds" not in text


def test_e_value_sentence_only_when_defined():
    assert ("E-value: 1.93 for the estimate and 1.75 for the confidence limit closer to the "
            "null.") in write_verdict(**_inputs())
    assert "E-value" not in write_verdict(**_inputs(e_value=False))


@pytest.mark.parametrize("alarm", [True, False])
def test_negative_control_sentence(alarm):
    negative = NS(column="hearing_db", estimate=NS(estimate=0.153), test=NS(p_value=0.3831),
                  alarm=alarm)
    text = write_verdict(**_inputs(negative=negative))
    tail = ("; this is a residual-bias alarm." if alarm
            else "; no sign of residual bias from this check.")
    assert f"Negative-control outcome 'hearing_db': adjusted 'effect' 0.15 (p = 0.383){tail}" in text


def test_every_number_quoted_comes_from_the_inputs():
    kw = _inputs(measure="risk difference", cross=DIFFERENCE_ROWS,
                 negative=NS(column="nc", estimate=NS(estimate=0.153), test=NS(p_value=0.3831),
                             alarm=False))
    text = write_verdict(**kw)
    allowed = {"0", "0.1", "95", "0.05", "1.88", "0.025", "1.93", "1.75", "0.0002", "0.047",
               "6.10", "-0.40", "1", "3", "0.383", "0.15", "0.1"}  # cross-checks in pp
    allowed |= {f"{100 * kw['crude'][k]:.2f}" for k in ("estimate", "ci_low", "ci_high")}
    allowed |= {f"{100 * kw['adjusted'][k]:.2f}" for k in ("estimate", "ci_low", "ci_high")}
    assert _numbers(text) <= allowed, _numbers(text) - allowed


# ----------------------------------------------------------------------- a real ratio result
@pytest.fixture(scope="module")
def ratio_result():
    rng = np.random.default_rng(21)
    n = 1500
    x = rng.standard_normal(n)
    t = (rng.random(n) < expit(0.7 * x)).astype(int)
    y = (rng.random(n) < expit(-1.0 + 0.8 * x)).astype(int)  # no effect: not significant
    table = pd.DataFrame({"t": t, "y": y, "x": x})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return stratagap.analyze(table, exposure="t", outcome="y", covariates=["x"],
                                 measure="rr", resamples=999, seed=1)


def test_pipeline_ratio_verdict_is_on_the_ratio_scale(ratio_result):
    res = ratio_result
    text = res.verdict
    assert res.adjusted.measure == "risk ratio" and res.crude.measure == "risk ratio"
    _, _, est, _, lo, hi, word, null = _adjusted(text)
    assert (est, lo, hi) == tuple(f"{getattr(res.adjusted, k):.2f}"
                                  for k in ("estimate", "ci_low", "ci_high"))
    assert null == "1" and word == ("includes" if res.adjusted.ci_low <= 1 <= res.adjusted.ci_high
                                    else "excludes")
    assert f"Crude risk ratio: {res.crude.estimate:.2f}" in text
    rows = res.cross_checks.rows if hasattr(res.cross_checks, "rows") else res.cross_checks
    assert all(r.measure == "rr" for r in rows)  # the cross-checks on the headline's scale
    excluding = sum(not (r.ci_low <= 1 <= r.ci_high) for r in rows)
    assert f"{excluding} of {len(rows)} have a CI excluding the null value 1" in text
    assert "on the difference scale" not in text


def test_pipeline_not_significant_verdict_and_summary(ratio_result):
    res = ratio_result
    assert res.sensitivity.gamma_threshold_detail.flag == "not significant at Gamma=1"
    assert "would have to change the odds" not in res.verdict
    assert "not significant at 0.025" in res.verdict
    summary = render_summary(res.to_dict())
    assert "sensitivity: not significant without hidden bias (Γ = 1)" in summary
    assert "Γ threshold" not in summary
    # crude, headline and cross-checks all on the ratio scale
    assert "crude risk ratio:" in summary and "adjusted risk ratio:" in summary
    cross = [line for line in summary.splitlines() if line.startswith("  cross-check")]
    assert cross and not any("[difference scale]" in line for line in cross)


def test_summary_shows_the_threshold_when_significant(small_result):
    data = small_result.to_dict()
    assert data["sensitivity"]["gamma_threshold_detail"]["flag"] == "ok"
    summary = render_summary(data)
    assert f"Γ threshold {data['sensitivity']['gamma_threshold']:.2f}" in summary
    assert "[difference scale]" not in summary  # same scale as the headline: no label


def test_a_cross_check_that_differs_from_the_headline_is_named():
    """1.96 x sqrt(SE_h^2 + SE_c^2) rule (issue 10 item 6): the row flagged by the estimation
    stage is named with its z; an unflagged table says nothing of the kind."""
    from stratagap.render.verdict import _cross_check_sentence

    rows = [{"method": "IPW", "measure": "difference", "estimate": 11.3, "ci_low": 9.0,
             "ci_high": 13.6, "headline_gap_z": 4.2, "differs_from_headline": True},
            {"method": "AIPW", "measure": "difference", "estimate": 3.3, "ci_low": 2.0,
             "ci_high": 4.6, "headline_gap_z": 0.3, "differs_from_headline": False}]
    text = _cross_check_sentence({"rows": rows}, "mean difference", 0.0)
    assert ("1 cross-check differs from the headline by more than 1.96 combined standard "
            "errors: IPW (z = 4.20)") in text
    assert "AIPW (z" not in text
    rows[0]["differs_from_headline"] = False
    assert "combined standard errors" not in _cross_check_sentence({"rows": rows},
                                                                   "mean difference", 0.0)
