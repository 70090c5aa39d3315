"""How the report writes numbers and names (issue 10, "Report"): decimals per column, no
scientific notation, risk differences in percentage points beside the two risks, one numbering
of strata, one spelling of a dummy level, the estimand said once, "before" labelled after
trimming, the Gamma line in plain words, and figure layouts that clip nothing.

Hand-made results (the shapes of ``result.to_dict()``) from test_report; every expected value
is the hand-made input itself, rescaled by 100 where the rule says so.
"""

from __future__ import annotations

import re

import numpy as np
import pytest

from stratagap.render.report import (plot_cross_checks, plot_gamma_curve, plot_p_value_function,
                                     plot_stratum_effects, plot_tipping, render_html)
from stratagap.render.report._rows import estimate_rows, strata_rows
from stratagap.render.report._style import figure_bytes, finish
from stratagap.render.report.baseline import baseline_table, header
from stratagap.render.verdict import gamma_sentence, not_significant_phrase

from test_report import _figure_texts, handmade, parse


def _text(html: str) -> str:
    return " ".join(parse(html).text)


def _decimals(cell: str) -> int:
    number = cell.split(" ")[0].replace(",", "")
    return len(number.split(".")[1]) if "." in number else 0


def _binary(view):
    """The hand-made result as a binary outcome (risks and risk differences)."""
    d = view.data
    d["question"]["outcome_type"] = "binary"
    d["crude"].update(estimate=0.0585, se=0.0234, ci_low=0.0126, ci_high=0.1043,
                      measure="risk difference", risk_exposed=0.2383, risk_reference=0.1799)
    d["adjusted"].update(estimate=-0.0046, se=0.0191, ci_low=-0.0420, ci_high=0.0328,
                         measure="risk difference", risk_exposed=0.1917,
                         risk_reference=0.1963, constant_effect=None)
    for row, (est, lo, hi) in zip(d["adjusted"]["per_stratum"],
                                  [(-0.00014, -0.0766, 0.0763), (-0.025, -0.1075, 0.0576)]):
        row.update(estimate=est, ci_low=lo, ci_high=hi)
    d["adjusted"]["plain_stratified"].update(estimate=-0.0076, ci_low=-0.0488, ci_high=0.0335,
                                             measure="risk difference")
    for row in d["cross_checks"]:
        row.update(estimate=-0.0045, ci_low=-0.0436, ci_high=0.0346, mu1=0.1916, mu0=0.1961)
    return view


# --------------------------------------------------------------------------- decimals, notation
def test_risk_differences_in_percentage_points_beside_the_risks():
    view = _binary(handmade())
    rows = estimate_rows([("crude", view.data["crude"]), ("adjusted", view.data["adjusted"])],
                         95, binary=True)
    assert [r["estimate"] for r in rows] == ["5.85", "-0.46"]  # 0.0585 and -0.0046, x 100
    assert rows[0]["ci"] == "1.3 to 10.4" and rows[1]["measure"] == "risk difference (pp)"
    assert rows[0]["risks"] == "23.8 % vs 18.0 %" and rows[1]["risks"] == "19.2 % vs 19.6 %"
    text = _text(render_html(view))
    assert "19.2 % vs 19.6 %" in text and "19.2 % vs 19.6 %" in text  # headline, cross-checks
    assert "Risk, exposed vs reference" in text and "pp: percentage points" in text
    assert "-0.00 " not in text  # the old rendering of a -0.46 pp headline


def test_strata_effects_in_pp_and_one_number_of_decimals_per_column():
    view = _binary(handmade())
    rows = strata_rows(view.data)
    assert [r["estimate"] for r in rows] == ["-0.01", "-2.50"]  # not "-0.00014" beside "-0.02"
    assert len({_decimals(r["estimate"]) for r in rows}) == 1
    assert len({_decimals(part) for r in rows for part in r["ci"].split(" to ")}) == 1


def test_effects_table_columns_share_their_decimals():
    view = handmade()
    d = view.data
    entries = [("crude", d["crude"]), ("adjusted", d["adjusted"]),
               ("plain", d["adjusted"]["plain_stratified"])]
    rows = estimate_rows(entries, 95, binary=False)
    for key in ("estimate", "se"):
        assert len({_decimals(r[key]) for r in rows}) == 1, key


def test_amounts_never_in_scientific_notation():
    """Earnings-sized effects (NSW-like: 1,300 with a CI of -29 to 2,629)."""
    view = handmade()
    adj = view.data["adjusted"]
    adj.update(estimate=1300.13, se=678.0, ci_low=-28.71, ci_high=2628.96)
    ce = adj["constant_effect"]
    ce.update(estimate=1569.0, ci_low=-30.5, ci_high=3570.0,
              curve_tau=list(np.linspace(-1000, 5000, 61)),
              curve_p=list(np.exp(-((np.linspace(-1000, 5000, 61) - 1569) / 900) ** 2)))
    view.data["test"]["statistic"] = 1500.0
    html = render_html(view)
    body = re.sub(r'src="data:[^"]+"', "", html)
    assert not re.search(r"\d\.?\d*e[+-]\d\d", body)
    assert "1,300" in body
    texts = []
    for function in (plot_p_value_function,):
        fig = function(view)
        texts += [t.get_text() for t in fig.axes[0].get_legend().get_texts()]
    assert any("3,570" in t for t in texts) and not any("e+0" in t for t in texts)


def test_notebook_table_has_no_scientific_notation():
    from stratagap.render.notebook import notebook_html

    class Result:
        def __init__(self, view):
            self.view = view

        def to_dict(self):
            return self.view.data

    view = handmade()
    view.data["adjusted"].update(estimate=1300.13, ci_low=-28.71, ci_high=2628.96)
    from stratagap.render.report import _style
    original = _style.view_of
    try:
        _style.view_of = lambda r: view if isinstance(r, Result) else original(r)
        html = notebook_html(Result(view))
    finally:
        _style.view_of = original
    assert "1,300" in html and "e+03" not in html


# --------------------------------------------------------------------------- names and numbers
def test_strata_numbered_from_zero_in_table_and_figure():
    view = handmade()
    tree = parse(render_html(view))
    assert tree.rows_of("sg-strata-table") == 2
    assert [r["stratum"] for r in strata_rows(view.data)] == [0, 1]  # as results.json's
    labels = [t.get_text() for t in plot_stratum_effects(view).axes[0].get_yticklabels()]
    assert labels[0].startswith("stratum 0 ") and labels[1].startswith("stratum 1 ")
    assert "numbered from 0" in _text(render_html(view))


def test_estimand_said_once_when_the_population_repeats_it():
    view = handmade()
    assert "<dt>Estimand</dt><dd>ATE</dd>" in render_html(view)
    view.data["question"]["population"] = "ATE in the overlap population [0.1, 0.9]"
    assert ("<dt>Estimand</dt><dd>ATE; population: ATE in the overlap population [0.1, 0.9]</dd>"
            in render_html(view))


def test_smd_before_says_after_trimming():
    view = handmade()  # one unit of each group trimmed
    html = render_html(view)
    assert "SMD before (after trimming)</th>" in html
    view.data["flow"]["trimmed_by_group"] = {"exposed": 0, "reference": 0}
    html = render_html(view)
    assert "SMD before</th>" in html and "(after trimming)" not in html
    view.data["flow"]["trimmed_by_group"] = {"exposed": 0, "reference": 40}  # ATT trimming
    labels = [t.get_text() for t in
              __import__("stratagap.render.report", fromlist=["plot_balance"])
              .plot_balance(view).axes[0].get_legend().get_texts()]
    assert "before adjustment (after trimming)" in labels


def test_dummy_level_spelled_as_the_run_names_it():
    from stratagap.render.report import plot_balance
    view = handmade()
    row = view.data["balance"]["rows"][2]
    row["name"] = "C(role)[T.b]"  # a formula's own column name, as in warnings and benchmarks
    labels = [t.get_text() for t in plot_balance(view).axes[0].get_yticklabels()]
    assert "C(role)[T.b]" in labels and "role: a" in labels  # no name: covariate: level
    html = render_html(view)
    assert "<td>C(role)[T.b]</td>" in html


def test_balance_warning_names_the_term_as_the_tables_do():
    from stratagap.stratify.balance import balance_table
    from stratagap.errors import BalanceWarning
    from types import SimpleNamespace
    rng = np.random.default_rng(2)
    t = np.r_[np.ones(50, int), np.zeros(50, int)]
    x = np.r_[np.ones(40), np.zeros(10), np.ones(10), np.zeros(40)]
    term = SimpleNamespace(name="C(role)[T.b]", covariate="C(role)", level="b", kind="binary",
                           column=0, values=x)
    with pytest.warns(BalanceWarning, match=r"C\(role\)\[T\.b\]"):
        result = balance_table(x[:, None], t, [term], weights_after=np.ones(100))
    assert result.rows[0]["name"] == "C(role)[T.b]"
    del rng


# --------------------------------------------------------------------------- Gamma in plain words
def _not_significant(view):
    sens = view.data["sensitivity"]
    sens["gamma_curve"] = [{"gamma": g, "p_upper": p, "p_separable": p} for g, p in
                           [(1.0, 0.38), (1.5, 0.9), (2.0, 0.99)]]
    sens["gamma_threshold"] = 1.0
    sens["gamma_threshold_detail"].update(gamma=1.0, gamma_separable=1.0,
                                          flag="not significant at Gamma=1")
    return view


def test_gamma_line_in_plain_words_when_not_significant():
    view = _not_significant(handmade())
    html = render_html(view)
    sentence = gamma_sentence(view.data["sensitivity"])  # the verdict's own words
    assert sentence.startswith("Without hidden bias (Γ = 1) the one-sided test is not significant")
    assert f'<span id="sg-gamma-text">{sentence}</span>' in html
    assert "Sensitivity value Γ" not in html and "Γ = <strong>1.00" not in html
    significant = render_html(handmade())
    assert "Sensitivity value Γ = <strong>1.42</strong>" in significant


def test_gamma_figure_says_it_without_a_threshold_and_keeps_the_level():
    view = _not_significant(handmade())
    ax = plot_gamma_curve(view).axes[0]
    words = [t.get_text() for t in ax.texts]
    assert any(not_significant_phrase() in w for w in words)
    assert not any("1.00" in w or "Gamma=1" in w for w in words)
    assert any(tuple(ln.get_ydata()) == (0.025, 0.025) for ln in ax.get_lines())  # alpha line


# --------------------------------------------------------------------------- layouts
def test_cross_check_subtitle_is_not_clipped():
    view = handmade()
    for row in view.data["cross_checks"]:
        row["method"] = "Outcome regression, standardized over every covariate"
    fig = finish(plot_cross_checks(view))
    title = fig.axes[0]._left_title
    extent = title.get_window_extent(fig.canvas.get_renderer())
    assert extent.x1 <= fig.bbox.x1  # every line ends inside the figure
    assert "crude for contrast" in title.get_text().replace("\n", " ")
    figure_bytes(fig, "png", dpi=40)


def test_tipping_figure_labels_a_risk_difference_in_pp():
    view = _binary(handmade())
    fig = plot_tipping(view)
    assert "risk difference, pp" in fig.axes[0].get_ylabel()
    texts = _figure_texts(fig)
    # benchmark outcome shifts 1.5 and 0.5 (a risk-difference scale here) x 100, signed
    assert "+150" in texts and "+50" in texts
    assert "mean shift" not in fig.axes[0].get_ylabel()


def test_many_strata_drawn_as_a_distribution():
    view = handmade()
    per = [{"stratum": s, "n_exposed": 1, "n_reference": 1, "estimate": float(e),
            "se": None, "ci_low": None, "ci_high": None, "weight": 1 / 60, "model": "d"}
           for s, e in enumerate(np.random.default_rng(1).normal(2, 3, 60))]
    view.data["adjusted"]["per_stratum"] = per
    fig = plot_stratum_effects(view)
    assert fig.get_suptitle() == "Effect within each of the 60 strata"
    assert fig.get_size_inches()[1] < 6  # not one row per stratum
    heights = sum(bar.get_height() for bar in fig.axes[0].containers[0])  # the histogram
    assert heights == pytest.approx(1.0)  # shares of the estimand's weight


def test_long_model_choices_are_folded():
    view = handmade()
    view.data["adjusted"]["choices"] = ["variance: between-set"] + [
        f"stratum {s}: difference of means" for s in range(20)]
    html = render_html(view)
    assert '<details id="sg-choices">' in html and "and 20 more" in html
    view.data["adjusted"]["choices"] = ["variance: HC2", "stratum 0: main effects"]
    assert '<p id="sg-choices">Model choices: variance: HC2; stratum 0: main effects.</p>' in \
        render_html(view)


def test_baseline_decimals_follow_the_typical_non_zero_value():
    view = handmade()
    earnings = np.where(np.arange(100) % 2 == 0, 0.0,
                        np.random.default_rng(4).exponential(3000, 100))
    view.arrays["raw"] = view.arrays["raw"].assign(age=earnings)
    row = baseline_table(view).query("characteristic == 'age'").iloc[0]
    assert "." not in row.exposed  # "0 (0 to 2,210)", not "0.000 (0.000 to 2,209.909)"
    assert header(view.data)[-1] == "Std. difference, within strata"


def test_tipping_figure_on_the_ratio_scale_says_so():
    view = handmade()
    tip = view.data["sensitivity"]["tipping"]
    tip["measure"] = "rr"
    tip["tipping_curve"] = [{"prevalence_gap": g, "outcome_shift": 1 + 0.3 / g} for g in (0.1, 0.2, 0.4)]
    for b in tip["benchmarks"]:
        b["outcome_shift"] = 1.4
    fig = plot_tipping(view)
    label = fig.axes[0].get_ylabel()
    assert "risk ratio (null = 1)" in label and "difference" not in label
    assert any(tuple(ln.get_ydata()) == (1.0, 1.0) for ln in fig.axes[0].get_lines())


@pytest.mark.filterwarnings("ignore")
def test_one_numbering_of_strata_across_json_csv_messages_and_report(small_result, tmp_path):
    """Every stratum number a person reads names the same stratum: results.json, strata.csv,
    the model-choice messages and the report's table all count from 0."""
    import csv
    from stratagap.render.files import write_result
    write_result(small_result, tmp_path, report=False)
    data = small_result.to_dict()
    ids = [row["stratum"] for row in data["strata"]]
    assert ids == list(range(len(ids)))
    with open(tmp_path / "strata.csv", newline="") as fh:
        assert [int(r["stratum"]) for r in csv.DictReader(fh)] == ids
    assert [r["stratum"] for r in strata_rows(data)] == ids
    named = [int(n) for c in data["adjusted"]["choices"] for n in re.findall(r"stratum (\d+):", c)]
    named += [int(n) for w in data["warnings"] for n in re.findall(r"stratum (\d+):", w["message"])]
    assert named and set(named) <= set(ids)  # this run simplifies every stratum's model, 0 to 4
    html = render_html(small_result)
    first_cells = re.findall(r'<tr><td class="sg-n">(\d+)</td><td>[\d.]+ to', html)
    assert [int(c) for c in first_cells] == ids


def test_summary_writes_risk_differences_in_pp_with_the_risks():
    from stratagap.render.summary import _effect
    adjusted = {"estimate": -0.0046, "ci_low": -0.0420, "ci_high": 0.0328,
                "measure": "risk difference", "risk_exposed": 0.1917, "risk_reference": 0.1963}
    assert _effect(adjusted, True, "95% CI ") == ("-0.46 pp (95% CI -4.20 to 3.28); "
                                                  "risks 19.2 % vs 19.6 %")
    check = {"estimate": -0.0045, "ci_low": -0.0436, "ci_high": 0.0346, "measure": "difference",
             "mu1": 0.1916, "mu0": 0.1961}
    assert _effect(check, True) == "-0.45 pp (-4.36 to 3.46); risks 19.2 % vs 19.6 %"
    assert _effect(dict(check, estimate=3.54, ci_low=2.57, ci_high=4.51), False) == \
        "3.54 (2.57 to 4.51)"  # a continuous outcome keeps its units


def test_null_figure_legend_sits_below_the_axes():
    from stratagap.render.report import plot_null_distribution
    fig = finish(plot_null_distribution(handmade()))
    assert fig.axes[0].get_legend() is None and len(fig.legends) == 1
    renderer = fig.canvas.get_renderer()
    legend = fig.legends[0].get_window_extent(renderer)
    assert legend.y1 <= fig.axes[0].get_window_extent(renderer).y0  # under the plot, not on it


def test_ratio_rows_keep_two_decimals_beside_percentage_points():
    view = _binary(handmade())
    ratio = {"estimate": 0.98, "se": 0.104, "ci_low": 0.7986, "ci_high": 1.2027,
             "measure": "risk ratio"}
    rows = estimate_rows([("crude", view.data["crude"]), ("MH risk ratio", ratio)], 95,
                         binary=True)
    assert rows[0]["ci"] == "1.26 to 10.43" and rows[1]["ci"] == "0.80 to 1.20"
    assert rows[1]["estimate"] == "0.98" and rows[0]["estimate"] == "5.85"


def test_risk_difference_axes_read_in_percentage_points():
    view = _binary(handmade())
    fig = finish(plot_stratum_effects(view), freeze=False)
    ax = fig.axes[0]
    assert "percentage points" in ax.get_xlabel()
    ticks = {t.get_position()[0]: t.get_text() for t in ax.get_xticklabels()}
    assert any(abs(x + 0.05) < 1e-12 and text == "-5" for x, text in ticks.items())
    fig = plot_p_value_function(view)  # the Wald curve of a risk-difference headline
    labels = [t.get_text() for t in fig.axes[0].get_legend().get_texts()]
    assert "95% CI -4.20 pp to 3.28 pp" in labels and "estimate -0.460 pp" in labels
    fig = finish(plot_cross_checks(view), freeze=False)
    assert "percentage points" in fig.axes[0].get_xlabel()
