"""The report's matching section (``design="match"``; issue 12), from the result's
``matching`` block and participant flow. Nothing is recomputed.

What a reader of a matched analysis asks first: how many exposed units found a match and why
the others did not, how many reference units were used, how wide the caliper was (in pooled
SDs of the score's logit and on the logit scale itself), how many reference units each matched
exposed unit got, how close the sets are, and which population the effect now describes (the
matched exposed units, not every exposed unit).
"""

from __future__ import annotations

from ..formatting import format_value as _f

__all__ = ["matching_context"]

#: Why an exposed unit was left unmatched, in the order the section lists them.
_REASONS = ("none_within_caliper", "candidates_used_by_others", "no_reference_with_same_values")
_SHORT = {"none_within_caliper": "no reference unit within the caliper",
          "candidates_used_by_others": "every reference unit within the caliper was needed "
                                       "by another exposed unit",
          "no_reference_with_same_values": "no reference unit with the same values on the "
                                           "exact-agreement columns"}


def _share(part, whole) -> str:
    return f"{100 * part / whole:.1f} %" if whole else "n/a"


def matching_context(data: dict) -> dict | None:
    """Plain values for the template's matching section, or None for a strata design."""
    m = data.get("matching")
    if not m:
        return None
    n1, matched = int(m["n_exposed"]), int(m["matched_exposed"])
    left = m.get("unmatched_exposed") or {}
    reasons = [{"reason": _SHORT.get(key, key.replace("_", " ")), "n": int(left[key])}
               for key in list(_REASONS) + [k for k in left if k not in _REASONS]
               if left.get(key)]
    sizes = [{"k": int(k), "n": int(v)} for k, v in sorted(
        (m.get("matches_per_exposed") or {}).items(), key=lambda kv: int(kv[0]))]
    not_matched = (data.get("flow") or {}).get("not_matched_by_group") or {}
    graph = m.get("graph") or {}
    return {
        "n_exposed": n1, "matched": matched, "matched_share": _share(matched, n1),
        "unmatched": n1 - matched, "reasons": reasons,
        "n_reference": int(m["n_reference"]), "reference_used": int(m["reference_used"]),
        "reference_unused": not_matched.get("reference"),
        "per_exposed": int(m["per_exposed"]), "sizes": sizes,
        "caliper_sd": _f(m.get("caliper_sd"), 2), "caliper_logit": _f(m.get("caliper"), 3),
        "pooled_sd": _f(m.get("pooled_sd"), 3),
        "mean_gap": _f(m.get("mean_gap"), 3), "max_gap": _f(m.get("max_gap"), 3),
        "same_value_on": list(m.get("same_value_on") or []),
        "objective": graph.get("objective", ""), "optimal_on": graph.get("optimal_on", ""),
        "solver": graph.get("solver", ""),
        "estimand": m.get("estimand", "effect in the matched exposed units"),
    }
