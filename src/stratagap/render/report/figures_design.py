"""Design figures: score overlap (figure 1) and covariate balance (figure 2).

Both only draw what the result holds: the propensity scores of every prepared row, the overlap
rule's bounds and the balance rows (Austin 2009 standardized mean differences, after adjustment
on the before-adjustment denominator, Stuart 2010).
"""

from __future__ import annotations

import numpy as np
from matplotlib.figure import Figure

from ._style import ACCENT, ALERT, EXPOSED, INK, MUTED, NEUTRAL, REFERENCE, new_figure, plain, view_of

__all__ = ["plot_overlap", "plot_balance", "balance_label", "SMD_FLAG"]

#: |SMD| above which a covariate is flagged as imbalanced (common practice).
SMD_FLAG = 0.1


def _group_names(data: dict) -> tuple[str, str]:
    q = data.get("question", {})
    return (plain(f"exposed ({q.get('exposed_value', 'exposed')})"),
            plain(f"reference ({q.get('reference_value', 'reference')})"))


def plot_overlap(result, *, bins: int = 40) -> Figure:
    """Figure 1: each group's score distribution on its own axis, with the trimming bounds.

    The exposed group is drawn in the upper panel and the reference group in the lower one,
    mirrored, each as the share of its own group per bin and each on its own vertical scale, so
    that a small group (185 exposed among 16,000) stays readable beside a large one. Units set
    aside by the overlap rule are the hatched part of each bar. Labels sit in the legend under
    the panels, never on the bars.

    Parameters
    ----------
    result : AnalysisResult
    bins : int, default 40

    Returns
    -------
    matplotlib.figure.Figure
    """
    v = view_of(result)
    score = np.asarray(v.arrays.get("score", []), dtype=float)
    t = np.asarray(v.arrays.get("t_all", []), dtype=int)
    keep = np.asarray(v.arrays.get("keep", np.ones(len(score), bool)), dtype=bool)
    ov = v.data["overlap"]
    exposed_name, reference_name = _group_names(v.data)
    auc = v.data["propensity"].get("auc")
    sub = "share of each group per score bin, each group on its own scale" + (
        f"; c-statistic {auc:.3f}" if auc is not None else "")
    fig, axes = new_figure("Where the two groups' propensity scores lie", sub, size=(7.2, 4.8),
                           nrows=2, sharex=True)
    top, bottom = axes[0, 0], axes[1, 0]
    if len(score) == 0:
        top.text(0.5, 0.5, "no scores recorded on this result", ha="center",
                 transform=top.transAxes)
        return fig
    lo, hi = float(np.nanmin(score)), float(np.nanmax(score))
    pad = max((hi - lo) * 0.02, 1e-6)
    edges = np.linspace(max(0.0, lo - pad), min(1.0, hi + pad), bins + 1)
    for ax, group, colour, name in ((top, 1, EXPOSED, exposed_name),
                                    (bottom, 0, REFERENCE, reference_name)):
        members = t == group
        n = max(int(members.sum()), 1)
        kept, _ = np.histogram(score[members & keep], bins=edges)
        aside, _ = np.histogram(score[members & ~keep], bins=edges)
        ax.stairs(kept / n, edges, fill=True, color=colour, alpha=0.85,
                  label=f"{name}, n = {int(members.sum()):,}")
        if aside.any():
            ax.stairs((kept + aside) / n, edges, baseline=kept / n, fill=True,
                      facecolor="white", edgecolor=colour, hatch="////", linewidth=0.6,
                      label=f"{name}: set aside ({int(aside.sum()):,})")
        height = float(((kept + aside) / n).max()) or 1.0
        ax.set_ylim(0, height * 1.08)
        ax.yaxis.set_major_formatter(_share_format)
        ax.set_ylabel("exposed" if group == 1 else "reference", color=colour)
    bottom.invert_yaxis()  # mirrored: the reference group hangs below the shared score axis
    bounds = ov.get("bounds")
    for ax in (top, bottom):
        if bounds:
            for b in bounds:
                ax.axvline(b, color=ALERT, linestyle=(0, (5, 2)), linewidth=1.4)
            ax.axvspan(bounds[0], bounds[1], color=ACCENT, alpha=0.07, zorder=0)
        elif ov.get("common_support"):
            for b in ov["common_support"]:
                ax.axvline(b, color=MUTED, linestyle=(0, (1, 1.5)), linewidth=1.2)
    if bounds:
        top.plot([], [], color=ALERT, linestyle=(0, (5, 2)),
                 label=f"kept by the rule '{ov.get('rule', '')}': {bounds[0]:.3f} to {bounds[1]:.3f}")
    elif ov.get("common_support"):
        cs = ov["common_support"]
        top.plot([], [], color=MUTED, linestyle=(0, (1, 1.5)),
                 label=f"common support {cs[0]:.3f} to {cs[1]:.3f} (no trimming)")
    bottom.set_xlabel("propensity score (estimated probability of exposure)")
    handles, labels = [], []
    for ax in (top, bottom):
        h, lab = ax.get_legend_handles_labels()
        handles += h
        labels += lab
    fig.legend(handles, labels, loc="outside lower center", ncols=2, fontsize=7.5)
    return fig


def _share_format(value, _position=None) -> str:
    return f"{abs(value):.0%}" if abs(value) >= 0.1 or value == 0 else f"{abs(value):.1%}"


def balance_label(row: dict) -> str:
    """A balance term as the run spells it everywhere: its design-column name ("role: nurse",
    or a formula's own "C(role)[T.nurse]"), the name in results.json, the warnings and the
    tipping benchmarks; "covariate: level" for a row without one (issue 10: one spelling)."""
    if row.get("name"):
        return str(row["name"])
    level = row.get("level")
    name = str(row.get("covariate", ""))
    return name if level in (None, "") else f"{name}: {level}"


def plot_balance(result, *, threshold: float = SMD_FLAG) -> Figure:
    """Figure 2: |SMD| per covariate (and dummy level) before and after adjustment.

    Rows are sorted by the imbalance before adjustment; a line joins each row's two values so
    the change reads as a movement. The dashed line marks |SMD| = 0.1 (common practice).

    Parameters
    ----------
    result : AnalysisResult
    threshold : float, default 0.1

    Returns
    -------
    matplotlib.figure.Figure
    """
    v = view_of(result)
    rows = list(v.data["balance"]["rows"])
    height = 1.6 + 0.26 * max(len(rows), 3)
    matched = bool(v.data.get("matching"))
    trimmed = any((v.data.get("flow", {}).get("trimmed_by_group") or {}).values())
    where = "on the matched sample" if matched else "within strata"
    fig, ax = new_figure("Covariate balance before and after adjustment on the score",
                         f"absolute standardized mean difference (after: {where}, same "
                         "denominator as before" + ("; before: the rows kept by the overlap "
                                                    "rule" if trimmed else "") + ")",
                         size=(7.2, min(height, 14)))
    if not rows:
        ax.text(0.5, 0.5, "no balance rows on this result", ha="center", transform=ax.transAxes)
        return fig

    def mag(x):
        return np.nan if x is None else abs(float(x))

    rows.sort(key=lambda r: -np.nan_to_num(mag(r.get("smd_before")), nan=-1.0))
    y = np.arange(len(rows))[::-1]
    before = np.array([mag(r.get("smd_before")) for r in rows])
    after = np.array([mag(r.get("smd_after")) for r in rows])
    finite = np.concatenate([before[np.isfinite(before)], after[np.isfinite(after)], [threshold]])
    right = float(finite.max()) * 1.12
    ax.axvspan(0, threshold, color=ACCENT, alpha=0.08, zorder=0)
    ax.axvline(threshold, color=INK, linestyle=(0, (4, 2)), linewidth=1.0)
    ax.text(threshold, len(rows) - 0.3, f" {threshold:g}", color=INK, fontsize=8, va="bottom")
    ax.hlines(y, np.fmin(before, after), np.fmax(before, after), color=NEUTRAL, linewidth=1.6)
    ax.plot(before, y, linestyle="none", marker="o", markersize=6.5, markerfacecolor="white",
            markeredgecolor=ALERT, markeredgewidth=1.6,
            label=("before matching" if matched else "before adjustment")
            + (" (after trimming)" if trimmed else ""))
    ax.plot(after, y, linestyle="none", marker="D", markersize=5.5, color=ACCENT,
            label=f"after: {where}")
    ax.set_yticks(y)
    labels = ax.set_yticklabels([plain(balance_label(r)) for r in rows], fontsize=8)
    for lab, a in zip(labels, after):
        if np.isfinite(a) and a > threshold:
            lab.set_color(ALERT)
            lab.set_fontweight("bold")
    ax.set_xlim(0, right)
    ax.set_ylim(-0.7, len(rows) - 0.1)
    ax.grid(axis="y", visible=False)
    ax.set_xlabel("|SMD|   (shaded: below the 0.1 flag; red labels: still above it after adjustment)")
    ax.legend(loc="lower right")
    return fig
