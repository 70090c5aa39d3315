"""Sensitivity figures: the Γ curve (figure 5) and the tipping-point surface (figure 6).

Figure 5 draws the result's upper bounds on the one-sided p-value over Γ (Rosenbaum 2002,
ch. 4; for the covariance-adjusted statistic the bracket between the separable value of
Gastwirth, Krieger & Rosenbaum 2000 and the conservative end), the one-sided level and the
sensitivity value found by root-finding. Figure 6 draws the bias-corrected estimates of Lin,
Psaty & Kronmal (1998) over the grid of a binary unmeasured confounder, the result's tipping
curve, and the measured covariates placed on the grid for scale, each under its own name.
"""

from __future__ import annotations

import matplotlib.colors as mcolors
import numpy as np
from matplotlib.figure import Figure

from ._style import ACCENT, ALERT, INK, MUTED, REFERENCE, SUNSET, new_figure, plain, view_of
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
    bracket = bounds.get("method") == "bracket" and np.nanmax(np.abs(up - sep)) > 0
    if bracket:
        ax.fill_between(g, sep, up, color=REFERENCE, alpha=0.15, label="bracket of the bound")
        ax.plot(g, sep, color=REFERENCE, linestyle=(0, (3, 1.5)), marker="v", markersize=4,
                linewidth=1.2, label="separable value (lower end)")
    ax.plot(g, up, color=REFERENCE, marker="^", markersize=5, linewidth=2.0,
            label="conservative bound (quoted)" if bracket else "upper bound")
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
    elif flag != "ok":
        ax.text(0.98, 0.04, f"sensitivity value: {flag}", transform=ax.transAxes, ha="right",
                color=INK, fontsize=8.5)
    ax.set_ylim(max(_FLOOR / 3, np.nanmin(np.concatenate([up, sep])) / 3), 1.6)
    ax.set_xlabel("Γ  (1 = no hidden bias)")
    ax.set_ylabel("p-value bound (log scale)")
    ax.legend(loc="lower right", fontsize=7.5)
    return fig


def plot_tipping(result) -> Figure:
    """Figure 6: bias-corrected estimate over (prevalence gap, outcome effect) of a binary U.

    The colour is the corrected estimate (diverging at the null value); the solid line is where
    the corrected estimate reaches the null, the dashed line where its confidence limit closer
    to the null does (the result's tipping curve). Measured covariates are placed for scale.

    Returns
    -------
    matplotlib.figure.Figure
    """
    v = view_of(result)
    tip = v.data["sensitivity"]["tipping"]
    fig, ax = new_figure("Tipping point: an unmeasured binary confounder U",
                         "colour: estimate corrected for U (Lin, Psaty & Kronmal 1998); "
                         "points: measured covariates",
                         size=(7.2, 4.8))
    gx = np.asarray(tip.get("prevalence_gap") or [], dtype=float)
    gy = np.asarray(tip.get("outcome_shift") or [], dtype=float)
    est = np.asarray([np.nan if e is None else e for e in tip.get("corrected_estimate") or []],
                     dtype=float)
    if len(gx) < 4 or len(gx) != len(gy) or len(est) != len(gx):
        ax.text(0.5, 0.5, "no tipping-point grid on this result", ha="center",
                transform=ax.transAxes, color=MUTED)
        return fig
    measure = tip.get("measure", "difference")
    nv = null_value(measure)
    ok = np.isfinite(est)
    span = float(np.nanmax(np.abs(est[ok] - nv))) or 1.0
    norm = mcolors.Normalize(nv - span, nv + span)
    filled = ax.tricontourf(gx[ok], gy[ok], est[ok], levels=14, cmap=SUNSET, norm=norm)
    bar = fig.colorbar(filled, ax=ax, shrink=0.9, pad=0.01)
    bar.set_label(f"corrected estimate ({measure}); null = {nv:g}")
    if est[ok].min() < nv < est[ok].max():
        ax.tricontour(gx[ok], gy[ok], est[ok], levels=[nv], colors=[INK], linewidths=1.8)
        ax.plot([], [], color=INK, linewidth=1.8, label="corrected estimate = null")
    curve = [c for c in tip.get("tipping_curve") or [] if c.get("outcome_shift") is not None]
    ymax, xmax = float(gy.max()), float(gx.max())
    if curve:
        cx = np.array([c["prevalence_gap"] for c in curve], dtype=float)
        cy = np.array([c["outcome_shift"] for c in curve], dtype=float)
        ax.plot(cx, cy, color=INK, linestyle=(0, (4, 2)), linewidth=1.6,
                label="corrected CI limit reaches the null")
    points = []
    for m in tip.get("benchmarks") or []:
        x, y = m.get("prevalence_gap"), m.get("outcome_shift")
        if x is None or y is None:
            continue
        x, y = abs(float(x)), abs(float(y)) if measure == "difference" else float(y)
        xmax, ymax = max(xmax, x * 1.1), max(ymax, y * 1.1)
        points.append((x, y, plain(m.get("name", "")), bool(m.get("ci_includes_null"))))
    ax.set_xlim(min(float(gx.min()), 0.0), xmax)
    ax.set_ylim(min(float(gy.min()), 0.0), ymax)
    placed = []  # label anchors in axes fractions, to step labels of nearby points apart
    for x, y, name, crosses in sorted(points, key=lambda p: (p[1], p[0])):
        ax.plot([x], [y], marker="o", markersize=6.5, linestyle="none", zorder=4,
                markerfacecolor=ALERT if crosses else "white", markeredgecolor=INK)
        fx, fy = ax.transLimits.transform((x, y))
        lift = sum(1 for px, py in placed if abs(px - fx) < 0.12 and abs(py - fy) < 0.05)
        placed.append((fx, fy + 0.045 * lift))
        ax.annotate(name, xy=(x, y), xytext=(5, 4 + 11 * lift), textcoords="offset points",
                    fontsize=8, color=INK, zorder=5,
                    arrowprops={"arrowstyle": "-", "color": MUTED, "lw": 0.6} if lift else None,
                    bbox={"boxstyle": "round,pad=0.15", "fc": "white", "ec": "none", "alpha": 0.8})
    if points:
        ax.plot([], [], marker="o", linestyle="none", markerfacecolor="white",
                markeredgecolor=INK, label="measured covariate (filled: would tip the CI)")
    ax.set_xlabel("prevalence gap of U: p(U=1 | exposed) − p(U=1 | reference)")
    ax.set_ylabel("effect of U on the outcome" + (" (mean shift)" if measure == "difference"
                                                   else " (risk ratio)"))
    ax.legend(loc="upper right", fontsize=7.5, framealpha=0.85, frameon=True)
    return fig
