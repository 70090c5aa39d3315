"""How numbers and p-values are written, in one place for every renderer.

Named variants where the outputs differ on purpose:

* :func:`format_p` - a bare p-value ("0.0123", "< 0.0001"): the CLI summary, the report and its
  figures;
* :func:`format_p_relation` - a p-value with its relation sign, for a sentence ("p = 0.012",
  "p < 0.0001"): three decimals from 0.01 up, four below, as the verdict reads;
* :func:`format_number` - fixed decimals (the summary and the verdict);
* :func:`format_value` - fixed decimals with thousands separators, switching to significant
  digits for a non-zero value too small to show that way (the report's single values);
* :func:`format_sig` - a few significant digits, never in scientific notation from 1e-6 up
  ("1,300", "0.00461"): figure labels and legends;
* :func:`column_decimals` / :func:`format_column` - one number of decimals for every value of a
  table column, chosen from the column's largest magnitude (the report's tables);
* :func:`format_pp` / :func:`format_risk` - a risk difference in percentage points ("-0.46 pp")
  and a risk as a percentage ("19.2 %").

Each gives "n/a" for a missing value (None, or a non-finite float where a float can reach it).
"""

from __future__ import annotations

import math

__all__ = ["format_p", "format_p_relation", "format_number", "format_value", "format_sig",
           "column_decimals", "format_column", "format_pp", "format_risk", "is_risk_difference",
           "describe_terms"]

#: Below this a p-value is written "< 0.0001": Monte Carlo and normal p-values carry no more.
P_FLOOR = 1e-4


def _missing(x) -> bool:
    return x is None or (isinstance(x, float) and not math.isfinite(x))


def format_p(p) -> str:
    """``"0.0123"``, ``"< 0.0001"`` or ``"n/a"``."""
    if _missing(p):
        return "n/a"
    return "< 0.0001" if p < P_FLOOR else f"{p:.4f}"


def format_p_relation(p) -> str:
    """``"= 0.123"``, ``"= 0.0012"``, ``"< 0.0001"`` or ``"n/a"``, to follow a "p" in a sentence."""
    if p is None:
        return "n/a"
    return "< 0.0001" if p < P_FLOOR else f"= {p:.4f}" if p < 0.01 else f"= {p:.3f}"


def format_number(x, digits: int = 2) -> str:
    """``x`` with ``digits`` decimals, or ``"n/a"``."""
    if _missing(x):
        return "n/a"
    return f"{x:.{digits}f}"


def format_value(x, digits: int = 2) -> str:
    """``x`` with ``digits`` decimals and thousands separators; significant digits when a
    non-zero value would print as zero; ``"n/a"`` when missing. Large values keep fixed
    decimals ("2,500,000.00"): scientific notation hides the size of a count or an amount."""
    if _missing(x):
        return "n/a"
    if isinstance(x, (int, float)) and abs(x) != 0 and abs(x) < 10 ** -digits:
        return f"{x:.{max(digits, 2)}g}"
    return f"{x:,.{digits}f}"


def _sig_decimals(magnitude: float, sig: int) -> int:
    """Decimals that show ``sig`` significant digits of a value of this magnitude."""
    if not magnitude or not math.isfinite(magnitude):
        return 0
    return max(0, sig - 1 - math.floor(math.log10(magnitude)))


def format_sig(x, sig: int = 3) -> str:
    """``x`` to ``sig`` significant digits in plain notation with thousands separators
    (1300.13 -> "1,300", -0.004614 -> "-0.00461"); below 1e-6 in magnitude, scientific
    notation (the only way to show such a value in a label); ``"n/a"`` when missing."""
    if _missing(x):
        return "n/a"
    x = float(x)
    if x != 0 and abs(x) < 1e-6:
        return f"{x:.{sig}g}"
    rounded = float(f"{x:.{sig}g}")  # round to sig digits first: 1999.6 -> 2000, not 2,000.
    return f"{rounded:,.{_sig_decimals(abs(rounded), sig)}f}"


def column_decimals(values, sig: int = 3, max_decimals: int = 4, min_decimals: int = 0) -> int:
    """One number of decimals for a whole table column.

    Enough for ``sig`` significant digits of the column's largest magnitude, between
    ``min_decimals`` and ``max_decimals``: a column of 1,300 and 25 shows no decimals, one of
    2.5 and -0.43 shows two, so the decimal points line up and no row looks more precise than
    another.
    """
    finite = [abs(float(v)) for v in values if not _missing(v) and isinstance(v, (int, float))]
    largest = max(finite, default=0.0)
    return min(max_decimals, max(min_decimals, _sig_decimals(largest, sig)))


def format_column(values, sig: int = 3, max_decimals: int = 4, min_decimals: int = 0,
                  scale: float = 1.0) -> list[str]:
    """Every value of a column with the decimals of :func:`column_decimals` (values
    multiplied by ``scale`` first, e.g. 100 for percentage points); ``"n/a"`` for missing."""
    scaled = [None if _missing(v) else float(v) * scale for v in values]
    digits = column_decimals(scaled, sig, max_decimals, min_decimals)
    return ["n/a" if v is None else f"{v:,.{digits}f}" for v in scaled]


def format_pp(x, digits: int = 2) -> str:
    """A risk difference (a difference of proportions) in percentage points: ``"-0.46 pp"``."""
    return "n/a" if _missing(x) else f"{100 * x:,.{digits}f} pp"


def format_risk(x, digits: int = 1) -> str:
    """A risk (a proportion) as a percentage: ``"19.2 %"``."""
    return "n/a" if _missing(x) else f"{100 * x:.{digits}f} %"


def is_risk_difference(measure, binary: bool) -> bool:
    """A difference of proportions: the headline's "risk difference", or a cross-check's
    "difference" when the outcome is binary (written in percentage points)."""
    return measure == "risk difference" or (binary and measure == "difference")


def describe_terms(data: dict, *, knots: bool = False) -> str:
    """How the covariates entered the models, in plain words, from a result dict.

    "spline(age, 4 knots), linear(visits); others as indicators" (``knots=True`` adds the
    knot values); "formula: <right-hand side>" when a formula set the terms.
    """
    spec = data.get("spec") or {}
    if spec.get("formula"):
        return f"formula: {spec['formula']}"
    forms = (data.get("covariates") or {}).get("terms") or []
    parts = []
    for f in forms:
        text = f["label"]
        if knots and f.get("knots"):
            text += " at " + ", ".join(format_value(k) for k in f["knots"])
        parts.append(text)
    if not parts:
        return "every covariate binary or categorical: indicators"
    return "; ".join(parts) + "; binary and categorical covariates as indicators"
