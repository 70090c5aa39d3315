"""One self-contained HTML page per result, and the files that go with it.

The page opens offline: figures are embedded as base64 SVG data URIs, the stylesheet is inline,
there are no scripts, and a Content-Security-Policy meta tag forbids every remote load
(``default-src 'none'; img-src data:; style-src 'unsafe-inline'``), which also makes "nothing
was fetched" checkable in a browser. The template is rendered by jinja2 with autoescape on, so
every string from the user's data or arguments is HTML-escaped.
"""

from __future__ import annotations

import base64
from importlib import resources
from pathlib import Path

import jinja2

from ..formatting import format_p
from ._context import build_context
from ._style import figure_bytes, finish, view_of
from .baseline import baseline_latex, baseline_markdown, baseline_table
from .figures_design import plot_balance, plot_overlap
from .figures_inference import (plot_cross_checks, plot_null_distribution,
                                plot_p_value_function, plot_stratum_effects)
from .figures_sensitivity import plot_gamma_curve, plot_tipping
from .figures_survival import has_survival_curves, plot_survival_curves

__all__ = ["render_html", "write_report", "FIGURES", "CSP"]

CSP = "default-src 'none'; img-src data:; style-src 'unsafe-inline'"

#: (file name, function, caption) in the order the report shows them (figure numbers follow it).
FIGURES = (
    ("overlap", plot_overlap, "Propensity-score distributions of the two groups, mirrored, "
     "with the overlap rule's bounds; hatched bars are units set aside."),
    ("balance", plot_balance, "Absolute standardized mean difference of each covariate (and "
     "dummy level) before and after adjustment; dashed line: 0.1 (common practice)."),
    ("null_distribution", plot_null_distribution, "Distribution of the test statistic under "
     "within-strata shuffles of the exposure labels, with the observed value and p-value."),
    ("stratum_effects", plot_stratum_effects, "Effect within each stratum with its CI, and the "
     "pooled headline estimate (diamond); with more than 40 strata (matched sets), the "
     "distribution of the stratum effects beside the pooled estimate and its CI."),
    ("p_value_function", plot_p_value_function, "The p-value function: p-value against the "
     "hypothesized effect; the CI is where it lies above α."),
    ("cross_checks", plot_cross_checks, "The headline estimate beside the cross-check "
     "estimators and the crude comparison."),
    ("gamma_curve", plot_gamma_curve, "Upper bound on the one-sided p-value against the "
     "sensitivity parameter Γ, with the level and the sensitivity value."),
    ("tipping", plot_tipping, "Bias-corrected estimate over the prevalence gap and outcome "
     "effect of a binary unmeasured confounder, with measured covariates for scale."),
)


#: Shown after the stratum effects for a time-to-event outcome only.
SURVIVAL_FIGURE = ("survival_curves", plot_survival_curves, "Adjusted survival of the two "
                   "groups to the horizon with pointwise bands, and the units still at risk.")


def _figure_list(view) -> tuple:
    if not has_survival_curves(view):
        return FIGURES
    at = [name for name, _f, _c in FIGURES].index("stratum_effects") + 1
    return FIGURES[:at] + (SURVIVAL_FIGURE,) + FIGURES[at:]


def _environment() -> jinja2.Environment:
    folder = resources.files("stratagap.render.report").joinpath("templates")
    env = jinja2.Environment(
        loader=jinja2.FunctionLoader(lambda name: folder.joinpath(name).read_text("utf-8")),
        autoescape=True, undefined=jinja2.StrictUndefined, trim_blocks=True, lstrip_blocks=True,
        keep_trailing_newline=True)
    env.filters["p"] = format_p
    return env


def _figures(view, formats=("svg",), dpi=150) -> dict:
    """Render every figure once; returns name -> {"caption", formats...: bytes}."""
    out = {}
    for number, (name, function, caption) in enumerate(_figure_list(view), start=1):
        fig = finish(function(view))  # laid out once, then frozen: each save would redo it
        entry = {"caption": f"Figure {number}. {caption}"}
        for fmt in formats:
            entry[fmt] = figure_bytes(fig, fmt, dpi=dpi)
        entry["uri"] = "data:image/svg+xml;base64," + base64.b64encode(entry["svg"]).decode("ascii")
        out[name] = entry
        fig.clear()
    return out


def _render(view, figures, compact) -> str:
    context = build_context(view, figures, compact=compact)
    context["css"] = resources.files("stratagap.render.report").joinpath(
        "templates", "report.css").read_text("utf-8")
    context["csp"] = CSP
    context["followup"] = view.data.get("followup")  # time-to-event or rate block, or None
    return _environment().get_template("report.html").render(**context)


def render_html(result, compact: bool = False) -> str:
    """The report as one HTML string.

    Parameters
    ----------
    result : AnalysisResult
    compact : bool, default False
        A fragment for notebooks (``_repr_html_``): the same sections and figures, smaller, in
        a ``<div>`` whose styles are scoped to it; no document wrapper.

    Returns
    -------
    str
    """
    view = view_of(result)
    return _render(view, _figures(view), compact)


def write_report(result, folder, *, write) -> list[Path]:
    """Write ``report.html``, every figure as PNG and SVG, and the baseline table.

    Parameters
    ----------
    result : AnalysisResult
    folder : path-like
        An existing folder (see :func:`stratagap.render.files.prepare_folder`).
    write : callable(path, str | bytes)
        The atomic writer (:func:`stratagap.render.files.write_atomic`).

    Returns
    -------
    list of pathlib.Path
        The files written, in order.
    """
    folder = Path(folder)
    view = view_of(result)
    figures = _figures(view, formats=("svg", "png"))
    written = []

    def put(path, content):
        write(path, content)
        written.append(path)

    fig_dir = folder / "figures"
    fig_dir.mkdir(exist_ok=True)
    for name, entry in figures.items():
        put(fig_dir / f"{name}.png", entry["png"])
        put(fig_dir / f"{name}.svg", entry["svg"])
    table = baseline_table(view)
    put(folder / "baseline.csv", table.to_csv(index=False, lineterminator="\n"))
    put(folder / "baseline.md", baseline_markdown(table, view.data))
    put(folder / "baseline.tex", baseline_latex(table, view.data))
    put(folder / "report.html", _render(view, figures, compact=False))
    return written
