"""The report's matching section for ``design="match"`` (issue 12), and the estimand of a
matched design in the summary, the verdict and results.json.

The hand-made block follows the documented shape of ``results.json``'s ``matching`` (its
numbers are the NSW/CPS run's: 151 of 185 exposed matched 1:1, caliper 0.2 SD = 0.407 on the
logit); the end-to-end check runs a small matched analysis of the invented shift-work data and
reads every number back from its own result.
"""

from __future__ import annotations

import pytest

import stratagap
from stratagap.demo import DEMO_COVARIATES, make_shift_work_data
from stratagap.render.report import plot_balance, render_html
from stratagap.render.report.baseline import header
from stratagap.render.summary import render_summary

from test_report import handmade, parse

MATCHING = {
    "per_exposed": 1, "caliper_sd": 0.2, "caliper": 0.4073291, "pooled_sd": 2.0366455,
    "same_value_on": [], "n_exposed": 185, "n_reference": 6728, "matched_exposed": 151,
    "reference_used": 151,
    "unmatched_exposed": {"no_reference_with_same_values": 0, "none_within_caliper": 0,
                          "candidates_used_by_others": 34},
    "matches_per_exposed": {"1": 151}, "total_gap": 11.467, "mean_gap": 0.0759,
    "max_gap": 0.4048,
    "graph": {"objective": "the most matched pairs, then the smallest total logit distance",
              "optimal_on": "the caliper graph keeping each exposed unit's 20 nearest "
                            "reference units within the caliper"},
    "estimand": "effect in the matched exposed units",
}


def matched_view():
    view = handmade()
    view.data["matching"] = dict(MATCHING)
    view.data["flow"]["not_matched_by_group"] = {"exposed": 34, "reference": 6577}
    view.data["question"].update(estimand="ATT", population="effect in the 151 matched exposed "
                                 "units (of 185 exposed offered to the matching)")
    return view


def _section(html: str) -> str:
    start = html.index('<div id="sg-matching">')
    return " ".join(html[start:html.index("</div>", start)].split())


def test_matching_section_states_the_design():
    html = render_html(matched_view())
    text = _section(html)
    assert "<dt>Exposed units matched</dt><dd>151 of 185 (81.6 %)</dd>" in text  # 151 / 185
    assert ("<dt>Left unmatched</dt><dd>34, because every reference unit within the caliper "
            "was needed by another exposed unit</dd>") in text
    assert "<dt>Reference units used</dt><dd>151 of 6,728 offered (6,577 not in any set)</dd>" in text
    assert ("0.20 pooled SDs of the score's logit = 0.407 on the logit scale (pooled SD 2.037)"
            in text)  # 0.2 x 2.0366 = 0.4073
    assert "<dt>Reference units per set</dt><dd>1 in 151 sets (asked: 1)</dd>" in text
    assert "mean logit gap 0.076, largest 0.405" in text
    assert "the effect in the matched exposed units (151 units), not every exposed unit" in text
    assert "computed on the matched sample" in text and "matched_sets.csv" in text
    assert "<h2><span class=\"sg-num\">4</span>Matched sets</h2>" in html
    assert "Table of the 2 matched sets" in html  # the per-set table folded away


def test_unmatched_reasons_listed_each_with_its_count():
    view = matched_view()
    view.data["matching"]["unmatched_exposed"] = {"none_within_caliper": 30,
                                                  "candidates_used_by_others": 4,
                                                  "no_reference_with_same_values": 0}
    text = _section(render_html(view))
    assert ("34: 30 because no reference unit within the caliper; 4 because every reference "
            "unit within the caliper was needed by another exposed unit") in text


def test_balance_labelled_as_on_the_matched_sample():
    view = matched_view()
    html = render_html(view)
    assert "SMD before matching (after trimming)</th>" in html
    assert "SMD after matching</th>" in html
    assert 'id="sg-matched-balance"' in html
    assert header(view.data)[-2:] == ["Std. difference, before matching",
                                      "Std. difference, matched sample"]
    labels = [t.get_text() for t in plot_balance(view).axes[0].get_legend().get_texts()]
    assert "after: on the matched sample" in labels


def test_strata_design_has_no_matching_section():
    html = render_html(handmade())
    assert 'id="sg-matching"' not in html and "<h2><span class=\"sg-num\">4</span>Strata</h2>" in html


@pytest.fixture(scope="module")
def matched_result():
    data = make_shift_work_data(n=700, seed=4).drop(columns=["_true_effect"])
    return stratagap.analyze(data, exposure="shift", exposed_value="nights",
                             outcome="systolic_bp", covariates=list(DEMO_COVARIATES),
                             design="match", resamples=199, seed=2)


@pytest.mark.filterwarnings("ignore")
def test_matched_run_end_to_end(matched_result):
    data = matched_result.to_dict()
    m = data["matching"]
    assert m["estimand"] == "effect in the matched exposed units"
    assert data["question"]["population"].startswith(
        f"effect in the {m['matched_exposed']} matched exposed units")
    assert data["adjusted"]["estimand"] == data["question"]["population"]
    summary = render_summary(data)
    assert f"estimand: effect in the {m['matched_exposed']} matched exposed units" in summary
    assert "regression within matched sets" in data["verdict"]
    assert "After matching the largest absolute standardized" in data["verdict"]
    html = render_html(matched_result)
    text = _section(html)
    assert f"{m['matched_exposed']:,} of {m['n_exposed']:,}" in text
    assert f"= {m['caliper']:.3f} on the logit scale" in text
    tree = parse(html)
    assert tree.rows_of("sg-strata-table") == m["matched_exposed"]  # one row per set


def test_many_matched_sets_drawn_as_their_distribution():
    from stratagap.render.report import plot_stratum_effects
    view = matched_view()
    view.data["adjusted"]["per_stratum"] = [
        {"stratum": s, "n_exposed": 1, "n_reference": 1, "estimate": float(s % 7 - 3),
         "se": None, "ci_low": None, "ci_high": None, "weight": 1 / 151, "model": "d"}
        for s in range(151)]
    fig = plot_stratum_effects(view)
    assert fig.get_suptitle() == "Effect within each of the 151 matched sets"
    assert "per matched set" in fig.axes[0]._left_title.get_text().replace("\n", " ")
