"""The report's visual identity, and the read-only view of a result that the figures draw from.

Palette: Paul Tol's "vibrant" qualitative scheme, designed to stay distinguishable under the
common forms of colour-vision deficiency (Tol 2021, *Colour schemes*, SRON technical note
SRON/EPS/TN/09-002, fig. 2). Figures are built on :class:`matplotlib.figure.Figure` directly (no
pyplot state), rendered with the Agg canvas, and never recompute a statistic: everything they
show comes from the result.

References
----------
Tol, P. (2021). Colour schemes. SRON technical note SRON/EPS/TN/09-002, issue 3.2.
"""

from __future__ import annotations

import io
import textwrap
from contextlib import contextmanager
from dataclasses import dataclass, field

import matplotlib
# Figures get the Agg canvas directly, so nothing here needs a display or touches the global
# pyplot backend (a notebook's inline backend stays as the user set it).
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

__all__ = ["PALETTE", "EXPOSED", "REFERENCE", "ACCENT", "ALERT", "NEUTRAL", "INK",
           "new_figure", "finish", "percentage_points", "figure_bytes", "plain", "ResultView", "view_of", "style"]

#: Tol (2021) "vibrant" scheme.
PALETTE = {"blue": "#0077BB", "cyan": "#33BBEE", "teal": "#009988", "orange": "#EE7733",
           "red": "#CC3311", "magenta": "#EE3377", "grey": "#BBBBBB"}
EXPOSED = PALETTE["orange"]
REFERENCE = PALETTE["blue"]
ACCENT = PALETTE["teal"]
ALERT = PALETTE["magenta"]
NEUTRAL = PALETTE["grey"]
INK = "#2B2B2B"
MUTED = "#6B6B6B"

_RC = {
    "font.family": "DejaVu Sans",  # ships with matplotlib: identical output everywhere
    "font.size": 9.5,
    "axes.edgecolor": MUTED,
    "axes.labelcolor": INK,
    "axes.titlesize": 9,
    "axes.titlecolor": MUTED,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.grid": True,
    "axes.axisbelow": True,
    "grid.color": "#E4E0D8",
    "grid.linestyle": (0, (1, 2)),
    "grid.linewidth": 0.8,
    "xtick.color": MUTED,
    "ytick.color": MUTED,
    "legend.frameon": False,
    "legend.fontsize": 8.5,
    "figure.facecolor": "#FFFFFF",
    "savefig.facecolor": "#FFFFFF",
    "svg.fonttype": "none",      # text stays text (searchable; matplotlib escapes it)
    "svg.hashsalt": "stratagap",  # stable element ids: same result, same SVG bytes
}


def plain(text) -> str:
    """User text for a matplotlib label: ``$`` would otherwise start mathtext."""
    return str(text).replace("$", r"\$")


@contextmanager
def style():
    with matplotlib.rc_context(_RC):
        yield


def new_figure(title: str, subtitle: str = "", *, size=(7.2, 4.2), nrows=1, ncols=1, **kw):
    """A Figure with our title block: bold, left-aligned title; grey subtitle on the axes."""
    with style():
        fig = Figure(figsize=size, layout="constrained")
        FigureCanvasAgg(fig)
        axes = fig.subplots(nrows, ncols, squeeze=False, **kw)
        fig.suptitle(title, x=0.01, ha="left", fontsize=11.5, fontweight="bold", color=INK)
        if subtitle:  # wrapped to the axes width (tick labels can take a third of 7.2 in)
            width = int(78 * size[0] / 7.2)
            axes[0, 0].set_title(textwrap.fill(subtitle, width), loc="left")
            fig._subtitle = (axes[0, 0], subtitle, width)  # read by finish()
    return fig, (axes[0, 0] if nrows * ncols == 1 else axes)


def finish(fig: Figure, *, freeze: bool = True) -> Figure:
    """Lay a figure out once and freeze the layout, re-wrapping its subtitle when the axes
    start so far right (long row labels) that a line would run past the figure's edge and be
    clipped (issue 10: the cross-check figure's subtitle). The report calls this before saving
    (``freeze``: each save would otherwise redo the layout); notebooks keep the layout live."""
    with style():
        fig.draw_without_rendering()
        ax, subtitle, width = getattr(fig, "_subtitle", (None, "", 0))
        for _ in range(4):
            if ax is None:
                break
            renderer = fig.canvas.get_renderer()
            right = fig.bbox.x1 - 4  # pixels
            extent = ax._left_title.get_window_extent(renderer)  # the loc="left" title
            if extent.x1 <= right or width <= 20:
                break
            width = max(20, int(width * (right - extent.x0) / extent.width) - 1)
            ax.set_title(textwrap.fill(subtitle, width), loc="left")
            fig.draw_without_rendering()
        if freeze:
            fig.set_layout_engine("none")
    return fig


def percentage_points(axis) -> None:
    """Tick labels of a risk-difference axis in percentage points (the data stay proportions,
    as in the result): 0.05 reads "5", as in the report's tables."""
    from matplotlib.ticker import FuncFormatter
    axis.set_major_formatter(FuncFormatter(lambda v, _p: f"{100 * v:.10g}"))


def figure_bytes(fig: Figure, fmt: str, dpi: int = 150) -> bytes:
    """Serialize a figure (PNG or SVG) with fixed metadata, so output is reproducible."""
    buf = io.BytesIO()
    meta = {"Date": None} if fmt == "svg" else {"Software": "stratagap"}
    with style():
        fig.savefig(buf, format=fmt, dpi=dpi, metadata=meta)
    return buf.getvalue()


@dataclass
class ResultView:
    """What the figures and the report read: the JSON dict, the per-unit arrays, the null."""

    data: dict
    arrays: dict = field(default_factory=dict)
    null_distribution: object = None
    null_weights: object = None
    run: dict = field(default_factory=dict)


def view_of(result) -> ResultView:
    """Build a :class:`ResultView` from an AnalysisResult (or pass a view through).

    A view can also be built by hand (tests, or a result read back from ``results.json``):
    ``ResultView(data=json.load(f))`` draws every figure that needs no per-unit array.
    """
    if isinstance(result, ResultView):
        return result
    main = result.tests.main if getattr(result, "tests", None) else None
    null = getattr(main, "null_distribution", None)
    weights = getattr(main, "null_weights", None)
    return ResultView(data=result.to_dict(), arrays=dict(getattr(result, "arrays", {}) or {}),
                      null_distribution=null, null_weights=weights,
                      run=dict(getattr(result, "run", {}) or {}))
