"""The adjusted survival curves of a time-to-event outcome, with the units still at risk.

Draws only what the result holds (``followup.curves``): the estimand-weighted curves of both
groups with their pointwise log(-log) bands, the horizon, and under the axis a small table of
the units at risk in each group at seven evenly spaced times. No p-value is printed on the plot:
the test belongs to its own section.
"""

from __future__ import annotations

import numpy as np

from ._style import EXPOSED, INK, MUTED, REFERENCE, new_figure, plain, view_of

__all__ = ["plot_survival_curves", "has_survival_curves", "AT_RISK_COLUMNS"]

#: Columns of the numbers-at-risk table (evenly spaced from 0 to the horizon).
AT_RISK_COLUMNS = 7


def has_survival_curves(view) -> bool:
    block = view.data.get("followup") or {}
    return block.get("outcome_type") == "time-to-event" and bool(block.get("curves"))


def plot_survival_curves(result):
    """Figure: adjusted survival of both groups to the horizon, bands, and the numbers at risk."""
    v = view_of(result)
    block = v.data["followup"]
    curves = block["curves"]
    grid = np.asarray(curves["grid"], dtype=float)
    level = int(round(100 * (1 - float(curves.get("alpha") or 0.05))))
    horizon = block["horizon"]["value"]
    fig, axes = new_figure(
        "Adjusted survival in the two groups",
        f"estimand-weighted Kaplan-Meier curves of the strata, pointwise {level}% bands "
        f"(log(-log) scale); dashed line: the horizon {horizon:g}",
        size=(7.2, 4.8), nrows=2, ncols=1, sharex=True,
        gridspec_kw={"height_ratios": [4.2, 1.0]})
    ax, table = axes[0, 0], axes[1, 0]
    q = v.data.get("question", {})
    names = {"exposed": f"exposed ({plain(q.get('exposed_value', ''))})",
             "reference": f"reference ({plain(q.get('reference_value', ''))})"}
    for key, colour in (("exposed", EXPOSED), ("reference", REFERENCE)):
        s = np.asarray(curves["survival"][key], dtype=float)
        lo = np.asarray(curves["ci_low"][key], dtype=float)
        hi = np.asarray(curves["ci_high"][key], dtype=float)
        ax.fill_between(grid, lo, hi, step="post", color=colour, alpha=0.18, linewidth=0)
        ax.step(grid, s, where="post", color=colour, linewidth=1.8, label=names[key])
    ax.axvline(horizon, color=MUTED, linestyle=(0, (4, 3)), linewidth=0.9)
    ax.set_ylabel("survival (no event yet)")
    ax.set_ylim(max(0.0, float(np.nanmin([np.nanmin(curves["ci_low"][k]) for k in
                                          ("exposed", "reference")])) - 0.05), 1.01)
    ax.legend(loc="lower left")
    picks = np.unique(np.round(np.linspace(0, grid.size - 1, AT_RISK_COLUMNS)).astype(int))
    table.set_ylim(-0.5, 1.6)
    table.set_yticks([1.0, 0.0], ["exposed", "reference"])
    table.grid(False)
    for side in ("left", "bottom"):
        table.spines[side].set_visible(False)
    table.tick_params(axis="y", length=0)
    for row, (key, colour) in enumerate((("exposed", EXPOSED), ("reference", REFERENCE))):
        counts = curves["at_risk"][key]
        for i in picks:
            table.text(grid[i], 1.0 - row, f"{int(counts[i]):,}", ha="center", va="center",
                       color=colour, fontsize=8.5, fontweight="bold")
    table.text(grid[0], 1.55, "units at risk", ha="left", va="center", color=INK, fontsize=8)
    table.set_xticks(grid[picks])
    table.set_xlabel(f"follow-up time ({plain(block.get('time_column', 'time'))})")
    return fig
