"""The HTML report, its figures, the baseline table and the flow diagram.

Unit tests draw every figure from small hand-made results (shapes of ``result.to_dict()``);
structural tests parse a real report (a small demo run, 500 resamples) with ``html.parser``.
"""

from __future__ import annotations

import base64
import math
import re
import sys
import xml.etree.ElementTree as ET
from html.parser import HTMLParser

import numpy as np
import pandas as pd
import pytest
from matplotlib.figure import Figure
from scipy import stats

import stratagap
from stratagap.demo import make_shift_work_data
from stratagap.render.files import write_atomic
from stratagap.render.report import (FIGURES, baseline_latex, baseline_markdown, baseline_table,
                              flow_steps, plot_balance, plot_cross_checks, plot_gamma_curve,
                              plot_null_distribution, plot_overlap, plot_p_value_function,
                              plot_stratum_effects, plot_tipping, render_html, write_report)
from stratagap.render.report._style import ResultView, figure_bytes
from stratagap.render.report.html import CSP
from stratagap.render.formatting import format_value

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

SECTIONS = ["question", "overlap", "balance", "strata", "test", "effect", "cross-checks",
            "sensitivity", "verdict", "cautions", "reproducibility"]
FIGURE_NAMES = [name for name, _f, _c in FIGURES]
SVG_NS = "{http://www.w3.org/2000/svg}"


# ----------------------------------------------------------------------------- helpers
class _Tree(HTMLParser):
    """Flat list of (tag, attrs, path-of-open-tags) plus the text of every element."""

    VOID = {"meta", "img", "br", "link", "input", "hr", "col", "source"}

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.elements, self.stack, self.text = [], [], []

    def handle_starttag(self, tag, attrs):
        self.elements.append((tag, dict(attrs), tuple(t for t, _a in self.stack)))
        if tag not in self.VOID:
            self.stack.append((tag, dict(attrs)))

    def handle_endtag(self, tag):
        for i in range(len(self.stack) - 1, -1, -1):
            if self.stack[i][0] == tag:
                del self.stack[i:]
                break

    def handle_data(self, data):
        self.text.append(data)

    def find(self, tag, **attrs):
        return [a for t, a, _p in self.elements if t == tag and all(a.get(k) == v for k, v in attrs.items())]

    def rows_of(self, table_id):
        """Number of <tr> in the <tbody> of the table with this id."""
        n, inside, depth = 0, False, 0
        for tag, attrs, path in self.elements:
            if tag == "table":
                inside = attrs.get("id") == table_id
                depth = len(path)
            elif inside and tag == "tr" and "tbody" in path[depth:]:
                n += 1
        return n


def parse(html: str) -> _Tree:
    tree = _Tree()
    tree.feed(html)
    tree.close()
    return tree


def svg_root(data: bytes):
    root = ET.fromstring(data)
    assert root.tag == SVG_NS + "svg"
    return root


def handmade(**changes) -> ResultView:
    """A small result of the documented shapes (two strata, a continuous outcome)."""
    rng = np.random.default_rng(5)
    t_all = np.r_[np.ones(40, np.int8), np.zeros(60, np.int8)]
    score = np.clip(np.r_[rng.beta(4, 3, 40), rng.beta(3, 4, 60)], 0.01, 0.99)
    keep = np.ones(100, bool)
    keep[[0, 99]] = False
    used = np.flatnonzero(keep)
    grid_gap = np.repeat([0.1, 0.2, 0.4], 3).tolist()
    grid_shift = np.tile([0.0, 2.0, 4.0], 3).tolist()
    est = [2.0 - g * s for g, s in zip(grid_gap, grid_shift)]
    data = {
        "question": {"exposure": "shift", "outcome": "bp", "exposed_value": "nights",
                     "reference_value": "days", "outcome_type": "continuous", "estimand": "ATE",
                     "population": "ATE"},
        "source": {"file": "study.csv", "sha256": "ab" * 32, "command": "stratagap analyze study.csv"},
        "spec": {"exposure": "shift", "outcome": "bp", "covariates": ["age", "role"], "seed": 11,
                 "alpha": 0.05, "resamples": 999, "estimand": "ate"},
        "n_used": 98,
        "flow": {"rows_read": 110, "dropped_missing_by_column": {"age": 7, "role": 5, "bp": 0},
                 "dropped_missing_by_group": {"exposed": 4, "reference": 6, "unknown": 0},
                 "missing_outcome_by_group": {"exposed": {"n": 0, "share": 0.0},
                                              "reference": {"n": 0, "share": 0.0}},
                 "rows_used": 100, "used_by_group": {"exposed": 40, "reference": 60},
                 "trimmed_by_group": {"exposed": 1, "reference": 1},
                 "strata_set_aside_by_group": {"exposed": 0, "reference": 0},
                 "analysed_by_group": {"exposed": 39, "reference": 59}, "rows_analysed": 98},
        "covariates": {"covariates": ["age", "role"], "design_columns": ["age", "role[b]"]},
        "propensity": {"method": "logistic", "auc": 0.71},
        "overlap": {"rule": "common", "bounds": [0.05, 0.95], "ranges": {"exposed": [0.1, 0.9],
                    "reference": [0.05, 0.95]}, "set_aside": {"exposed": 1, "reference": 1}},
        "strata": [{"stratum": 0, "score_low": 0.05, "score_high": 0.5, "n_exposed": 15,
                    "n_reference": 35, "n": 50, "weight": 0.51},
                   {"stratum": 1, "score_low": 0.5, "score_high": 0.95, "n_exposed": 24,
                    "n_reference": 24, "n": 48, "weight": 0.49}],
        "strata_info": {"method": "quantile", "merges": [], "notes": []},
        "balance": {"rows": [
            {"covariate": "age", "level": None, "kind": "continuous", "smd_before": 0.40,
             "smd_after": 0.05, "var_ratio_before": 1.1, "var_ratio_after": 1.0,
             "ks_before": 0.2, "ks_after": 0.05, "flagged": False},
            {"covariate": "role", "level": "a", "kind": "binary", "smd_before": -0.3,
             "smd_after": 0.15, "ks_before": 0.1, "ks_after": 0.07, "flagged": True},
            {"covariate": "role", "level": "b", "kind": "binary", "smd_before": 0.3,
             "smd_after": -0.02, "ks_before": 0.1, "ks_after": 0.01, "flagged": False}],
            "max_abs_smd_before": 0.4, "max_abs_smd_after": 0.15,
            "rubin": {"B_before": 0.8, "R_before": 1.2, "B_after": 0.1, "R_after": 1.0}},
        "test": {"statistic": 1.9, "p_value": 0.012, "mc_se": 0.003, "engine": "monte_carlo",
                 "null": "sharp null: no effect for any unit", "alternative": "two-sided",
                 "resamples": 999, "seed": 11, "normal_mean": 0.0, "normal_variance": 0.5,
                 "statistic_label": "covariance-adjusted stratified difference"},
        "crude": {"estimate": 3.0, "se": 0.9, "ci_low": 1.2, "ci_high": 4.8,
                  "measure": "mean difference", "estimand": "crude (unadjusted)"},
        "adjusted": {"estimate": 2.0, "se": 0.8, "ci_low": 0.43, "ci_high": 3.57,
                     "measure": "mean difference", "estimand": "ATE", "alpha": 0.05,
                     "scale": "identity",
                     "per_stratum": [{"stratum": 0, "n_exposed": 15, "n_reference": 35,
                                      "estimate": 1.5, "se": 1.0, "ci_low": -0.46,
                                      "ci_high": 3.46, "weight": 0.51, "model": "interactions"},
                                     {"stratum": 1, "n_exposed": 24, "n_reference": 24,
                                      "estimate": 2.5, "se": 1.1, "ci_low": 0.34,
                                      "ci_high": 4.66, "weight": 0.49, "model": "main effects"}],
                     "plain_stratified": {"estimate": 2.2, "se": 0.85, "ci_low": 0.5,
                                          "ci_high": 3.9, "measure": "mean difference"},
                     "constant_effect": {"estimate": 1.95, "ci_low": 0.5, "ci_high": 3.5,
                                         "p_value_at_zero": 0.012,
                                         "curve_tau": np.linspace(-1, 5, 61).tolist(),
                                         "curve_p": (2 * stats.norm.sf(
                                             np.abs(np.linspace(-1, 5, 61) - 1.95) / 0.78)).tolist()},
                     "mantel_haenszel": None},
        "heterogeneity": {"cochran_q": {"statistic": 0.45, "df": 1, "p_value": 0.5,
                                        "method": "Cochran's Q"}},
        "cross_checks": [{"method": "IPW (Hajek)", "estimate": 2.1, "se": 0.9, "ci_low": 0.3,
                          "ci_high": 3.9, "measure": "difference", "estimand": "ATE",
                          "estimand_kind": "marginal", "se_method": "stacked"},
                         {"method": "AIPW", "estimate": 1.9, "se": 0.8, "ci_low": 0.3,
                          "ci_high": 3.5, "measure": "difference", "estimand": "ATE",
                          "estimand_kind": "marginal", "se_method": "influence function"}],
        "cross_check_weights": None,
        "sensitivity": {
            "e_value": {"point": 1.6, "ci_limit": 1.1, "computed_from": "d = 0.2"},
            "gamma_threshold": 1.42, "gamma_level": 0.025, "gamma_direction": "greater",
            "gamma_threshold_detail": {"gamma": 1.42, "gamma_separable": 1.5, "flag": "ok",
                                       "alpha": 0.025, "alpha_note": "one-sided at 0.025"},
            "gamma_curve": [{"gamma": g, "p_upper": p, "p_separable": p * 0.8} for g, p in
                            [(1.0, 0.006), (1.25, 0.015), (1.5, 0.03), (2.0, 0.09), (3.0, 0.3)]],
            "gamma_bounds": {"method": "bracket", "method_text": "bracket"},
            "tipping": {"measure": "difference", "prevalence_gap": grid_gap,
                        "outcome_shift": grid_shift, "corrected_estimate": est,
                        "corrected_ci_low": [e - 1.57 for e in est],
                        "corrected_ci_high": [e + 1.57 for e in est],
                        "tipping_curve": [{"prevalence_gap": g, "outcome_shift": 0.43 / g}
                                          for g in (0.1, 0.2, 0.4)],
                        "benchmarks": [{"name": "age (above median)", "prevalence_gap": 0.2,
                                        "outcome_shift": 1.5, "ci_includes_null": False},
                                       {"name": "role[b]", "prevalence_gap": 0.1,
                                        "outcome_shift": 0.5, "ci_includes_null": False}],
                        "caveat": "benchmarks can mislead", "note": "difference scale"}},
        "negative_control": None,
        "verdict": "The gap survives adjustment for the measured covariates.",
        "warnings": [{"kind": "OverlapWarning", "message": "2 units outside the other range"}],
        "cautions": ["Observational evidence only.", "Not medical advice."],
    }
    raw = pd.DataFrame({"age": np.r_[rng.normal(50, 8, 40), rng.normal(45, 8, 60)],
                        "role": rng.choice(["a", "b"], 100), "smoker": rng.integers(0, 2, 100)})
    arrays = {"score": score, "t_all": t_all, "keep": keep, "used": used, "t": t_all[used],
              "raw": raw}
    view = ResultView(data=data, arrays=arrays, null_distribution=rng.normal(0, 0.7, 999),
                      run={"seconds": 1.5, "versions": {"stratagap": "0.1.0", "numpy": "2"}})
    for key, value in changes.items():
        setattr(view, key, value)
    return view


# ----------------------------------------------------------------------------- figures (unit)
@pytest.mark.parametrize("name,function", [(n, f) for n, f, _c in FIGURES])
def test_every_figure_draws_and_serializes(name, function):
    fig = function(handmade())
    assert isinstance(fig, Figure)
    assert fig.axes and fig.get_suptitle()
    png = figure_bytes(fig, "png", dpi=60)
    assert png[:8] == b"\x89PNG\r\n\x1a\n" and len(png) > 2000
    root = svg_root(figure_bytes(fig, "svg"))
    assert len(list(root.iter())) > 50  # something was drawn, not an empty canvas


def test_figures_draw_without_per_unit_arrays():
    view = handmade(arrays={}, null_distribution=None)
    for _name, function, _c in FIGURES:
        assert isinstance(function(view), Figure)


def test_null_distribution_normal_engine_draws_the_normal_curve():
    view = handmade(null_distribution=None)
    fig = plot_null_distribution(view)
    line = [ln for ln in fig.axes[0].get_lines() if len(ln.get_xdata()) > 100][0]
    x, y = np.asarray(line.get_xdata()), np.asarray(line.get_ydata())
    # N(normal_mean, normal_variance) of the result, drawn not recomputed (scipy density)
    np.testing.assert_allclose(y, stats.norm.pdf(x, 0.0, math.sqrt(0.5)), rtol=1e-12)


def test_p_value_function_draws_the_results_curve():
    view = handmade()
    fig = plot_p_value_function(view)
    ce = view.data["adjusted"]["constant_effect"]
    curve = fig.axes[0].get_lines()[0]
    np.testing.assert_array_equal(curve.get_xdata(), ce["curve_tau"])
    np.testing.assert_array_equal(curve.get_ydata(), ce["curve_p"])
    assert "inversion" in fig.get_suptitle()


def test_p_value_function_binary_outcome_is_the_wald_curve():
    view = handmade()
    view.data["adjusted"].update(constant_effect=None, estimate=0.08, se=0.02,
                                 measure="risk difference")
    fig = plot_p_value_function(view)
    assert fig.get_suptitle().startswith("Wald confidence curve")
    line = fig.axes[0].get_lines()[0]
    x, p = np.asarray(line.get_xdata()), np.asarray(line.get_ydata())
    # The normal curve crosses 0.05 at estimate -/+ 1.959964 SE (standard normal quantile).
    half = stats.norm.ppf(0.975) * 0.02
    np.testing.assert_allclose(np.interp(0.08 - half, x, p), 0.05, atol=2e-4)
    assert p.max() == pytest.approx(1.0, abs=1e-3)


def test_gamma_curve_marks_the_sensitivity_value():
    fig = plot_gamma_curve(handmade())
    vertical = [ln for ln in fig.axes[0].get_lines() if len(set(ln.get_xdata())) == 1]
    assert any(ln.get_xdata()[0] == 1.42 for ln in vertical)
    assert fig.axes[0].get_yscale() == "log"


def _figure_texts(fig):
    from matplotlib.table import Table
    texts = [t.get_text() for ax in fig.axes for t in ax.texts]
    for ax in fig.axes:
        for table in (c for c in ax.get_children() if isinstance(c, Table)):
            texts += [cell.get_text().get_text() for cell in table.get_celld().values()]
    return texts


def test_tipping_labels_benchmarks_by_their_own_names():
    fig = plot_tipping(handmade())
    texts = _figure_texts(fig)
    assert "age (above median)" in texts and "role[b]" in texts
    assert not any(re.search(r"\d\s*[x×]", t) for t in texts)  # no "2x" multiples


def test_tipping_figure_draws_the_curve_and_signed_reference_points():
    """The curve is the result's own; reference covariates sit at their signed values."""
    view = handmade()
    view.data["sensitivity"]["tipping"]["benchmarks"][1]["prevalence_gap"] = -0.1
    fig = plot_tipping(view)
    ax = fig.axes[0]
    curve = [ln for ln in ax.get_lines() if len(ln.get_xdata()) == 3]
    np.testing.assert_allclose(curve[0].get_xdata(), [0.1, 0.2, 0.4])
    np.testing.assert_allclose(curve[0].get_ydata(), [0.43 / g for g in (0.1, 0.2, 0.4)])
    points = {tuple(np.ravel(ln.get_xydata())) for ln in ax.get_lines() if len(ln.get_xdata()) == 1
              and ln.get_marker() == "D"}
    assert (0.2, 1.5) in points and (-0.1, 0.5) in points  # signed, not absolute values
    assert "-0.100" in _figure_texts(fig)  # and the side table shows the same sign
    assert not [c for c in ax.collections if c.__class__.__name__ == "QuadContourSet"]


def test_gamma_figure_keeps_the_level_line_when_not_significant():
    view = handmade()
    sens = view.data["sensitivity"]
    sens["gamma_curve"] = [{"gamma": g, "p_upper": p, "p_separable": p} for g, p in
                           [(1.0, 0.4), (2.0, 0.7), (3.0, 0.9)]]
    sens["gamma_threshold_detail"]["flag"] = "not significant at Gamma=1"
    ax = plot_gamma_curve(view).axes[0]
    low, high = ax.get_ylim()
    assert low < sens["gamma_level"] < high


def test_balance_rows_sorted_and_flag_line():
    fig = plot_balance(handmade())
    ax = fig.axes[0]
    labels = [t.get_text() for t in ax.get_yticklabels()]
    assert labels[0] == "age"  # largest |SMD| before on top
    assert sorted(labels) == sorted(["age", "role: a", "role: b"])
    assert any(tuple(ln.get_xdata()) == (0.1, 0.1) for ln in ax.get_lines())


def test_stratum_effects_one_marker_per_stratum():
    from matplotlib.collections import PathCollection
    fig = plot_stratum_effects(handmade())
    marks = [c for c in fig.axes[0].collections if isinstance(c, PathCollection)]
    assert [tuple(c.get_offsets()[0]) [0] for c in marks] == [1.5, 2.5]  # the per-stratum estimates
    sizes = [c.get_sizes()[0] for c in marks]
    assert sizes[0] > sizes[1]  # area follows the estimand weight (0.51 vs 0.49)


def test_overlap_counts_are_shares_of_each_group():
    view = handmade()
    fig = plot_overlap(view)
    patches = [p for p in fig.axes[0].patches if p.get_label().startswith("exposed (nights), n")]
    assert patches  # exposed drawn above the axis, labelled with its size
    assert "n = 40" in patches[0].get_label()


def test_cross_checks_include_headline_and_every_method():
    fig = plot_cross_checks(handmade())
    labels = [t.get_text() for t in fig.axes[0].get_yticklabels()]
    assert labels[0].startswith("crude") and "IPW (Hajek) [marginal]" in labels and "AIPW [marginal]" in labels


def test_svg_text_of_user_strings_is_escaped():
    view = handmade()
    view.data["balance"]["rows"][0]["covariate"] = '<b>markup</b> & "<script>"'
    data = figure_bytes(plot_balance(view), "svg")
    assert b"<b>" not in data and b"<script>" not in data
    assert b"&lt;b&gt;markup&lt;/b&gt;" in data
    root = svg_root(data)
    assert not [e for e in root.iter() if e.tag in ("b", "script", SVG_NS + "script")]
    texts = "".join(e.text or "" for e in root.iter(SVG_NS + "text"))
    assert '<b>markup</b> & "<script>"' in texts


def test_dollar_signs_do_not_start_mathtext():
    view = handmade()
    view.data["balance"]["rows"][0]["covariate"] = "cost $ per $ visit"
    figure_bytes(plot_balance(view), "png", dpi=40)  # would raise on bad mathtext


# ----------------------------------------------------------------------------- baseline and flow
def test_baseline_table_matches_direct_computation():
    view = handmade()
    raw = view.arrays["raw"].iloc[view.arrays["used"]]
    t = view.arrays["t"]
    table = baseline_table(view)
    age = table[table.characteristic == "age"].iloc[0]
    exposed_age = raw.loc[t == 1, "age"]
    assert age.summary == "mean (SD)"  # normal draws: |skewness| < 1
    assert age.exposed == f"{np.mean(exposed_age):,.1f} ({np.std(exposed_age, ddof=1):,.1f})"
    assert age.smd_before == 0.40 and age.smd_after == 0.05  # the balance rows, not recomputed
    role_b = table[(table.characteristic == "role") & (table.level == "b")].iloc[0]
    n_b = int((raw.loc[t == 0, "role"] == "b").sum())
    assert role_b.reference == f"{n_b:,} ({100 * n_b / int((t == 0).sum()):.1f} %)"
    assert role_b.smd_after == -0.02
    assert table.iloc[0].exposed == "39" and table.iloc[0].reference == "59"


def test_baseline_skewed_covariate_uses_median_iqr():
    view = handmade()
    rng = np.random.default_rng(1)
    view.arrays["raw"] = view.arrays["raw"].assign(age=rng.exponential(3.0, 100))
    row = baseline_table(view).query("characteristic == 'age'").iloc[0]
    assert row.summary.startswith("median (Q1 to Q3)")
    x = view.arrays["raw"].iloc[view.arrays["used"]].age.to_numpy()[view.arrays["t"] == 1]
    q1, med, q3 = np.percentile(x, [25, 50, 75])  # numpy's default linear interpolation = pandas'
    assert row.exposed == f"{med:,.2f} ({q1:,.2f} to {q3:,.2f})"


def test_baseline_without_raw_keeps_smds():
    view = handmade()
    del view.arrays["raw"]
    table = baseline_table(view)
    assert list(table.smd_before.dropna()) == [0.40, -0.3, 0.3]
    assert (table.exposed.iloc[1:] == "").all()


def test_baseline_markdown_and_latex_escape_user_text():
    view = handmade()
    view.data["question"]["exposed_value"] = "a|b & c_d 50%"
    table = baseline_table(view)
    md = baseline_markdown(table, view.data)
    assert "a\\|b & c_d 50%" in md and len(md.splitlines()) == len(table) + 2
    assert "| Characteristic | Level | Shown as | Exposed: a\\|b & c_d 50% |" in md
    assert "Std. difference, crude (after trimming) | Std. difference, within strata |" in md
    tex = baseline_latex(table, view.data)
    assert r"a|b \& c\_d 50\%" in tex and tex.count(r"\\") >= len(table) + 1


def test_flow_steps_counts():
    steps = flow_steps(handmade().data["flow"])
    assert [s["n"] for s in steps] == [110, 100, 98]
    assert steps[0]["exits"][0]["n"] == 10
    assert "age 7" in steps[0]["exits"][0]["lines"][0]
    assert steps[1]["exits"][0]["n"] == 2
    assert steps[2]["detail"] == "exposed 39, reference 59"


# ----------------------------------------------------------------------------- HTML from a hand-made result
@pytest.fixture(scope="module")
def handmade_html():
    view = handmade()
    return render_html(view), render_html(view, compact=True)


def test_handmade_report_structure_and_warnings(handmade_html):
    tree = parse(handmade_html[0])
    assert [a["data-section"] for a in tree.find("section")] == SECTIONS
    assert [a["data-figure"] for a in tree.find("img")] == FIGURE_NAMES
    assert tree.rows_of("sg-strata-table") == 2
    assert tree.rows_of("sg-balance-table") == 3
    assert tree.rows_of("sg-gamma-table") == 5
    assert tree.rows_of("sg-benchmark-table") == 2
    text = " ".join(tree.text)
    assert "2 units outside the other range" in text and "OverlapWarning" in text
    captions = [c for c in tree.text if c.startswith("Figure ")]
    assert [int(c.split()[1].rstrip(".")) for c in captions] == list(range(1, len(FIGURES) + 1))


def test_compact_fragment_is_scoped(handmade_html):
    html = handmade_html[1]
    tree = parse(html)
    assert not tree.find("html") and not tree.find("meta")
    assert [a["data-section"] for a in tree.find("section")] == SECTIONS
    assert len(tree.find("img")) == len(FIGURES)
    css = re.search(r"<style>(.*?)</style>", html, re.S).group(1)
    css = re.sub(r"/\*.*?\*/", "", css, flags=re.S)
    css = re.sub(r"@media print\s*{", "", css)
    selectors = [s.strip() for block in re.findall(r"([^{}]+){", css) for s in block.split(",")]
    loose = [s for s in selectors if s and not s.startswith((".sg-report", "@page"))]
    assert not loose, loose


def test_escaping_in_html_from_handmade_view():
    view = handmade()
    evil = '<b>markup</b>"<script>alert(1)</script>'
    view.data["question"]["exposure"] = evil
    view.data["source"]["file"] = evil + ".csv"
    view.data["balance"]["rows"][1]["level"] = evil
    view.data["sensitivity"]["tipping"]["benchmarks"][0]["name"] = evil
    html = render_html(view)
    tree = parse(html)
    assert not tree.find("script") and not tree.find("b")
    assert "<script>" not in html and "<b>markup" not in html
    assert sum(evil in chunk for chunk in tree.text) >= 4


# ----------------------------------------------------------------------------- a real report
@pytest.fixture(scope="module")
def demo_result():
    data = make_shift_work_data(n=1200, seed=7).drop(columns=["_true_effect"])
    result = stratagap.analyze(data, exposure="shift", exposed_value="nights",
                               outcome="systolic_bp", covariates=["age", "bmi", "smoker", "role"],
                               negative_control="hearing_db", resamples=500, seed=7,
                               source={"file": "shift_work.csv", "sha256": "0" * 64,
                                       "command": "stratagap demo"})
    if "raw" not in result.arrays:  # until the pipeline carries the analysed rows' raw columns
        from stratagap.data import prepare
        prepared = prepare(data, exposure="shift", exposed_value="nights", outcome="systolic_bp",
                           covariates=["age", "bmi", "smoker", "role"],
                           negative_control="hearing_db")
        result.arrays["raw"] = prepared.raw
    return result


@pytest.fixture(scope="module")
def report_folder(demo_result, tmp_path_factory):
    folder = tmp_path_factory.mktemp("report")
    written = write_report(demo_result, folder, write=write_atomic)
    return folder, written


def test_write_report_files(report_folder):
    folder, written = report_folder
    expected = {folder / "report.html", folder / "baseline.csv", folder / "baseline.md",
                folder / "baseline.tex"}
    expected |= {folder / "figures" / f"{n}.{ext}" for n in FIGURE_NAMES for ext in ("png", "svg")}
    assert set(written) == expected and len(written) == len(expected)
    for name in FIGURE_NAMES:
        assert (folder / "figures" / f"{name}.png").read_bytes()[:4] == b"\x89PNG"
        svg_root((folder / "figures" / f"{name}.svg").read_bytes())
    assert not list(folder.rglob("*.tmp"))  # atomic writer left nothing behind


def test_report_sections_in_issue_order(report_folder):
    tree = parse((report_folder[0] / "report.html").read_text("utf-8"))
    assert [a["data-section"] for a in tree.find("section")] == SECTIONS
    headings = [p for t, _a, p in tree.elements if t == "h2"]
    assert len(headings) == len(SECTIONS)


def test_every_figure_embedded_and_non_empty(report_folder):
    folder = report_folder[0]
    tree = parse((folder / "report.html").read_text("utf-8"))
    images = tree.find("img")
    assert [a["data-figure"] for a in images] == FIGURE_NAMES
    for attrs in images:
        prefix = "data:image/svg+xml;base64,"
        assert attrs["src"].startswith(prefix) and attrs["alt"]
        svg = base64.b64decode(attrs["src"][len(prefix):], validate=True)
        assert svg == (folder / "figures" / f"{attrs['data-figure']}.svg").read_bytes()
        assert len(list(svg_root(svg).iter())) > 50


def test_report_tables_have_the_results_rows(demo_result, report_folder):
    tree = parse((report_folder[0] / "report.html").read_text("utf-8"))
    data = demo_result.to_dict()
    assert tree.rows_of("sg-strata-table") == len(data["strata"])
    assert tree.rows_of("sg-balance-table") == len(data["balance"]["rows"])
    assert tree.rows_of("sg-baseline-table") == len(demo_result.tables.baseline)
    assert tree.rows_of("sg-gamma-table") == len(data["sensitivity"]["gamma_curve"])
    assert tree.rows_of("sg-benchmark-table") == len(data["sensitivity"]["tipping"]["benchmarks"])
    cross = [t for t in tree.elements if t[0] == "table"]
    assert cross  # the cross-check table follows the estimates table
    # baseline: 1 N row + age + bmi + smoker + role header + 3 levels
    assert len(demo_result.tables.baseline) == 8
    text = " ".join(tree.text)
    assert data["verdict"] in text
    for caution in data["cautions"]:
        assert caution in text
    assert "hearing_db" in text  # negative control shown


def test_report_forbids_remote_loads(report_folder):
    html = (report_folder[0] / "report.html").read_text("utf-8")
    tree = parse(html)
    csp = tree.find("meta", **{"http-equiv": "Content-Security-Policy"})
    assert csp and csp[0]["content"] == CSP
    assert not tree.find("script") and not tree.find("link") and not tree.find("iframe")
    for _tag, attrs, _p in tree.elements:
        for key in ("src", "href"):
            assert not str(attrs.get(key, "")).startswith(("http:", "https:", "//"))
    assert not re.search(r"url\(\s*['\"]?(https?:|//)", html)
    assert "@media print" in html and "break-before: page" in html


def test_reproducibility_spec_reads_back(demo_result, report_folder, tmp_path):
    html = (report_folder[0] / "report.html").read_text("utf-8")
    text = re.search(r'<pre id="sg-spec">(.*?)</pre>', html, re.S).group(1)
    import html as html_lib
    spec_text = html_lib.unescape(text)
    assert tomllib.loads(spec_text)["analysis"]["seed"] == 7
    path = tmp_path / "again.toml"
    path.write_text(spec_text, encoding="utf-8")
    from stratagap.spec import load_spec_file
    options = load_spec_file(path)
    assert options["exposure"] == "shift" and options["resamples"] == 500
    assert options["covariates"] == ["age", "bmi", "smoker", "role"]
    tree = parse(html)
    text = " ".join(tree.text)
    assert "stratagap demo" in text and "numpy" in text


def test_compact_fragment_and_notebook_view(demo_result):
    # the compact fragment: every section and figure, no document wrapper
    tree = parse(render_html(demo_result, compact=True))
    assert [a["data-section"] for a in tree.find("section")] == SECTIONS
    assert len(tree.find("img")) == len(FIGURES)
    assert not tree.find("html")
    # a notebook cell shows a light view instead: the verdict, the estimates, two figures
    light = parse(demo_result._repr_html_())
    assert not light.find("section") and len(light.find("img")) == 2 and not light.find("html")


def test_escaping_with_real_column_names_and_levels(tmp_path):
    data = make_shift_work_data(n=500, seed=3).drop(columns=["_true_effect"])
    evil_col, evil_cat = "<b>age</b>", '"<script>"'
    data = data.rename(columns={"age": evil_col, "role": evil_cat})
    data[evil_cat] = data[evil_cat].replace({"porter": "<i>porter</i>",
                                             "admin": "<script>alert(1)</script>"})
    result = stratagap.analyze(data, exposure="shift", exposed_value="nights",
                               outcome="systolic_bp",
                               covariates=[evil_col, "bmi", "smoker", evil_cat],
                               resamples=200, engine="normal", seed=3)
    html = render_html(result)
    tree = parse(html)
    assert not tree.find("script") and not tree.find("b") and not tree.find("i")
    text = "".join(tree.text)
    assert evil_col in text and "<script>alert(1)</script>" in text and "<i>porter</i>" in text


def _ratio_headline(view):
    view.data["adjusted"].update(estimate=1.3, se=0.1, ci_low=1.07, ci_high=1.58, scale="log",
                                 measure="risk ratio", constant_effect=None)
    return view


def test_ratio_headline_never_mixes_scales():
    view = _ratio_headline(handmade())
    fig = plot_cross_checks(view)
    left, right = fig.axes[:2]
    assert right.get_xscale() == "log" and left.get_xscale() == "linear"
    assert any(tuple(ln.get_xdata()) == (1.0, 1.0) for ln in right.get_lines())  # ratio null
    assert any(tuple(ln.get_xdata()) == (0.0, 0.0) for ln in left.get_lines())   # difference null
    fig = plot_stratum_effects(view)
    labels = [t.get_text() for t in fig.axes[0].get_yticklabels()]
    assert "pooled (headline)" not in labels and not fig.axes[0].patches
    fig = plot_p_value_function(view)
    line = fig.axes[0].get_lines()[0]
    x, p = np.asarray(line.get_xdata()), np.asarray(line.get_ydata())
    assert fig.axes[0].get_xscale() == "log"
    # Wald curve on the log scale: p = 2 Phi(-|log x - log 1.3| / 0.1)
    np.testing.assert_allclose(p, 2 * stats.norm.sf(np.abs(np.log(x) - np.log(1.3)) / 0.1),
                               rtol=1e-9)


def test_same_result_same_bytes(handmade_html):
    """Same inputs give the same page and figures (fixed SVG ids and metadata)."""
    view = handmade()
    assert render_html(view) == handmade_html[0]
    assert figure_bytes(plot_tipping(view), "svg") == figure_bytes(plot_tipping(handmade()), "svg")


def test_overlap_gives_each_group_its_own_scale():
    """A small exposed group next to a large reference group: each panel fits its own bars."""
    view = handmade()
    fig = plot_overlap(view)
    top, bottom = fig.axes[0], fig.axes[1]
    from matplotlib.patches import StepPatch
    for ax in (top, bottom):
        heights = [abs(y) for p in ax.patches if isinstance(p, StepPatch)
                   for y in np.ravel(p.get_path().vertices[:, 1])]
        assert max(heights) <= max(abs(v) for v in ax.get_ylim()) <= max(heights) * 1.1
    assert bottom.yaxis_inverted() and not top.yaxis_inverted()
    assert not top.texts and not bottom.texts  # labels live in the legend, not on the bars


def test_baseline_crude_header_says_after_trimming():
    view = handmade()
    from stratagap.render.report.baseline import crude_label
    view.data["flow"]["trimmed_by_group"] = {"exposed": 0, "reference": 0}
    assert crude_label(view.data) == "Std. difference, crude"
    view.data["flow"]["trimmed_by_group"] = {"exposed": 0, "reference": 12}
    assert crude_label(view.data) == "Std. difference, crude (after trimming)"


def test_report_says_which_terms_with_knots(report_folder, demo_result):
    text = (report_folder[0] / "report.html").read_text("utf-8")
    forms = demo_result.prepared_summary.covariate_terms
    assert forms and forms[0]["form"] == "spline"
    knots = ", ".join(format_value(k) for k in forms[0]["knots"])
    assert f"<dt>Terms</dt><dd>{forms[0]['label']} at {knots}" in text
