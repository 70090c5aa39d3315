"""The report: one self-contained HTML page with eight figures, and the tables behind it.

:func:`write_report` writes ``report.html``, each figure as PNG and SVG, and the baseline table
(CSV, Markdown, LaTeX); :func:`render_html` gives the page as a string (``compact=True`` for the
notebook view). Each ``plot_*`` function returns a :class:`matplotlib.figure.Figure` drawn from
a result, so it can be restyled for a manuscript. Nothing here recomputes a statistic.
"""

from .baseline import baseline_latex, baseline_markdown, baseline_table
from .figures_design import plot_balance, plot_overlap
from .figures_inference import (plot_cross_checks, plot_null_distribution, plot_p_value_function,
                                plot_stratum_effects)
from .figures_sensitivity import plot_gamma_curve, plot_tipping
from .flow import flow_steps
from .html import FIGURES, render_html, write_report

__all__ = ["write_report", "render_html", "plot_overlap", "plot_balance",
           "plot_null_distribution", "plot_stratum_effects", "plot_gamma_curve", "plot_tipping",
           "plot_cross_checks", "plot_p_value_function", "baseline_table", "baseline_markdown",
           "baseline_latex", "flow_steps", "FIGURES"]
