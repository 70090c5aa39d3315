"""Sensitivity figures: the Γ curve (figure 5) and the tipping curve (figure 6).

Figure 5 draws the result's upper bounds on the one-sided p-value over Γ (Rosenbaum 2002,
ch. 4; for the covariance-adjusted statistic the worst cut allocation found, between the
separable value of Gastwirth, Krieger & Rosenbaum 2000 and the provable end), the one-sided level and the
sensitivity value found by root-finding. Figure 6 draws the result's tipping curve for a
binary unmeasured confounder (Lin, Psaty & Kronmal 1998) and the measured covariates as
numbered reference points, with a side table of their names and signed values.
"""

from __future__ import annotations

import numpy as np
from matplotlib.figure import Figure

from ._style import ACCENT, ALERT, INK, MUTED, REFERENCE, new_figure, plain, view_of
from ..formatting import column_decimals
from ..verdict import NOT_SIGNIFICANT, not_significant_phrase
from .figures_inference import null_value

__all__ = ["plot_gamma_curve", "plot_tipping"]

_FLOOR = 1e-12  # p-values below are drawn at the floor of the log axis


def plot_gamma_curve(result) -> Figure:
    """Figure 5: the upper bound on the one-sided p-value against Γ.

    Returns
    -------
    matplotlib.figure.Figure
    """
    v = view_of(result)
    sens = v.data["sensitivity"]
    curve = list(sens["gamma_curve"])
    detail = sens["gamma_threshold_detail"]
    level = sens["gamma_level"]
    bounds = sens["gamma_bounds"]
    direction = sens["gamma_direction"]
    fig, ax = new_figure("How much hidden bias would erase significance?",
                         f"bound on the one-sided p-value ({direction}) if an unmeasured covariate "
                         "changes the odds of exposure by up to Γ")
    if not curve:
        ax.text(0.5, 0.5, "no sensitivity curve on this result", ha="center",
                transform=ax.transAxes, color=MUTED)
        return fig
    g = np.array([float(c["gamma"]) for c in curve])
    up = np.array([np.nan if c.get("p_upper") is None else max(c["p_upper"], _FLOOR) for c in curve])
    sep = np.array([np.nan if c.get("p_separable") is None else max(c["p_separable"], _FLOOR)
                    for c in curve])
    prov = np.array([max(c.get("p_provable") or c.get("p_upper") or np.nan, _FLOOR) for c in curve])
    bracket = bounds.get("method") == "bracket" and np.nanmax(np.abs(prov - sep)) > 0
    if bracket:
        ax.fill_between(g, sep, prov, color=REFERENCE, alpha=0.15,
                        label="from the separable value to the provable end")
        ax.plot(g, sep, color=REFERENCE, linestyle=(0, (3, 1.5)), marker="v", markersize=4,
                linewidth=1.2, label="separable value")
    ax.plot(g, up, color=REFERENCE, marker="^", markersize=5, linewidth=2.0,
            label="worst allocation found (quoted)" if bracket else "upper bound")
    ax.set_yscale("log")
    if level:
        ax.axhline(level, color=ALERT, linestyle=(0, (5, 2)), linewidth=1.2,
                   label=detail.get("alpha_note") or f"one-sided level {level:g}")
    gamma = detail.get("gamma", sens.get("gamma_threshold"))
    flag = detail.get("flag", "ok")
    if gamma is not None and flag == "ok":
        ax.axvline(gamma, color=ACCENT, linewidth=1.6)
        ax.annotate(f"sensitivity value\nΓ = {gamma:.2f}", xy=(gamma, level or 0.05),
                    xytext=(10, -30), textcoords="offset points", fontsize=8.5, color=INK,
                    arrowprops={"arrowstyle": "-", "color": ACCENT})
        gs = detail.get("gamma_separable")
        if bracket and gs is not None and abs(gs - gamma) > 1e-9:
            ax.axvline(gs, color=ACCENT, linewidth=1.0, linestyle=(0, (1, 1.5)))
    elif flag != "ok":  # above the curve, clear of the legend and the level line
        words = (f"one-sided test {not_significant_phrase()}: no sensitivity value"
                 if flag == NOT_SIGNIFICANT else f"sensitivity value: {flag}")
        ax.text(0.02, 0.97, words, transform=ax.transAxes, ha="left", va="top", color=INK,
                fontsize=8.5, bbox={"boxstyle": "round,pad=0.3", "fc": "white", "ec": "none"})
    lowest = np.nanmin(np.concatenate([up, sep, prov, [level or 1.0]]))  # keep the level line in view
    ax.set_ylim(max(_FLOOR / 3, lowest / 3), 1.6 if flag == "ok" else 5.0)  # room for the words
    ax.set_xlabel("Γ  (1 = no hidden bias)")
    ax.set_ylabel("p-value bound (log scale)")
    ax.legend(loc="best", fontsize=7.5)  # clear of the level line and the curve
    return fig


def plot_tipping(result) -> Figure:
    """Figure 6: how strong an unmeasured binary confounder U would have to be.

    Left: the result's tipping curve (Lin, Psaty & Kronmal 1998): for each prevalence gap of U
    between the groups, the effect of U on the outcome at which the corrected confidence limit
    closer to the null reaches the null; beyond the curve (shaded) the corrected interval
    includes the null. The measured covariates, as reference covariates, are numbered markers at
    their signed gap and effect; a side table gives their names and values, signed as in the
    report's table. Nothing is recomputed: the curve and the points come from the result.

    Returns
    -------
    matplotlib.figure.Figure
    """
    v = view_of(result)
    tip = v.data["sensitivity"]["tipping"]
    measure = tip.get("measure", "difference")
    nv = null_value(measure)
    ratio = measure != "difference"
    fig, axes = new_figure("How strong would an unmeasured confounder have to be?",
                           "line: a binary U just strong enough for the corrected CI limit to "
                           "reach the null (Lin, Psaty & Kronmal 1998); shaded: stronger",
                           size=(8.4, 4.4), ncols=2, width_ratios=[1.55, 1])
    ax, side = axes[0, 0], axes[0, 1]
    side.axis("off")
    curve = [c for c in tip.get("tipping_curve") or []
             if c.get("outcome_shift") is not None and c.get("prevalence_gap") is not None]
    if not curve:
        ax.text(0.5, 0.5, "no tipping curve on this result", ha="center",
                transform=ax.transAxes, color=MUTED)
        return fig
    cx = np.array([c["prevalence_gap"] for c in curve], dtype=float)
    cy = np.array([c["outcome_shift"] for c in curve], dtype=float)
    order = np.argsort(cx)
    cx, cy = cx[order], cy[order]
    refs = []
    for m in tip.get("benchmarks") or []:
        x, y = m.get("prevalence_gap"), m.get("outcome_shift")
        if x is None or y is None:
            continue
        refs.append((float(x), float(y), plain(m.get("name", "")), bool(m.get("ci_includes_null"))))
    xs = np.concatenate([cx, [r[0] for r in refs]])
    ys = np.concatenate([cy, [r[1] for r in refs]])
    x_lo, x_hi = min(0.0, float(xs.min()) * 1.1), max(float(xs.max()) * 1.1, 0.05)
    y_lo = min(nv, float(ys.min())) if ratio else min(0.0, float(ys.min()) * 1.1)
    y_hi = float(ys.max()) * 1.15 if float(ys.max()) > 0 else 1.0
    # the stronger side of the curve: larger outcome effect at the same gap
    ax.fill_between(cx, cy, y_hi, color=ACCENT, alpha=0.14, linewidth=0,
                    label="corrected CI includes the null")
    ax.plot(cx, cy, color=ACCENT, linewidth=2.2, label="tipping curve")
    ax.axhline(nv, color=MUTED, linewidth=0.8)
    ax.axvline(0.0, color=MUTED, linewidth=0.8)
    ax.set_xlim(x_lo, x_hi)
    ax.set_ylim(y_lo, y_hi)
    placed = []  # label anchors in axes fractions: step the numbers of nearby points apart
    for k, (x, y, name, tips) in enumerate(refs, start=1):
        ax.plot([x], [y], marker="D", markersize=6, linestyle="none", zorder=4,
                markerfacecolor=ALERT if tips else REFERENCE, markeredgecolor="white")
        fx, fy = ax.transLimits.transform((x, y))
        near = sum(1 for px, py in placed if abs(px - fx) < 0.05 and abs(py - fy) < 0.05)
        placed.append((fx, fy))
        ax.annotate(str(k), xy=(x, y), xytext=(6 + 9 * near, 2 - 9 * near),
                    textcoords="offset points", fontsize=8, color=INK, zorder=5)
    if refs:
        ax.plot([], [], marker="D", linestyle="none", markerfacecolor=REFERENCE,
                markeredgecolor="white", label="reference covariate")
        ax.plot([], [], marker="D", linestyle="none", markerfacecolor=ALERT,
                markeredgecolor="white", label="reference covariate that would tip the CI")
    ax.set_xlabel("prevalence gap of U: p(U=1 | exposed) − p(U=1 | reference)")
    binary = v.data.get("question", {}).get("outcome_type") == "binary"
    k_pp = 100.0 if binary and not ratio else 1.0  # risk differences in percentage points
    if k_pp != 1.0:
        from matplotlib.ticker import FuncFormatter
        ax.yaxis.set_major_formatter(FuncFormatter(lambda y, _p: f"{k_pp * y:g}"))
    ax.set_ylabel("effect of U on the outcome, " + ("risk ratio (null = 1)" if ratio else
                                                      "risk difference, pp (null = 0)" if binary
                                                      else "mean shift (null = 0)"))
    ax.legend(loc="upper right", fontsize=7.5, framealpha=0.9, frameon=True)
    if refs:
        digits = column_decimals([y * k_pp for _x, y, _n, _t in refs])  # one per column
        rows = [[str(k), name if len(name) <= 18 else name[:17] + "…", f"{x:+.3f}",
                 f"{y:.{digits}f}" if ratio else f"{y * k_pp:+.{digits}f}", "yes" if tips else "no"]
                for k, (x, y, name, tips) in enumerate(refs, start=1)]
        table = side.table(cellText=rows, colLabels=["#", "covariate", "gap", "effect",
                                                     "tips CI"],
                           cellLoc="left", colLoc="left", colWidths=[0.07, 0.40, 0.17, 0.19, 0.17],
                           bbox=[0.0, max(0.0, 0.92 - 0.075 * (len(rows) + 1)), 0.97,
                                 min(0.92, 0.075 * (len(rows) + 1))])
        table.auto_set_font_size(False)
        table.set_fontsize(7)
        for (row, _), cell in table.get_celld().items():
            cell.set_edgecolor("#E4E0D8")
            cell.set_text_props(color=INK, fontweight="bold" if row == 0 else "normal")
        side.set_title("reference covariates (signed values"
                       + ("; effect in pp)" if k_pp != 1.0 else ")"), loc="left", fontsize=8)
    else:
        side.text(0.0, 0.9, "no reference covariates", color=MUTED, transform=side.transAxes)
    return fig
