"""The summary lines of a follow-up outcome (rendered from results.json's ``followup`` block)."""

from __future__ import annotations

import textwrap

from ._followup_counts import by_step, counts_text
from .formatting import format_number as _n

__all__ = ["followup_lines", "count_lines"]


def count_lines(data: dict) -> list[str]:
    """Events and person-time by group of the analysed rows, and of the complete cases when
    the overlap rule or the strata set some of them aside; [] for other outcome types."""
    block = by_step(data)
    if not block:
        return []
    column = block["column"]
    lines = [f"  analysed rows, {counts_text(block['analysed'], column)}"]
    if block["complete_cases"] != block["analysed"]:
        lines.append(f"  complete cases (before trimming and strata), "
                     f"{counts_text(block['complete_cases'], column)}")
    return lines


def followup_lines(data: dict, width: int = 88) -> list[str]:
    """Events and person-time (both follow-up outcomes); horizon, RMST and hazard ratio of a
    time-to-event outcome; [] otherwise."""
    block = data.get("followup") or {}
    counts = [part for line in count_lines(data) for part in textwrap.wrap(
        line, width, initial_indent="", subsequent_indent="    ")]
    if block.get("outcome_type") != "time-to-event":
        return counts
    level = int(round(100 * (1 - data["spec"]["alpha"])))
    h, hr, rm = block["horizon"], block["hazard_ratio"], block["rmst_difference"]
    if hr.get("estimate") is not None:
        hr_text = f"{_n(hr['estimate'])} ({level}% CI {_n(hr['ci_low'])} to {_n(hr['ci_high'])})"
    else:
        hr_text = f"not estimable ({hr.get('reason')})"
    lines = [f"  horizon {_n(h['value'])}: {h['reason']}",
             f"  RMST difference to the horizon: {_n(rm['estimate'])} ({level}% CI "
             f"{_n(rm['ci_low'])} to {_n(rm['ci_high'])})",
             f"  hazard ratio (stratified Cox; secondary, not collapsible): {hr_text}"]
    return counts + [part for line in lines for part in textwrap.wrap(
        line, width, initial_indent="", subsequent_indent="    ")]
