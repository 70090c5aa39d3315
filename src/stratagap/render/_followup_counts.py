"""Events and person-time by group, as the baseline table, the participant flow and the summary
show them for a time-to-event or a rate outcome.

Renders only the result's ``flow.followup_by_step`` block (see docs/results.md): per step of the
flow, the events and the sum of the follow-up column by group, in the unit of that column (the
follow-up time of a time-to-event outcome, the person-time of a rate). Every function returns
nothing for other outcome types.
"""

from __future__ import annotations

__all__ = ["by_step", "person_time_text", "counts_text", "baseline_rows"]


def by_step(data: dict) -> dict:
    """The flow's ``followup_by_step`` block, or {} (not a follow-up outcome)."""
    return (data.get("flow") or {}).get("followup_by_step") or {}


def person_time_text(x) -> str:
    """A sum of follow-up: one decimal and thousands separators ("12,345.6")."""
    return "n/a" if x is None else f"{float(x):,.1f}"


def counts_text(step: dict, column: str) -> str:
    """"events: exposed 12, reference 30; person-time (years): exposed 1,234.5, reference
    2,345.6" for one step of the flow."""
    ev, pt = step["events"], step["person_time"]
    return (f"events: exposed {int(ev['exposed']):,}, reference {int(ev['reference']):,}; "
            f"person-time ({column}): exposed {person_time_text(pt['exposed'])}, reference "
            f"{person_time_text(pt['reference'])}")


def baseline_rows(data: dict) -> list[dict]:
    """Baseline-table rows of the analysed rows: events and person-time by group.

    A time-to-event outcome shows the people with an event as count (% of the group); a rate
    outcome the events counted (a person may have several).
    """
    block = by_step(data)
    if not block:
        return []
    step, column = block["analysed"], block["column"]
    ev, pt = step["events"], step["person_time"]
    people = (data.get("flow") or {}).get("analysed_by_group") or {}
    survival = (data.get("followup") or {}).get("outcome_type") == "time-to-event"

    def events(g):
        n = int(ev[g])
        total = people.get(g)
        if survival and total:
            return f"{n:,} ({100.0 * n / total:.1f} %)"
        return f"{n:,}"

    def row(name, summary, cell):
        return {"characteristic": name, "level": "", "summary": summary,
                "exposed": cell("exposed"), "reference": cell("reference"),
                "smd_before": None, "smd_after": None}

    return [row("Events", "people with an event, count (%)" if survival else "count", events),
            row(f"Person-time ({column})", f"sum of '{column}'",
                lambda g: person_time_text(pt[g]))]
