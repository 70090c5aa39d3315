"""The short plain-text summary the CLI prints (rendered from ``AnalysisResult.to_dict()``)."""

from __future__ import annotations

import textwrap

from .formatting import (describe_terms, format_number as _n, format_p as _p, format_risk,
                         is_risk_difference)
from ._followup_summary import followup_lines
from .rates_text import summary_lines as _rate_lines
from .verdict import NOT_SIGNIFICANT, measure_code, not_significant_phrase

__all__ = ["render_summary"]

_SCALES = {"difference": "difference scale", "rr": "risk ratio", "or": "odds ratio"}


def render_summary(data: dict, *, truth: dict | None = None, width: int = 88) -> str:
    """Plain-text summary of a result dict; ``truth`` (demo only) adds the known true effect."""
    q, flow, test, adj, crude = (data["question"], data["flow"], data["test"], data["adjusted"],
                                 data["crude"])
    level = int(round(100 * (1 - data["spec"]["alpha"])))
    binary = q["outcome_type"] == "binary"
    lines = [
        f"stratagap: {q['outcome']} by {q['exposure']} "
        f"({q['exposed_value']} vs {q['reference_value']}), {q['outcome_type']} outcome",
        f"  rows read {flow['rows_read']} -> analysed {data['n_used']} "
        f"(exposed {flow['analysed_by_group']['exposed']}, reference "
        f"{flow['analysed_by_group']['reference']})",
        f"  estimand: {q['population']}",
        *textwrap.wrap(f"terms: {describe_terms(data)}", width, initial_indent="  ",
                       subsequent_indent="    "),
        f"  strata: {len(data['strata'])}; max |SMD| before {_n(data['balance']['max_abs_smd_before'], 3)}"
        f", after {_n(data['balance']['max_abs_smd_after'], 3)}",
        f"  crude {crude['measure']}: {_effect(crude, binary, f'{level}% CI ')}",
        f"  adjusted {adj['measure']}: {_effect(adj, binary, f'{level}% CI ')}",
        *textwrap.wrap(f"the CI is for {adj['ci_for']}" if adj.get("ci_for") else "", width,
                       initial_indent="    ", subsequent_indent="    "),
    ]
    lines.extend(_rate_lines(data))  # rate outcomes: per 1,000, rate ratio, events/person-time
    lines.extend(followup_lines(data, width))  # time-to-event and rate outcomes only
    if data.get("matching"):
        m = data["matching"]
        left = ", ".join(f"{v} {k.replace('_', ' ')}" for k, v in m["unmatched_exposed"].items() if v)
        lines.append(f"  matched sets: {m['matched_exposed']} of {m['n_exposed']} exposed units, "
                     f"1:{m['per_exposed']}, caliper {_n(m['caliper_sd'])} SD of the logit; "
                     f"left unmatched: {left or 'none'}")
    lines.extend(_cluster_lines(data.get("clusters"), width))
    if truth is not None:
        key = q["estimand"].lower()
        at = f" at time {_n(truth['horizon'])}" if "horizon" in truth else ""
        lines.append(f"  TRUE effect (invented data, {q['estimand']}{at} in the analysed "
                     f"population): {truth[key]:.2f}")
    lines.append(f"  permutation test ({test['statistic_kind']}, {test['null']}): "
                 f"p = {_p(test['p_value'])} [{test['engine']}, {test['resamples']} resamples]")
    sens = data["sensitivity"]
    ev = sens["e_value"] or {}  # None when the E-value is undefined
    detail = sens.get("gamma_threshold_detail") or {}
    if detail.get("flag") == NOT_SIGNIFICANT:
        gamma = not_significant_phrase()
    else:
        gamma = f"Γ threshold {_n(sens['gamma_threshold'])}"
    lines.append(f"  sensitivity: {gamma}; "
                 f"E-value {_n(ev.get('point'))} (CI limit {_n(ev.get('ci_limit'))})")
    headline = measure_code(adj["measure"])
    for row in data["cross_checks"]:
        # a cross-check on another scale than the headline's says which (issue 10, item 1)
        scale = "" if row.get("measure", "difference") == headline else (
            f" [{_SCALES.get(row.get('measure'), row.get('measure'))}]")
        lines.append(f"  cross-check {row['method']}{scale}: {_effect(row, binary)}")
    if data["warnings"]:
        lines.append(f"  warnings ({len(data['warnings'])}):")
        for w in data["warnings"]:
            lines.extend(textwrap.wrap(f"- {w['message']}", width, initial_indent="    ",
                                       subsequent_indent="      "))
    lines.append("")
    lines.extend(textwrap.wrap("Verdict: " + data["verdict"], width))
    lines.append("")
    for c in data["cautions"]:
        lines.extend(textwrap.wrap(c, width, initial_indent="! ", subsequent_indent="  "))
    return "\n".join(lines) + "\n"


def _effect(est: dict, binary: bool, ci: str = "") -> str:
    """"3.54 (95% CI 2.57 to 4.51)"; a risk difference in percentage points with the two
    groups' risks where the estimate carries them: "-0.46 pp (95% CI -4.20 to 3.28);
    risks 19.2 % vs 19.6 %" (issue 10: no "-0.00" for a risk difference)."""
    if not is_risk_difference(est.get("measure"), binary):
        return f"{_n(est['estimate'])} ({ci}{_n(est['ci_low'])} to {_n(est['ci_high'])})"
    pp = [None if est.get(k) is None else 100 * est[k] for k in ("estimate", "ci_low", "ci_high")]
    text = f"{_n(pp[0])} pp ({ci}{_n(pp[1])} to {_n(pp[2])})"
    p1 = est.get("risk_exposed", est.get("mu1"))
    p0 = est.get("risk_reference", est.get("mu0"))
    if p1 is not None and p0 is not None:
        text += f"; risks {format_risk(p1)} vs {format_risk(p0)}"
    return text


def _cluster_lines(block: dict | None, width: int) -> list[str]:
    """The clustering lines (only with --cluster): clusters by group, sizes, the test's level."""
    if not block:
        return []
    by, size = block["clusters_by_group"], block["patients_per_cluster"]
    holding = "" if block["level"] == "cluster" else " holding"
    lines = [f"  clusters ({block['column']}): {by['exposed']}{holding} exposed, "
             f"{by['reference']}{holding} reference; {size['min']} to {size['max']} rows per "
             f"cluster (median {_n(size['median'])})",
             f"  exposure {'per cluster' if block['level'] == 'cluster' else 'varies within clusters'}"
             f" ({block['mixed_clusters']} mixed clusters): permutation test at the level of "
             f"{block['test_level']}; headline CI cluster-robust (CR2, df "
             f"{_n(block['intervals'][0]['df'], 3)})"]
    if block.get("caution"):
        lines.extend(textwrap.wrap("! " + block["caution"], width, initial_indent="  ",
                                   subsequent_indent="    "))
    return lines
