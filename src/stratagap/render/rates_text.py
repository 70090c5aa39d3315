"""Wording of a rate outcome (events over person-time) for the summary, verdict and report.

Renders only what the result holds: the ``followup`` block of a rate outcome
(``outcome_type == "rate"``) and the ``adjusted`` block's rate fields. Every function returns
nothing for other outcome types, so the callers need one line each.
"""

from __future__ import annotations

from .formatting import format_number as _n

__all__ = ["is_rate", "summary_lines", "verdict_sentences", "baseline_rows", "effect_blocks"]


def is_rate(followup) -> bool:
    block = followup.to_dict() if hasattr(followup, "to_dict") else followup
    return isinstance(block, dict) and block.get("outcome_type") == "rate"


def _ci(level, block, scale=1.0):
    lo, hi = block.get("ci_low"), block.get("ci_high")
    lo = None if lo is None else lo * scale
    hi = None if hi is None else hi * scale
    return f"{level}% CI {_n(lo)} to {_n(hi)}"


def summary_lines(data: dict) -> list[str]:
    """Extra lines of the CLI summary: unit, per 1,000, rate ratio, events and person-time."""
    block = data.get("followup")
    if not is_rate(block):
        return []
    adj = data["adjusted"]
    level = int(round(100 * (1 - data["spec"]["alpha"])))
    per = block["per"]
    col = block["person_time_column"]
    per_block = adj["rate_difference_per"]
    rr = adj["rate_ratio"]
    lines = [f"  rate difference per unit of '{col}' (above); per {per:,} units of '{col}': "
             f"{_n(per_block['estimate'])} ({_ci(level, per_block)})"]
    if rr.get("estimate") is None:
        lines.append(f"  Mantel-Haenszel rate ratio: not estimable ({rr.get('method')})")
    else:
        lines.append(f"  Mantel-Haenszel rate ratio (conditional, secondary): "
                     f"{_n(rr['estimate'])} ({_ci(level, rr)})")
    return lines


def verdict_sentences(spec, adjusted) -> tuple[str, list[str]]:
    """For a rate outcome: how the headline was adjusted, and the sentences after it.

    Returns ``(how, sentences)``; ``how`` is None for other outcomes (the caller keeps its
    own wording).
    """
    col = getattr(spec, "person_time", None)
    if not col:
        return None, []
    level = int(round(100 * (1 - spec.alpha)))
    est, lo, hi = (getattr(adjusted, k, None) for k in ("estimate", "ci_low", "ci_high"))
    per = 1000
    scaled = {"ci_low": lo, "ci_high": hi}
    how = (f"events per unit of '{col}', group-specific Poisson models within "
           f"propensity-score strata, standardized by person-time")
    sentence = (f"Per {per:,} units of '{col}' that is {_n(None if est is None else est * per)} "
                f"events ({_ci(level, scaled, per)}).")
    return how, [sentence]


def baseline_rows(data: dict) -> list[dict]:
    """The baseline table's crude-rate row (per 1,000 units), by group; the events and
    person-time rows above it come from :mod:`._followup_counts`."""
    block = data.get("followup")
    if not is_rate(block):
        return []
    rate, per, col = block["rates_by_group"], block["per"], block["person_time_column"]
    cells = {g: "" if rate[g] is None else _n(rate[g] * per) for g in ("exposed", "reference")}
    return [{"characteristic": "Crude rate", "level": "", "summary": f"events per {per:,} {col}",
             **cells, "smd_before": None, "smd_after": None}]


def effect_blocks(data: dict) -> list[tuple[str, dict]]:
    """(label, estimate-like block) rows for the report's estimates table (rate outcomes)."""
    block = data.get("followup")
    if not is_rate(block):
        return []
    adj = data["adjusted"]
    col, per = block["person_time_column"], block["per"]
    scaled = {**adj["rate_difference_per"], "measure": f"rate difference per {per:,} {col}",
              "estimand": adj.get("estimand", ""), "population": adj.get("population", ""),
              "method": "the headline, scaled"}
    crude_rr = {**block["crude_rate_ratio"], "measure": "rate ratio",
                "estimand": "crude (unadjusted)", "population": "all complete-case rows"}
    return [(f"adjusted (headline) per {per:,} units of '{col}'", scaled),
            ("crude rate ratio", crude_rr)]
