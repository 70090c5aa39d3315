"""The summary lines of a follow-up outcome (rendered from results.json's ``followup`` block)."""

from __future__ import annotations

import textwrap

from .formatting import format_number as _n

__all__ = ["followup_lines"]


def followup_lines(data: dict, width: int = 88) -> list[str]:
    """Horizon, events, RMST and hazard ratio of a time-to-event outcome; [] otherwise."""
    block = data.get("followup") or {}
    if block.get("outcome_type") != "time-to-event":
        return []
    level = int(round(100 * (1 - data["spec"]["alpha"])))
    h, hr, rm = block["horizon"], block["hazard_ratio"], block["rmst_difference"]
    ev, pt = block["events_by_group"], block["person_time_by_group"]
    if hr.get("estimate") is not None:
        hr_text = f"{_n(hr['estimate'])} ({level}% CI {_n(hr['ci_low'])} to {_n(hr['ci_high'])})"
    else:
        hr_text = f"not estimable ({hr.get('reason')})"
    lines = [f"  horizon {_n(h['value'])}: {h['reason']}",
             f"  events {ev['exposed']} exposed / {ev['reference']} reference; person-time "
             f"{_n(pt['exposed'])} / {_n(pt['reference'])}",
             f"  RMST difference to the horizon: {_n(rm['estimate'])} ({level}% CI "
             f"{_n(rm['ci_low'])} to {_n(rm['ci_high'])})",
             f"  hazard ratio (stratified Cox; secondary, not collapsible): {hr_text}"]
    return [part for line in lines for part in textwrap.wrap(
        line, width, initial_indent="", subsequent_indent="    ")]
