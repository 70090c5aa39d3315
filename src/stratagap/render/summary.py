"""The short plain-text summary the CLI prints (rendered from ``AnalysisResult.to_dict()``)."""

from __future__ import annotations

import textwrap

from .formatting import describe_terms, format_number as _n, format_p as _p
from ._followup_summary import followup_lines
from .verdict import NOT_SIGNIFICANT, measure_code

__all__ = ["render_summary"]

_SCALES = {"difference": "difference scale", "rr": "risk ratio", "or": "odds ratio"}


def render_summary(data: dict, *, truth: dict | None = None, width: int = 88) -> str:
    """Plain-text summary of a result dict; ``truth`` (demo only) adds the known true effect."""
    q, flow, test, adj, crude = (data["question"], data["flow"], data["test"], data["adjusted"],
                                 data["crude"])
    level = int(round(100 * (1 - data["spec"]["alpha"])))
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
        f"  crude {crude['measure']}: {_n(crude['estimate'])} "
        f"({level}% CI {_n(crude['ci_low'])} to {_n(crude['ci_high'])})",
        f"  adjusted {adj['measure']}: {_n(adj['estimate'])} "
        f"({level}% CI {_n(adj['ci_low'])} to {_n(adj['ci_high'])})",
    ]
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
        lines.append(f"  TRUE effect (invented data, {q['estimand']} in the analysed population): "
                     f"{truth[key]:.2f}")
    lines.append(f"  permutation test ({test['statistic_kind']}, {test['null']}): "
                 f"p = {_p(test['p_value'])} [{test['engine']}, {test['resamples']} resamples]")
    sens = data["sensitivity"]
    ev = sens["e_value"] or {}  # None when the E-value is undefined
    detail = sens.get("gamma_threshold_detail") or {}
    if detail.get("flag") == NOT_SIGNIFICANT:
        gamma = "not significant without hidden bias (Γ = 1)"
    else:
        gamma = f"Γ threshold {_n(sens['gamma_threshold'])}"
    lines.append(f"  sensitivity: {gamma}; "
                 f"E-value {_n(ev.get('point'))} (CI limit {_n(ev.get('ci_limit'))})")
    headline = measure_code(adj["measure"])
    for row in data["cross_checks"]:
        # a cross-check on another scale than the headline's says which (issue 10, item 1)
        scale = "" if row.get("measure", "difference") == headline else (
            f" [{_SCALES.get(row.get('measure'), row.get('measure'))}]")
        lines.append(f"  cross-check {row['method']}{scale}: {_n(row['estimate'])} "
                     f"({_n(row['ci_low'])} to {_n(row['ci_high'])})")
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
