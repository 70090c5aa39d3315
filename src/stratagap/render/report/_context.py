"""The values the report template shows, gathered from the result (never recomputed).

Everything here is plain data; every string keeps its original text and is escaped by the
template (jinja2 autoescape), so user-supplied file names, column names and levels can never
become markup.
"""

from __future__ import annotations

import json
import math

from ..formatting import describe_terms, format_value as _f
from ..tables import strata_with_estimates
from .baseline import BASELINE_COLUMNS, analysed_raw, baseline_table, header as baseline_header
from .flow import flow_steps

__all__ = ["build_context", "spec_toml"]


def _estimate_row(label, est, level):
    if not est:
        return None
    lo, hi = est.get("ci_low"), est.get("ci_high")
    return {"label": label, "estimate": _f(est.get("estimate")), "se": _f(est.get("se"), 3),
            "ci": f"{_f(lo)} to {_f(hi)}" if lo is not None or hi is not None else "n/a",
            "measure": est.get("measure", ""), "estimand": est.get("estimand", ""),
            "population": est.get("population", ""), "method": est.get("method", ""),
            "level": level}


def spec_toml(data: dict) -> str:
    """The analysis as a TOML file that ``stratagap analyze --spec`` reads back."""
    spec = dict(data["spec"])
    lines = ["[analysis]"]
    file = data["source"].get("file")
    if file:
        lines.append(f"data = {json.dumps(str(file), ensure_ascii=False)}")
    for key, value in spec.items():
        if value is None or key == "data_path":
            continue
        lines.append(f"{key.replace('_', '-')} = {json.dumps(value, ensure_ascii=False)}")
    return "\n".join(lines) + "\n"


def _strata_rows(data):
    out = []
    for row in strata_with_estimates(data):
        joined = "ci_low" in row  # the stratum has a per-stratum estimate row
        out.append({"stratum": int(row["stratum"]) + 1,
                    "range": f"{_f(row['score_low'], 3)} to {_f(row['score_high'], 3)}",
                    "n_exposed": row["n_exposed"], "n_reference": row["n_reference"],
                    "n": row["n"], "weight": _f(row["weight"], 3),
                    "estimate": _f(row.get("estimate")),
                    "ci": f"{_f(row['ci_low'])} to {_f(row['ci_high'])}" if joined else "n/a",
                    "model": row.get("model", "")})
    return out


def _test_rows(test):
    rows = []
    for label, t in (("default", test), ("studentized companion", test.get("studentized")),
                     ("sum of exposed outcomes", test.get("sum_statistic"))):
        if not t:
            continue
        rows.append({"label": label, "statistic": _f(t.get("statistic"), 4),
                     "p": t.get("p_value"), "normal_p": t.get("normal_p_value"),
                     "mc_se": t.get("mc_se"), "engine": t.get("engine", ""),
                     "null": t.get("null", ""), "resamples": t.get("resamples")})
    return rows


def build_context(view, figures: dict, *, compact: bool) -> dict:
    data = view.data
    q = data["question"]
    adj = data["adjusted"]
    alpha = float(data["spec"]["alpha"])
    level = int(round(100 * (1 - alpha)))
    effects = [_estimate_row("crude (unadjusted)", data["crude"], level),
               _estimate_row("adjusted (headline)", adj, level),
               _estimate_row("plain stratified difference", adj.get("plain_stratified"), level),
               _estimate_row("constant effect by test inversion", adj.get("constant_effect"), level),
               _estimate_row("standardized risk ratio", adj.get("standardized_risk_ratio"), level)]
    for key, est in (adj.get("mantel_haenszel") or {}).items():
        if isinstance(est, dict):
            effects.append(_estimate_row(f"Mantel-Haenszel {key.replace('_', ' ')}", est, level))
    cross = [_estimate_row(r.get("method", ""), r, level) | {"kind": r.get("estimand_kind", ""),
                                                             "se_method": r.get("se_method", "")}
             for r in data["cross_checks"]]
    sens = data["sensitivity"]
    tip = sens["tipping"]
    raw = analysed_raw(view)
    base = baseline_table(view)
    balance_rows = [{**r, "label": r.get("covariate", "") if r.get("level") in (None, "")
                     else f"{r.get('covariate')}: {r.get('level')}"}
                    for r in data["balance"]["rows"]]
    hetero = []
    for key, h in data["heterogeneity"].items():
        if isinstance(h, dict):
            hetero.append({"label": h.get("method", key), "statistic": _f(h.get("statistic"), 3),
                           "df": h.get("df"), "p": h.get("p_value")})
    source = data["source"]
    run = getattr(view, "run", None) or {}
    return {
        "compact": compact, "q": q, "source": source, "data": data, "level": level,
        "alpha": alpha, "flow": data["flow"],
        "flow_steps": flow_steps(data["flow"], data.get("clusters"), data.get("followup")),
        "clusters": data.get("clusters"),
        "warnings": data["warnings"], "overlap": data["overlap"],
        "propensity": data["propensity"], "balance": data["balance"],
        "balance_rows": balance_rows, "baseline_header": [c for c in BASELINE_COLUMNS],
        "baseline_header_text": baseline_header(data),
        "baseline_rows": [{k: (None if isinstance(v, float) and not math.isfinite(v) else v)
                           for k, v in row.items()} for row in base.to_dict("records")], "baseline_has_raw": raw is not None,
        "strata_rows": _strata_rows(data), "strata_info": data["strata_info"],
        "test": data["test"], "test_rows": _test_rows(data["test"]),
        "effects": [e for e in effects if e], "heterogeneity": hetero,
        "adjusted": adj, "cross": cross, "weights": data.get("cross_check_weights"),
        "sens": sens, "e_value": sens.get("e_value") or {},
        "gamma": sens["gamma_threshold_detail"],
        "gamma_bounds": sens["gamma_bounds"], "tipping": tip,
        "benchmarks": tip.get("benchmarks") or [],
        "negative": data["negative_control"], "verdict": data["verdict"],
        "cautions": data["cautions"], "figures": figures,
        "spec_toml": spec_toml(data), "command": run.get("command") or source.get("command"),
        "seed": data["spec"]["seed"], "run": run,
        "versions": (run.get("versions") or {}), "fmt": _f,
        "terms_text": describe_terms(data, knots=True),
    }
