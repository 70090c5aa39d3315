"""The baseline-characteristics table of a manuscript, from the analysed rows.

Per group: mean (SD) for numeric covariates, median (Q1 to Q3) for skewed ones (|sample
skewness| > 1 in the analysed rows pooled, a rule of thumb: common practice), count (%) for 0/1
covariates and for each level of a categorical one; beside them the standardized differences
crude and within strata, taken from the result's balance rows (Austin 2009; after adjustment on the
before-adjustment denominator, Stuart 2010). The group summaries are descriptive; the SMDs are
the result's own.

References
----------
Austin, P. C. (2009). Balance diagnostics for comparing the distribution of baseline
covariates between treatment groups in propensity-score matched samples. Statistics in
Medicine 28:3083-3107.
Stuart, E. A. (2010). Matching methods for causal inference: a review and a look forward.
Statistical Science 25:1-21.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from .._followup_counts import baseline_rows as followup_baseline_rows
from ..rates_text import baseline_rows as rate_baseline_rows
from ._style import view_of

__all__ = ["baseline_table", "baseline_markdown", "baseline_latex", "header", "crude_label",
           "trimming_note",
           "SKEW_RULE", "BASELINE_COLUMNS"]

#: |skewness| above which a numeric covariate is summarized by median (Q1 to Q3) (common practice).
SKEW_RULE = 1.0
BASELINE_COLUMNS = ["characteristic", "level", "summary", "exposed", "reference", "smd_before",
                    "smd_after"]


def analysed_raw(view) -> pd.DataFrame | None:
    """The raw covariate columns of the analysed rows, if the result carries them."""
    raw = view.arrays.get("raw")
    if raw is None:
        return None
    raw = pd.DataFrame(raw)
    used = view.arrays.get("used")
    t_all = view.arrays.get("t_all")
    if used is not None and t_all is not None and len(raw) == len(t_all) != len(used):
        raw = raw.iloc[np.asarray(used)]
    return raw.reset_index(drop=True)


def _num(x, digits):
    return f"{x:,.{digits}f}"


def _digits(values) -> int:
    """Decimals of a numeric covariate's summaries, from the typical size of its non-zero
    values (earnings that are mostly 0 still read "2,200", not "2,199.909")."""
    values = np.abs(np.asarray(values, dtype=float))
    values = values[np.isfinite(values) & (values > 0)]
    scale = float(np.median(values)) if values.size else 0.0
    return 0 if scale >= 1000 else 1 if scale >= 10 else 2 if scale >= 1 else 3


def _smd(rows, covariate, level=None):
    for r in rows:
        if str(r.get("covariate")) == str(covariate) and (
                (level is None and r.get("level") in (None, "")) or
                (level is not None and str(r.get("level")) == str(level))):
            return r.get("smd_before"), r.get("smd_after")
    return None, None


def _is_binary01(s: pd.Series) -> bool:
    vals = set(pd.unique(s.dropna()))
    return len(vals) > 0 and vals <= {0, 1, 0.0, 1.0, True, False}


def baseline_table(result) -> pd.DataFrame:
    """Baseline characteristics of the analysed rows by group, with SMDs before and after.

    Parameters
    ----------
    result : AnalysisResult
        Needs ``result.arrays["raw"]`` (the analysed rows' original covariate columns) for the
        group summaries; without it those cells are empty and only the SMDs are shown.

    Returns
    -------
    pandas.DataFrame
        Columns ``characteristic, level, summary, exposed, reference, smd_before, smd_after``;
        group cells are formatted text ("42.1 (9.8)", "312 (25.0 %)").
    """
    v = view_of(result)
    data = v.data
    rows = data["balance"]["rows"]
    covariates = list(data["covariates"]["covariates"] or
                      dict.fromkeys(str(r.get("covariate")) for r in rows))
    raw = analysed_raw(v)
    t = np.asarray(v.arrays.get("t", []), dtype=int)
    by = data["flow"]["analysed_by_group"]
    n1 = int(t.sum()) if len(t) else by.get("exposed")
    n0 = int(len(t) - t.sum()) if len(t) else by.get("reference")
    out = [{"characteristic": "Number of people", "level": "", "summary": "count",
            "exposed": "" if n1 is None else f"{n1:,}", "reference": "" if n0 is None else f"{n0:,}",
            "smd_before": None, "smd_after": None}]
    out.extend(followup_baseline_rows(data))  # follow-up outcomes: events, person-time
    out.extend(rate_baseline_rows(data))  # rate outcomes: the crude rate
    have = raw is not None and len(raw) == len(t) and len(t) > 0
    for cov in covariates:
        if have and cov in raw.columns:
            out.extend(_covariate_rows(raw[cov], t, cov, rows))
        else:
            matching = [r for r in rows if str(r.get("covariate")) == str(cov)]
            for r in matching:
                out.append({"characteristic": cov, "level": "" if r.get("level") is None
                            else str(r.get("level")), "summary": "", "exposed": "",
                            "reference": "", "smd_before": r.get("smd_before"),
                            "smd_after": r.get("smd_after")})
    return pd.DataFrame(out, columns=BASELINE_COLUMNS)


def _covariate_rows(col: pd.Series, t, cov, rows) -> list[dict]:
    groups = {"exposed": col[t == 1], "reference": col[t == 0]}
    numeric = pd.api.types.is_numeric_dtype(col) and not pd.api.types.is_bool_dtype(col)
    if numeric and _is_binary01(col):
        b, a = _smd(rows, cov)
        cells = {g: _count(s, 1) for g, s in groups.items()}
        return [{"characteristic": cov, "level": "= 1", "summary": "count (%)", **cells,
                 "smd_before": b, "smd_after": a}]
    if numeric:
        values = col.astype(float)
        skew = values.skew()  # adjusted Fisher-Pearson sample skewness (pandas)
        d = _digits(values.to_numpy())
        b, a = _smd(rows, cov)
        if skew is not None and math.isfinite(skew) and abs(skew) > SKEW_RULE:
            cells = {g: f"{_num(s.median(), d)} ({_num(s.quantile(0.25), d)} to "
                        f"{_num(s.quantile(0.75), d)})" for g, s in groups.items()}
            summary = f"median (Q1 to Q3), skewness {skew:.1f}"
        else:
            cells = {g: f"{_num(s.mean(), d)} ({_num(s.std(ddof=1), d)})" for g, s in groups.items()}
            summary = "mean (SD)"
        return [{"characteristic": cov, "level": "", "summary": summary, **cells,
                 "smd_before": b, "smd_after": a}]
    levels = sorted(pd.unique(col.dropna()), key=lambda x: str(x))
    out = [{"characteristic": cov, "level": "", "summary": "count (%)", "exposed": "",
            "reference": "", "smd_before": None, "smd_after": None}]
    for level in levels:
        b, a = _smd(rows, cov, level)
        out.append({"characteristic": cov, "level": str(level), "summary": "count (%)",
                    **{g: _count(s, level) for g, s in groups.items()},
                    "smd_before": b, "smd_after": a})
    return out


def _count(s: pd.Series, level) -> str:
    n = int((s == level).sum())
    total = int(s.notna().sum())
    share = 100.0 * n / total if total else float("nan")
    return f"{n:,} ({share:.1f} %)"


def _smd_text(x) -> str:
    return "" if x is None or (isinstance(x, float) and not math.isfinite(x)) else f"{x:.3f}"


def trimming_note(data: dict) -> str:
    """" (after trimming)" when the overlap rule set units aside, so every "before" figure
    (on the rows the rule kept) says so; "" otherwise."""
    trimmed = (data.get("flow") or {}).get("trimmed_by_group") or {}
    return " (after trimming)" if any(v for v in trimmed.values()) else ""


def crude_label(data: dict) -> str:
    """Header of the crude standardized difference: says so when trimming set units aside,
    and "before matching" for a matched design (every unit offered to the matching)."""
    if data.get("matching"):  # the units offered to the matching, as the caption says
        return "Std. difference, before matching"
    return "Std. difference, crude" + trimming_note(data)


def header(data: dict) -> list[str]:
    """Column headers of the printed table (Markdown, LaTeX and the report)."""
    q = data.get("question") or {}
    return ["Characteristic", "Level", "Shown as", f"Exposed: {q.get('exposed_value', '')}",
            f"Reference: {q.get('reference_value', '')}", crude_label(data),
            "Std. difference, matched sample" if data.get("matching")
            else "Std. difference, within strata"]


def _cells(table: pd.DataFrame) -> list[list[str]]:
    return [[str(r.characteristic), str(r.level), str(r.summary), str(r.exposed),
             str(r.reference), _smd_text(r.smd_before), _smd_text(r.smd_after)]
            for r in table.itertuples(index=False)]


def baseline_markdown(table: pd.DataFrame, data: dict) -> str:
    """A pipe table (GitHub/pandoc Markdown); ``|`` in user text is escaped."""
    def esc(s):
        return s.replace("\\", "\\\\").replace("|", "\\|").replace("\n", " ")
    lines = ["| " + " | ".join(esc(h) for h in header(data)) + " |",
             "|" + "|".join(["---"] * 3 + ["---:"] * 4) + "|"]
    lines += ["| " + " | ".join(esc(c) for c in row) + " |" for row in _cells(table)]
    return "\n".join(lines) + "\n"


_TEX = {"\\": r"\textbackslash{}", "&": r"\&", "%": r"\%", "$": r"\$", "#": r"\#", "_": r"\_",
        "{": r"\{", "}": r"\}", "~": r"\textasciitilde{}", "^": r"\textasciicircum{}",
        "<": r"\textless{}", ">": r"\textgreater{}"}


def tex_escape(text: str) -> str:
    return "".join(_TEX.get(ch, ch) for ch in str(text))


def baseline_latex(table: pd.DataFrame, data: dict) -> str:
    """A ``tabular`` (booktabs rules) ready to paste; LaTeX special characters escaped."""
    lines = [r"% Baseline characteristics of the analysed rows (stratagap); needs \usepackage{booktabs}",
             r"\begin{tabular}{lllllrr}", r"\toprule",
             " & ".join(tex_escape(h) for h in header(data)) + r" \\", r"\midrule"]
    lines += [" & ".join(tex_escape(c) for c in row) + r" \\" for row in _cells(table)]
    lines += [r"\bottomrule", r"\end{tabular}"]
    return "\n".join(lines) + "\n"
