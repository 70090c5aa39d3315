"""The participant-flow diagram (STROBE item 13, von Elm et al. 2007), as boxes for the report.

Rows read, set aside for missing values (by column and by group), set aside by the overlap rule
(by group) and by strata lacking a group, and the rows analysed (by group). For a time-to-event
or a rate outcome every box and every exit also gives the events and the person-time by group
(the flow's ``followup_by_step``). Only the result's counts are shown; nothing is recounted.

References
----------
von Elm, E. et al. (2007). The Strengthening the Reporting of Observational Studies in
Epidemiology (STROBE) statement. Annals of Internal Medicine 147:573-577.
"""

from __future__ import annotations

from .._followup_counts import counts_text

__all__ = ["flow_steps"]


def _groups(counts: dict | None) -> str:
    counts = {k: v for k, v in (counts or {}).items() if k in ("exposed", "reference")}
    return ", ".join(f"{k} {int(v):,}" for k, v in counts.items())


def _missing_counts(step: dict, column: str) -> list[str]:
    """Events and person-time of the rows set aside for missing values (of those whose group
    is recorded; events only where the outcome is)."""
    lines = [counts_text(step, column)]
    unknown = step.get("outcome_missing") or {}
    if any(unknown.values()):
        lines.append(f"events not known (outcome missing): exposed {int(unknown['exposed']):,}, "
                     f"reference {int(unknown['reference']):,} rows")
    return lines


def flow_steps(flow: dict, clusters: dict | None = None) -> list[dict]:
    """Main boxes, each with the exclusions that leave the flow after it.

    With ``clusters`` (the result's ``clusters`` block) the boxes count clusters beside rows;
    with the flow's ``followup_by_step`` (time-to-event and rate outcomes) every box and exit
    gives events and person-time by group.

    Returns
    -------
    list of dict
        ``{"title", "n", "detail", "exits": [{"title", "n", "lines": [str]}]}``; the last box is
        the analysed sample.
    """
    read, used, analysed = flow["rows_read"], flow["rows_used"], flow["rows_analysed"]
    missing_exit = None
    if read is not None and used is not None:
        by_col = {k: int(v) for k, v in flow["dropped_missing_by_column"].items() if v}
        lines = ["by column: " + ", ".join(f"{k} {v:,}" for k, v in by_col.items())] if by_col else []
        if len(by_col) > 1:
            lines.append("(a row can miss several columns)")
        by_group = _groups(flow["dropped_missing_by_group"])
        if by_group:
            lines.append(f"by group: {by_group}")
        unknown = flow["dropped_missing_by_group"].get("unknown")
        if unknown:
            lines.append(f"group not recorded: {int(unknown):,}")
        mo = flow["missing_outcome_by_group"]
        if any((g or {}).get("n") for g in mo.values()):
            lines.append("missing outcome: " + ", ".join(
                f"{k} {int(g.get('n') or 0):,} ({100 * float(g.get('share') or 0):.1f} %)"
                for k, g in mo.items()))
        missing_exit = {"title": f"Set aside for missing values ({flow.get('missing_policy', 'drop')})",
                        "n": int(read) - int(used), "lines": lines}
    steps = [{"title": "Rows read", "n": read, "detail": "", "exits": [missing_exit] if missing_exit else []}]
    exits = []
    trimmed = flow["trimmed_by_group"]
    n_trim = sum(int(v) for v in trimmed.values())
    exits.append({"title": "Set aside by the overlap rule (trimming)", "n": n_trim, "key": "trimmed",
                  "lines": [f"by group: {_groups(trimmed)}"] if trimmed else []})
    lacking = flow["strata_set_aside_by_group"]
    n_lack = sum(int(v) for v in lacking.values())
    if n_lack:
        exits.append({"title": "Set aside: strata lacking one group", "n": n_lack,
                      "key": "strata_set_aside",
                      "lines": [f"by group: {_groups(lacking)}"]})
    unmatched = flow.get("not_matched_by_group")  # design=match only
    if unmatched:
        exits.append({"title": "Not in a matched set (exposed left unmatched, reference unused)",
                      "n": sum(int(v) for v in unmatched.values()), "key": "not_matched",
                      "lines": [f"by group: {_groups(unmatched)}"]})
    steps.append({"title": "Complete cases", "n": used,
                  "detail": _groups(flow["used_by_group"]), "exits": exits})
    steps.append({"title": "Analysed", "n": analysed,
                  "detail": _groups(flow["analysed_by_group"]), "exits": []})
    if clusters:
        cf = clusters["flow"]
        steps[1]["detail"] += f"; {int(cf['clusters_complete_cases']):,} clusters"
        trimmed_c = cf.get("clusters_trimmed")
        if trimmed_c and sum(trimmed_c.values()):
            exits[0]["lines"].append(f"clusters: {_groups(trimmed_c)}")
        holding = "" if clusters["level"] == "cluster" else " (holding each group)"
        steps[-1]["detail"] += f"; clusters{holding}: {_groups(cf['clusters_analysed'])}"
    counts = flow.get("followup_by_step") or {}  # time-to-event and rate outcomes only
    column = counts.get("column")
    for exit_ in exits:
        key = exit_.pop("key")  # the exit's step in followup_by_step
        if exit_["n"] and counts.get(key):
            exit_["lines"].append(counts_text(counts[key], column))
    if counts:
        if missing_exit is not None and counts.get("set_aside_missing") and missing_exit["n"]:
            missing_exit["lines"].extend(_missing_counts(counts["set_aside_missing"], column))
        steps[1]["detail"] += "; " + counts_text(counts["complete_cases"], column)
        steps[-1]["detail"] += "; " + counts_text(counts["analysed"], column)
    return steps
