"""The report's table rows, formatted a column at a time (issue 10, report numbers).

Three rules hold in every table of the report:

* one number of decimals per column (:func:`~stratagap.render.formatting.format_column`),
  chosen from the column's largest magnitude, and never scientific notation for an amount
  such as 1,500;
* a risk difference of a binary outcome is written in percentage points, with each group's
  risk beside it where the result carries the two risks (the headline's standardized risks,
  a cross-check's marginal risks ``mu1``/``mu0``, the crude group risks);
* strata are numbered as in ``results.json``, ``strata.csv`` and the run's messages: from 0,
  lowest scores first (docs/results.md, "Numbering").

Nothing is recomputed: every number is the result's own, rescaled at most by 100.
"""

from __future__ import annotations

from ..formatting import format_column, format_risk, format_value as _f, is_risk_difference
from ..tables import strata_with_estimates

__all__ = ["estimate_rows", "strata_rows", "strata_effect_label", "benchmark_rows",
           "is_risk_difference", "PP_LABEL"]

PP_LABEL = "risk difference (pp)"  # pp: percentage points, said in the captions


def _risks(est) -> str:
    p1 = est.get("risk_exposed", est.get("mu1"))
    p0 = est.get("risk_reference", est.get("mu0"))
    if p1 is None or p0 is None:
        return ""
    return f"{format_risk(p1)} vs {format_risk(p0)}"


def estimate_rows(entries, level: int, *, binary: bool) -> list[dict]:
    """Rows of an estimates table from ``(label, estimate dict)`` pairs (None entries skipped).

    Each column (value, SE, CI) gets one number of decimals; risk differences are shown in
    percentage points, so they share a column with risk and odds ratios without a row
    printed as "-0.00".
    """
    entries = [(label, est) for label, est in entries if est]
    scales = [100.0 if is_risk_difference(est.get("measure"), binary) else 1.0
              for _label, est in entries]

    # a ratio needs two decimals (0.98, 1.20) even beside a risk difference of 10.4 pp
    least = 2 if any("ratio" in str(est.get("measure", "")) or est.get("measure") in ("rr", "or")
                     for _l, est in entries) else 0

    def column(key):
        return format_column([est.get(key) if est.get(key) is None else est[key] * k
                              for (_l, est), k in zip(entries, scales)], min_decimals=least)

    values, ses = column("estimate"), column("se")
    bounds = format_column([v for (_l, est), k in zip(entries, scales)
                            for v in (None if est.get("ci_low") is None else est["ci_low"] * k,
                                      None if est.get("ci_high") is None else est["ci_high"] * k)],
                           min_decimals=least)
    rows = []
    for i, ((label, est), k) in enumerate(zip(entries, scales)):
        lo, hi = est.get("ci_low"), est.get("ci_high")
        measure = est.get("measure", "")
        rows.append({
            "label": label, "estimate": values[i], "se": ses[i],
            "ci": f"{bounds[2 * i]} to {bounds[2 * i + 1]}" if lo is not None or hi is not None
            else "n/a",
            "measure": PP_LABEL if k != 1.0 else measure, "risks": _risks(est) if binary else "",
            "estimand": est.get("estimand", ""), "population": est.get("population", ""),
            "method": est.get("method", ""), "level": level})
    return rows


def strata_rows(data: dict) -> list[dict]:
    """The strata table: numbered from 0 as in results.json; one decimals rule per column."""
    rows = strata_with_estimates(data)
    binary = (data.get("question") or {}).get("outcome_type") == "binary"
    k = 100.0 if binary else 1.0  # a binary outcome's per-stratum effects are risk differences
    joined = ["ci_low" in row for row in rows]  # the stratum has a per-stratum estimate row
    est = format_column([None if r.get("estimate") is None else r["estimate"] * k for r in rows])
    bounds = format_column([None if not j or r[key] is None else r[key] * k
                            for r, j in zip(rows, joined) for key in ("ci_low", "ci_high")])
    out = []
    for i, (row, j) in enumerate(zip(rows, joined)):
        out.append({"stratum": int(row["stratum"]),
                    "range": f"{_f(row['score_low'], 3)} to {_f(row['score_high'], 3)}",
                    "n_exposed": row["n_exposed"], "n_reference": row["n_reference"],
                    "n": row["n"], "weight": _f(row["weight"], 3), "estimate": est[i],
                    "ci": f"{bounds[2 * i]} to {bounds[2 * i + 1]}" if j else "n/a",
                    "model": row.get("model", "")})
    return out


def strata_effect_label(data: dict) -> str:
    """What the strata table's effect column holds."""
    binary = (data.get("question") or {}).get("outcome_type") == "binary"
    return ("risk difference in percentage points" if binary
            else (data.get("adjusted") or {}).get("measure", ""))


def benchmark_rows(tipping: dict, *, binary: bool) -> list[dict]:
    """The reference-covariate table of the tipping analysis (signed, as the figure)."""
    marks = tipping.get("benchmarks") or []
    pp = binary and tipping.get("measure", "difference") == "difference"
    k = 100.0 if pp else 1.0

    def col(key, scale=1.0):
        return format_column([None if m.get(key) is None else m[key] * scale for m in marks])

    gap, shift, est = col("prevalence_gap"), col("outcome_shift", k), col("corrected_estimate", k)
    bounds = format_column([None if m.get(key) is None else m[key] * k
                            for m in marks for key in ("corrected_ci_low", "corrected_ci_high")])
    return [{"name": m.get("name", ""), "gap": gap[i], "shift": shift[i], "estimate": est[i],
             "ci": f"{bounds[2 * i]} to {bounds[2 * i + 1]}",
             "includes_null": "yes" if m.get("ci_includes_null") else "no"}
            for i, m in enumerate(marks)]
