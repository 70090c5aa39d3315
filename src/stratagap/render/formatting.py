"""How numbers and p-values are written, in one place for every renderer.

Named variants where the outputs differ on purpose:

* :func:`format_p` - a bare p-value ("0.0123", "< 0.0001"): the CLI summary, the report and its
  figures;
* :func:`format_p_relation` - a p-value with its relation sign, for a sentence ("p = 0.012",
  "p < 0.0001"): three decimals from 0.01 up, four below, as the verdict reads;
* :func:`format_number` - fixed decimals (the summary and the verdict);
* :func:`format_value` - fixed decimals with thousands separators, switching to significant
  digits for values too small or too large to show that way (the report's tables).

Each gives "n/a" for a missing value (None, or a non-finite float where a float can reach it).
"""

from __future__ import annotations

import math

__all__ = ["format_p", "format_p_relation", "format_number", "format_value", "describe_terms"]

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
    non-zero value would print as zero or is a million or more; ``"n/a"`` when missing."""
    if _missing(x):
        return "n/a"
    if isinstance(x, (int, float)) and abs(x) != 0 and (abs(x) < 10 ** -digits or abs(x) >= 1e6):
        return f"{x:.{max(digits, 2)}g}"
    return f"{x:,.{digits}f}"


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
