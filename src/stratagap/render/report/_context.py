"""The values the report template shows, gathered from the result (never recomputed).

Everything here is plain data; every string keeps its original text and is escaped by the
template (jinja2 autoescape), so user-supplied file names, column names and levels can never
become markup.
"""

from __future__ import annotations

import json
import math

from ..rates_text import effect_blocks as rate_effect_blocks
from ..formatting import describe_terms, format_number, format_value as _f
from ..verdict import NOT_SIGNIFICANT, gamma_sentence
from ._matching import matching_context
from ._rows import benchmark_rows, estimate_rows, strata_effect_label, strata_rows
from .baseline import (BASELINE_COLUMNS, analysed_raw, baseline_table,
                       header as baseline_header, trimming_note)
from .figures_design import balance_label
from .flow import flow_steps

__all__ = ["build_context", "spec_toml"]


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


def _flow_steps(data):
    return flow_steps(data["flow"], data.get("clusters"))


def estimand_text(q: dict) -> str:
    """"ATE", or "ATT; population: ..." when the population label says more than the
    estimand (said once when the two are the same)."""
    estimand, population = q.get("estimand", ""), q.get("population", "")
    if not population or population == estimand:
        return estimand
    return f"{estimand}; population: {population}"


def before_label(data: dict) -> str:
    """The balance table's "before" column: "SMD before" is on the rows kept by the overlap
    rule, so it says "(after trimming)" when trimming set units aside (the baseline table's
    crude column says the same)."""
    before = "SMD before matching" if data.get("matching") else "SMD before"
    return before + trimming_note(data)


def build_context(view, figures: dict, *, compact: bool) -> dict:
    data = view.data
    q = data["question"]
    adj = data["adjusted"]
    alpha = float(data["spec"]["alpha"])
    level = int(round(100 * (1 - alpha)))
    binary = q.get("outcome_type") == "binary"
    entries = [("crude (unadjusted)", data["crude"]), ("adjusted (headline)", adj),
               ("plain stratified difference", adj.get("plain_stratified")),
               ("constant effect by test inversion", adj.get("constant_effect")),
               ("standardized risk ratio", adj.get("standardized_risk_ratio"))]
    for key, est in (adj.get("mantel_haenszel") or {}).items():
        if isinstance(est, dict):
            entries.append((f"Mantel-Haenszel {key.replace('_', ' ')}", est))
    entries += list(rate_effect_blocks(data))  # rate outcomes: per 1,000, crude rate ratio
    effects = estimate_rows(entries, level, binary=binary)
    checks = data["cross_checks"]
    cross = [row | {"kind": r.get("estimand_kind", ""), "se_method": r.get("se_method", "")}
             for row, r in zip(estimate_rows([(r.get("method", ""), r) for r in checks], level,
                                             binary=binary), checks)]
    sens = data["sensitivity"]
    tip = sens["tipping"]
    raw = analysed_raw(view)
    base = baseline_table(view)
    balance_rows = [{**r, "label": balance_label(r)} for r in data["balance"]["rows"]]
    hetero = []
    for key, h in data["heterogeneity"].items():
        if isinstance(h, dict):
            hetero.append({"label": h.get("method", key), "statistic": _f(h.get("statistic"), 3),
                           "df": h.get("df"), "p": h.get("p_value")})
    source = data["source"]
    run = getattr(view, "run", None) or {}
    return {
        "compact": compact, "q": q, "source": source, "data": data, "level": level,
        "alpha": alpha, "flow": data["flow"], "flow_steps": _flow_steps(data),
        "clusters": data.get("clusters"),
        "warnings": data["warnings"], "overlap": data["overlap"],
        "propensity": data["propensity"], "balance": data["balance"],
        "balance_rows": balance_rows, "baseline_header": [c for c in BASELINE_COLUMNS],
        "baseline_header_text": baseline_header(data),
        "baseline_rows": [{k: (None if isinstance(v, float) and not math.isfinite(v) else v)
                           for k, v in row.items()} for row in base.to_dict("records")], "baseline_has_raw": raw is not None,
        "strata_rows": strata_rows(data), "strata_info": data["strata_info"],
        "strata_effect_label": strata_effect_label(data),
        "test": data["test"], "test_rows": _test_rows(data["test"]),
        "effects": effects, "heterogeneity": hetero, "binary": binary,
        "adjusted": adj, "cross": cross, "weights": data.get("cross_check_weights"),
        "sens": sens, "e_value": sens.get("e_value") or {},
        "gamma": sens["gamma_threshold_detail"],
        "gamma_bounds": sens["gamma_bounds"], "tipping": tip,
        "gamma_text": gamma_sentence(sens), "before_label": before_label(data),
        "after_label": "SMD after matching" if data.get("matching") else "SMD after",
        "gamma_significant": (sens["gamma_threshold_detail"] or {}).get("flag") != NOT_SIGNIFICANT
        and sens.get("gamma_threshold") is not None,
        "estimand_text": estimand_text(q), "matching": matching_context(data),
        "benchmarks": benchmark_rows(tip, binary=binary),
        "benchmark_pp": binary and tip.get("measure", "difference") == "difference",
        "negative": data["negative_control"], "verdict": data["verdict"],
        "cautions": data["cautions"], "figures": figures,
        "spec_toml": spec_toml(data), "command": run.get("command") or source.get("command"),
        "seed": data["spec"]["seed"], "run": run,
        "versions": (run.get("versions") or {}), "fmt": _f,
        "count": lambda n: "n/a" if n is None else f"{int(n):,}",  # 1,629 as in the flow
        "num": format_number,  # fixed decimals: the SMD and KS columns (0.000, not 0.000397)
        "terms_text": describe_terms(data, knots=True),
    }
