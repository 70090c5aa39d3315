"""Inference figures: the permutation null (3), stratum effects (4), cross-checks (7) and the
p-value function (8).

They draw the result's own numbers: the resampled (or enumerated) null distribution kept on
the test, the per-stratum estimates of the headline fit, the cross-check rows, and the
p-value curve of the inverted covariance-adjusted test (Rosenbaum 2002). For a binary
outcome, where the headline is not obtained by inversion, figure 8 draws the normal (Wald)
confidence curve of the headline estimate and its standard error, labelled as such.
"""

from __future__ import annotations

import math

import numpy as np
from matplotlib.figure import Figure
from matplotlib.patches import Polygon
from scipy import stats

from ..formatting import format_p, format_sig
from ._style import (ACCENT, ALERT, INK, MUTED, NEUTRAL, PALETTE, REFERENCE, new_figure,
                     percentage_points, plain, view_of)

__all__ = ["plot_null_distribution", "plot_stratum_effects", "plot_cross_checks",
           "plot_p_value_function", "null_value"]


def null_value(measure) -> float:
    """The no-effect value on the measure's scale: 1 for ratios, 0 for differences."""
    return 1.0 if "ratio" in str(measure or "").lower() or str(measure) in ("rr", "or") else 0.0


def _empty(ax, text):
    ax.text(0.5, 0.5, text, ha="center", va="center", transform=ax.transAxes, color=MUTED)
    ax.set_xticks([])
    ax.set_yticks([])


def plot_null_distribution(result, *, bins: int = 50) -> Figure:
    """Figure 3: the permutation null distribution, the observed statistic and the p-value.

    Resamples at least as extreme as the observed statistic (in the direction(s) of the
    alternative) are drawn in the alert colour. With the normal engine, which keeps no
    resamples, the normal curve from the exact permutation mean and variance is drawn instead.

    Returns
    -------
    matplotlib.figure.Figure
    """
    v = view_of(result)
    test = v.data["test"]
    obs = test.get("statistic")
    alt = test.get("alternative", "two-sided")
    engine = test.get("engine", "")
    label = test.get("statistic_label") or test.get("statistic_name", "statistic")
    sub = (f"{test.get('null', '')}; {engine.replace('_', ' ')} engine"
           + (f", {test.get('resamples'):,} resamples" if engine == "monte_carlo" else ""))
    fig, ax = new_figure("Where the observed statistic falls among within-strata shuffles", sub)
    null = v.null_distribution
    mean, var = test.get("normal_mean"), test.get("normal_variance")
    if obs is None:
        _empty(ax, "no test statistic on this result")
        return fig
    centre = mean or 0.0
    if null is not None and len(np.asarray(null)):
        null = np.asarray(null, dtype=float)
        weights = None if v.null_weights is None else np.asarray(v.null_weights, dtype=float)
        lo = min(null.min(), obs, 2 * centre - obs)
        hi = max(null.max(), obs, 2 * centre - obs)
        edges = np.linspace(lo, hi, bins + 1)
        counts, _ = np.histogram(null, bins=edges, weights=weights)
        share = counts / max(counts.sum(), 1e-300)
        mids = 0.5 * (edges[1:] + edges[:-1])
        extreme = _extreme(mids, obs, centre, alt)
        ax.stairs(np.where(extreme, 0, share), edges, fill=True, color=REFERENCE, alpha=0.55,
                  label="shuffled statistics")
        ax.stairs(np.where(extreme, share, 0), edges, fill=True, color=ALERT, alpha=0.9,
                  label="at least as extreme as observed")
        ax.set_ylabel("share of shuffles" if weights is None else "probability")
    elif var is not None and var > 0:
        sd = math.sqrt(var)
        span = max(4 * sd, abs(obs - centre) * 1.15)
        x = np.linspace(centre - span, centre + span, 400)
        dens = stats.norm.pdf(x, centre, sd)
        ax.plot(x, dens, color=REFERENCE, linewidth=1.8,
                label="normal approximation (exact permutation mean and variance)")
        ext = _extreme(x, obs, centre, alt)
        ax.fill_between(x, 0, dens, where=ext, color=ALERT, alpha=0.6,
                        label="at least as extreme as observed")
        ax.set_ylabel("density")
    else:
        _empty(ax, "no null distribution kept on this result")
        return fig
    ax.axvline(obs, color=INK, linewidth=2.0)
    if alt == "two-sided":
        ax.axvline(2 * centre - obs, color=INK, linewidth=1.0, linestyle=(0, (3, 2)))
    ax.annotate(f"observed {format_sig(obs)}\np = {format_p(test.get('p_value'))} ({alt})",
                xy=(obs, ax.get_ylim()[1] * 0.92), xytext=(8, 0), textcoords="offset points",
                ha="left" if obs <= ax.get_xlim()[1] * 0.6 + ax.get_xlim()[0] * 0.4 else "right",
                va="top", fontsize=8.5, color=INK,
                bbox={"boxstyle": "round,pad=0.3", "fc": "white", "ec": NEUTRAL})
    ax.set_xlabel(label)
    fig.legend(*ax.get_legend_handles_labels(), loc="outside lower center", ncols=2,
               fontsize=7.5)  # below the axes: clear of the bars and the observed value's box
    return fig


def _extreme(x, obs, centre, alt):
    if alt == "greater":
        return x >= obs
    if alt == "less":
        return x <= obs
    return np.abs(x - centre) >= abs(obs - centre)


def plot_stratum_effects(result) -> Figure:
    """Figure 4: each stratum's effect with its CI, and the pooled (headline) estimate.

    Marker area is proportional to the stratum's estimand weight; the pooled estimate is the
    diamond spanning its CI.

    Returns
    -------
    matplotlib.figure.Figure
    """
    v = view_of(result)
    adj = v.data["adjusted"]
    per = list(adj["per_stratum"])
    level = int(round(100 * (1 - float(adj.get("alpha") or 0.05))))
    measure = adj.get("measure", "")
    ratio = "ratio" in str(measure)
    per_measure = next((s["measure"] for s in per if s.get("measure")), None)
    # A ratio headline is pooled from standardized risks; its strata hold risk differences.
    per_measure = per_measure or ("risk difference" if ratio else measure)
    same = ("ratio" in str(per_measure)) == ratio
    note = "" if same else f"; the {measure} headline is not on this scale"
    if len(per) > MANY_STRATA:
        return _many_strata_effects(per, adj, per_measure, level, same,
                                    "matched sets" if v.data.get("matching") else "strata")
    fig, ax = new_figure("Effect within each propensity-score stratum",
                         f"{per_measure} per stratum, {level}% CI; marker area = stratum weight "
                         f"({adj.get('estimand', '')}){note}",
                         size=(7.2, 1.9 + 0.36 * (len(per) + 2)))
    if not per:
        _empty(ax, "no per-stratum estimates on this result")
        return fig
    n = len(per)
    ys = np.arange(n, 0, -1) + 1.0
    weights = np.array([float(s.get("weight") or 0) for s in per])
    size = 30 + 260 * weights / max(weights.max(), 1e-12)
    for y, s, area in zip(ys, per, size):
        est, lo, hi = s.get("estimate"), s.get("ci_low"), s.get("ci_high")
        if lo is not None and hi is not None:
            ax.hlines(y, lo, hi, color=REFERENCE, linewidth=1.6)
            ax.vlines([lo, hi], y - 0.12, y + 0.12, color=REFERENCE, linewidth=1.2)
        if est is not None:
            ax.scatter([est], [y], s=area, marker="s", color=REFERENCE, zorder=3,
                       edgecolor="white", linewidth=0.6)
    est, lo, hi = adj.get("estimate"), adj.get("ci_low"), adj.get("ci_high")
    pooled = est is not None and lo is not None and hi is not None and same
    if pooled:
        ax.add_patch(Polygon([[lo, 0.6], [est, 0.85], [hi, 0.6], [est, 0.35]], closed=True,
                             facecolor=ACCENT, edgecolor=INK, linewidth=0.8, zorder=3))
        ax.axvline(est, color=ACCENT, linestyle=(0, (2, 2)), linewidth=1.0)
    ax.axvline(null_value(per_measure), color=INK, linewidth=0.9)
    # numbered from 0, as in results.json, strata.csv and the run's messages
    labels = [f"stratum {int(s.get('stratum', i))}  ({s.get('n_exposed', '?')} / "
              f"{s.get('n_reference', '?')}; w = {float(s.get('weight') or 0):.2f})"
              for i, s in enumerate(per)]
    ax.set_yticks(list(ys) + ([0.6] if pooled else []))
    ax.set_yticklabels(labels + (["pooled (headline)"] if pooled else []), fontsize=8)
    ax.set_ylim(0.1 if pooled else 1.4, n + 1.7)
    ax.grid(axis="y", visible=False)
    if per_measure == "risk difference":
        percentage_points(ax.xaxis)
        ax.set_xlabel("risk difference, percentage points   (counts: exposed / reference)")
    else:
        ax.set_xlabel(f"{per_measure}   (counts: exposed / reference)")
    return fig


#: Beyond this many strata (matched sets, typically) figure 4 shows their distribution.
MANY_STRATA = 40


def _many_strata_effects(per, adj, per_measure, level, same, noun="strata") -> Figure:
    """Figure 4 for many small strata: a histogram of the stratum effects (weighted by the
    estimand's stratum weights), with the pooled estimate and its CI when on the same scale."""
    est = np.array([np.nan if s.get("estimate") is None else float(s["estimate"]) for s in per])
    w = np.array([float(s.get("weight") or 0) for s in per])
    ok = np.isfinite(est)
    one = "matched set" if noun == "matched sets" else "stratum"
    fig, ax = new_figure(f"Effect within each of the {len(per):,} {noun}",
                         f"distribution of the {per_measure} per {one} (share of the "
                         f"estimand's weight); band: pooled headline, {level}% CI")
    if not ok.any():
        _empty(ax, "no per-stratum estimates on this result")
        return fig
    ax.hist(est[ok], bins=min(40, max(10, int(ok.sum() ** 0.5))), weights=w[ok] / w[ok].sum(),
            color=REFERENCE, alpha=0.7, label="strata")
    lo, hi, pooled = adj.get("ci_low"), adj.get("ci_high"), adj.get("estimate")
    if same and None not in (lo, hi, pooled):
        ax.axvspan(lo, hi, color=ACCENT, alpha=0.15, label=f"pooled {level}% CI")
        ax.axvline(pooled, color=ACCENT, linewidth=1.8, label=f"pooled {format_sig(pooled)}")
    ax.axvline(null_value(per_measure), color=INK, linewidth=0.9)
    ax.set_xlabel(per_measure)
    if per_measure == "risk difference":
        percentage_points(ax.xaxis)
        ax.set_xlabel("risk difference, percentage points")
    ax.set_ylabel("share of the weight")
    ax.legend(loc="upper right", fontsize=7.5)
    return fig


def _rows_for_cross_checks(data: dict) -> list[tuple[str, dict, str]]:
    rows = []
    crude = data.get("crude")
    if crude:
        rows.append(("crude (unadjusted)", crude, NEUTRAL))
    adj = data["adjusted"]
    if adj.get("estimate") is not None:
        rows.append(("strata + regression (headline)", adj, ACCENT))
    if adj.get("plain_stratified"):
        rows.append(("stratified difference of means", adj["plain_stratified"], PALETTE["cyan"]))
    if adj.get("constant_effect"):
        rows.append(("test inversion (constant effect)", adj["constant_effect"], PALETTE["cyan"]))
    for row in data.get("cross_checks") or []:
        kind = row.get("estimand_kind")
        rows.append((plain(f"{row.get('method', '')}" + (f" [{kind}]" if kind else "")), row,
                     REFERENCE))
    return rows


def plot_cross_checks(result) -> Figure:
    """Figure 7: the cross-check estimators beside the headline, crude on top for contrast.

    Rows on a ratio scale (a ratio headline) and on a difference scale are drawn in two panels
    sharing the row labels, each with its own no-effect line, so no scales are mixed.

    Returns
    -------
    matplotlib.figure.Figure
    """
    v = view_of(result)
    adj = v.data["adjusted"]
    measure = adj.get("measure", "")
    rows = _rows_for_cross_checks(v.data)
    level = int(round(100 * (1 - float(adj.get("alpha") or 0.05))))
    ratio_rows = ["ratio" in str(r.get("measure", "")) for _n, r, _c in rows]
    panels = [k for k in (False, True) if k in ratio_rows]
    fig, axes = new_figure("Does the gap survive across adjustment methods?",
                           f"estimates and {level}% CIs on the same analysed sample and estimand, "
                           "crude for contrast", size=(7.2, 1.8 + 0.38 * max(len(rows), 2)),
                           ncols=max(len(panels), 1), sharey=True,
                           gridspec_kw={"width_ratios": [3, 2][:len(panels)] or [1]})
    axes = list(np.ravel(axes))
    if not rows:
        _empty(axes[0], "no estimates on this result")
        return fig
    ys = np.arange(len(rows), 0, -1)
    for ax, kind in zip(axes, panels):
        scale = next(r.get("measure", "") for (_n, r, _c), k in zip(rows, ratio_rows) if k == kind)
        for y, (_name, row, colour), k in zip(ys, rows, ratio_rows):
            if k != kind:
                continue
            est, lo, hi = row.get("estimate"), row.get("ci_low"), row.get("ci_high")
            if lo is not None and hi is not None:
                ax.hlines(y, lo, hi, color=colour, linewidth=2.4, alpha=0.9)
            if est is not None:
                ax.plot([est], [y], marker="|", markersize=14, markeredgewidth=2.6, color=INK)
        headline_here = ("ratio" in str(measure)) == kind
        if headline_here and adj.get("ci_low") is not None and adj.get("ci_high") is not None:
            ax.axvspan(adj["ci_low"], adj["ci_high"], color=ACCENT, alpha=0.08, zorder=0)
        ax.axvline(null_value(scale if not kind else "ratio"), color=INK, linewidth=0.9,
                   linestyle=(0, (4, 2)))
        if kind:
            ax.set_xscale("log")
            _plain_log_ticks(ax)
        ax.grid(axis="y", visible=False)
        pp = not kind and (v.data.get("question") or {}).get("outcome_type") == "binary"
        if pp:  # a risk difference: percentage points, as in the tables
            percentage_points(ax.xaxis)
        ax.set_xlabel(("risk difference, percentage points" if pp else f"{scale}")
                      + ("\n(band: headline CI)" if headline_here else ""))
    axes[0].set_yticks(ys)
    axes[0].set_yticklabels([name for name, _r, _c in rows], fontsize=8)
    axes[0].set_ylim(0.4, len(rows) + 0.6)
    return fig


def _plain_log_ticks(ax):
    from matplotlib.ticker import FuncFormatter, LogLocator
    ax.xaxis.set_major_locator(LogLocator(base=10, subs=(1.0, 1.5, 2.0, 3.0, 5.0, 7.0)))
    ax.xaxis.set_major_formatter(FuncFormatter(lambda x, _p: f"{x:g}"))
    ax.xaxis.set_minor_formatter(FuncFormatter(lambda _x, _p: ""))


def plot_p_value_function(result) -> Figure:
    """Figure 8: p-value of the covariance-adjusted test against the hypothesized effect τ0.

    The CI is the set of τ0 whose p-value exceeds α (here its convex hull), read off the curve;
    the estimate is where the curve peaks. For a binary outcome, the normal (Wald) confidence
    curve of the headline estimate, ``2 Φ(−|estimate − τ0| / SE)``, is drawn and labelled so.

    Returns
    -------
    matplotlib.figure.Figure
    """
    v = view_of(result)
    adj = v.data["adjusted"]
    ce = adj.get("constant_effect") or {}  # None for binary outcomes
    alpha = float(adj.get("alpha") or v.data.get("spec", {}).get("alpha") or 0.05)
    tau, p = ce.get("curve_tau") or ce.get("tau_grid"), ce.get("curve_p") or ce.get("p_grid")
    measure = adj.get("measure", "")
    if tau and p:
        fig, ax = new_figure("The p-value function: the confidence interval by test inversion",
                             "two-sided p-value of the covariance-adjusted stratified test of "
                             "'constant effect τ0' (Rosenbaum 2002)")
        tau, p = np.asarray(tau, float), np.asarray([np.nan if q is None else q for q in p], float)
        est, lo, hi = ce.get("estimate"), ce.get("ci_low"), ce.get("ci_high")
        ax.step(tau, p, where="mid", color=REFERENCE, linewidth=1.8, label="p(τ0)")
        at_zero = ce.get("p_value_at_zero")
        if at_zero is not None and tau.min() <= 0 <= tau.max():
            ax.plot([0], [at_zero], marker="o", color=ALERT, linestyle="none",
                    label=f"τ0 = 0: p = {format_p(at_zero)} (the test)")
        xlabel = f"hypothesized constant effect τ0 ({measure})"
    else:
        est, se = adj.get("estimate"), adj.get("se")
        lo, hi = adj.get("ci_low"), adj.get("ci_high")
        fig, ax = new_figure("Wald confidence curve of the headline estimate",
                             "normal approximation from the estimate and its SE; not a test "
                             "inversion (none exists for this outcome)")
        if est is None or not se:
            _empty(ax, "no estimate with a standard error on this result")
            return fig
        log = adj.get("scale") == "log"
        centre = math.log(est) if log else est
        span = 4.0 * se
        x = np.linspace(centre - span, centre + span, 401)
        p = 2 * stats.norm.sf(np.abs(x - centre) / se)  # Wald: z = (estimate - τ0) / SE
        tau = np.exp(x) if log else x
        ax.plot(tau, p, color=REFERENCE, linewidth=1.8, label="Wald p(τ0)")
        if log:
            ax.set_xscale("log")
            _plain_log_ticks(ax)
        xlabel = f"hypothesized effect τ0 ({measure})"
    pp = measure == "risk difference"
    if pp:  # percentage points, as in the tables
        percentage_points(ax.xaxis)
        xlabel = xlabel.replace("(risk difference)", "(risk difference, percentage points)")

    def show(x):
        return f"{format_sig(100 * x)} pp" if pp else format_sig(x)
    ax.axhline(alpha, color=ALERT, linestyle=(0, (4, 2)), linewidth=1.1, label=f"α = {alpha:g}")
    if lo is not None and hi is not None:
        level = int(round(100 * (1 - alpha)))
        ax.hlines(alpha, lo, hi, color=ACCENT, linewidth=5, alpha=0.8,
                  label=f"{level}% CI {show(lo)} to {show(hi)}")
    if est is not None:
        ax.axvline(est, color=INK, linewidth=1.0, linestyle=(0, (1, 1.5)),
                   label=f"estimate {show(est)}")
    nv = null_value(measure)
    if ax.get_xlim()[0] <= nv <= ax.get_xlim()[1]:
        ax.axvline(nv, color=MUTED, linewidth=0.8)
    ax.set_ylim(0, 1.04)
    ax.set_xlabel(xlabel)
    ax.set_ylabel("p-value")
    ax.legend(loc="upper right", fontsize=7.5)
    return fig
