"""Tipping-point analysis for a binary unmeasured confounder (Lin, Psaty & Kronmal 1998).

U is binary with prevalence p1 among the exposed and p0 among the reference group, and shifts
the outcome by gamma (a mean difference) or multiplies its risk by gamma (a risk ratio),
conditional on exposure and the measured covariates. The bias-corrected estimate is
est - gamma (p1 - p0) on the difference scale and RR / ((1 + (gamma - 1) p1) / (1 + (gamma - 1) p0))
on the ratio scale; the confidence limits move the same way.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass

import numpy as np

from ..errors import InputError, ModelWarning
from .._base.jsonable import jsonable as _jsonable

__all__ = ["TippingGrid", "tipping_grid", "covariate_benchmarks", "BENCHMARK_CAVEAT"]

BENCHMARK_CAVEAT = (
    "Benchmarks show where an unmeasured confounder as strong as a measured covariate would sit; they "
    "mislead when the unmeasured confounder is correlated with the measured covariates (Cinelli & "
    "Hazlett 2020, JRSS B 82:39-67), and each benchmark's effect is conditional on the other covariates."
)
DEFAULT_GAPS = (0.05, 0.1, 0.15, 0.2, 0.3, 0.4, 0.5, 0.6, 0.8)
_DIFF_MULTIPLES = (0.0, 0.25, 0.5, 1.0, 1.5, 2.0, 3.0, 5.0, 10.0)
_RATIO_EFFECTS = (1.0, 1.25, 1.5, 2.0, 2.5, 3.0, 4.0, 6.0, 10.0)


@dataclass(frozen=True)
class TippingGrid:
    """Bias-corrected estimates over a grid of (prevalence gap, outcome effect) of a binary U.

    Attributes
    ----------
    prevalence_gap, outcome_shift, corrected_estimate, corrected_ci_low, corrected_ci_high : list
        One entry per grid cell (gap varies slowest). `outcome_shift` is the mean shift gamma
        (difference scale) or the risk ratio gamma of U on the outcome (ratio scale).
    tipping_curve : list of dict
        For each gap, {"prevalence_gap", "outcome_shift"}: the outcome effect at which the
        corrected confidence limit closer to the null first reaches the null (None if no
        finite effect does).
    benchmarks : list of dict
        Measured covariates placed on the grid: name, prevalence_gap, outcome_shift, corrected
        estimate and limits, and whether the corrected interval includes the null.
    reference_prevalence : float
        p0 used on the ratio scale (p1 = p0 + gap); p0 = 0 gives the largest bias for a gap.
    """

    measure: str
    estimate: float
    ci_low: float
    ci_high: float
    reference_prevalence: float
    prevalence_gap: list
    outcome_shift: list
    corrected_estimate: list
    corrected_ci_low: list
    corrected_ci_high: list
    tipping_curve: list
    benchmarks: list
    caveat: str
    note: str

    def to_dict(self) -> dict:
        return _jsonable({k: getattr(self, k) for k in self.__dataclass_fields__})


def _correct(values, gap, gamma, measure, p0):
    """Lin, Psaty & Kronmal 1998: corrected value(s) for gap p1 - p0 and outcome effect gamma."""
    if measure == "difference":
        return values - gamma * gap  # Lin et al. 1998, eq. for a normal outcome: bias = gamma (p1 - p0)
    p1 = p0 + gap
    bias = (1.0 + (gamma - 1.0) * p1) / (1.0 + (gamma - 1.0) * p0)  # Lin et al. 1998, ratio-scale bias
    return values / bias


def _tip(measure, estimate, ci_low, ci_high, gap, p0):
    """Outcome effect at which the corrected limit closer to the null reaches the null (closed form)."""
    null = 0.0 if measure == "difference" else 1.0
    if ci_low <= null <= ci_high:
        return 0.0 if measure == "difference" else 1.0
    lim = ci_low if estimate > null else ci_high
    if gap == 0.0:
        return None
    if measure == "difference":
        return lim / gap  # lim - gamma gap = 0
    p1 = p0 + gap
    den = p1 - lim * p0  # (gamma - 1)(p1 - L p0) = L - 1
    if den == 0.0:
        return None
    g = 1.0 + (lim - 1.0) / den
    return g if g > 0.0 and math.isfinite(g) else None


def tipping_grid(estimate, ci_low, ci_high, *, measure, prevalence_gap_grid=None, outcome_effect_grid=None,
                 reference_prevalence=0.0, benchmarks=None) -> TippingGrid:
    """Bias-corrected estimate and interval over a grid of binary unmeasured confounders.

    Parameters
    ----------
    estimate, ci_low, ci_high : float
        The covariate-adjusted estimate and interval (a difference, or a risk ratio).
    measure : {"difference", "rr"}
    prevalence_gap_grid : sequence of float in [-1, 1], optional
        p1 - p0 values; default 0.05 ... 0.8.
    outcome_effect_grid : sequence of float, optional
        Mean shifts (difference; default multiples 0, 0.25, ..., 10 of the estimate, signed like
        it) or risk ratios of U (rr; default 1 ... 10, inverted for a protective estimate).
    reference_prevalence : float, default 0
        p0 on the ratio scale (p1 = p0 + gap). p0 = 0 gives the largest bias for a given gap.
    benchmarks : dict name -> (prevalence_gap, outcome_effect), optional
        From :func:`covariate_benchmarks`.

    Returns
    -------
    TippingGrid

    References
    ----------
    Lin DY, Psaty BM, Kronmal RA (1998). Assessing the sensitivity of regression results to
    unmeasured confounders in observational studies. Biometrics 54:948-963.
    Cinelli C, Hazlett C (2020). Making sense of sensitivity. JRSS B 82:39-67.
    """
    measure = {"mean_difference": "difference", "risk_ratio": "rr"}.get(measure, measure)
    if measure not in ("difference", "rr"):
        raise InputError(f"`measure` must be 'difference' or 'rr', got {measure!r}; pass odds ratios as a "
                         "standardized risk ratio")
    try:
        estimate, ci_low, ci_high, p0 = (float(v) for v in (estimate, ci_low, ci_high, reference_prevalence))
    except (TypeError, ValueError):
        raise InputError("`estimate`, `ci_low`, `ci_high` and `reference_prevalence` must be numbers") from None
    if not all(map(math.isfinite, (estimate, ci_low, ci_high))) or not ci_low <= estimate <= ci_high:
        raise InputError(f"need finite ci_low <= estimate <= ci_high, got {ci_low}, {estimate}, {ci_high}")
    if measure == "rr" and ci_low <= 0:
        raise InputError(f"`ci_low` must be positive for a risk ratio, got {ci_low}; pass the ratio, not its log")
    if not 0.0 <= p0 <= 1.0:
        raise InputError(f"`reference_prevalence` must be in [0, 1], got {p0}")
    null = 0.0 if measure == "difference" else 1.0
    sign = 1.0 if estimate >= null else -1.0
    gaps = np.asarray(DEFAULT_GAPS if prevalence_gap_grid is None else prevalence_gap_grid, dtype=float).ravel()
    if outcome_effect_grid is None:
        if measure == "difference":
            effects = sign * abs(estimate) * np.asarray(_DIFF_MULTIPLES)
        else:
            effects = np.asarray(_RATIO_EFFECTS) ** sign
    else:
        effects = np.asarray(outcome_effect_grid, dtype=float).ravel()
    if gaps.size == 0 or not np.isfinite(gaps).all() or (np.abs(gaps) > 1).any():
        raise InputError("`prevalence_gap_grid` must hold finite values in [-1, 1] (p1 - p0)")
    if measure == "rr" and ((p0 + gaps < 0) | (p0 + gaps > 1)).any():
        raise InputError(f"`prevalence_gap_grid` with reference_prevalence {p0} gives p1 outside [0, 1]")
    if effects.size == 0 or not np.isfinite(effects).all() or (measure == "rr" and (effects <= 0).any()):
        raise InputError("`outcome_effect_grid` must hold finite values (positive risk ratios for 'rr')")

    G, E = np.meshgrid(gaps, effects, indexing="ij")
    G, E = G.ravel(), E.ravel()
    cells = {k: _correct(v, G, E, measure, p0) for k, v in
             (("est", estimate), ("lo", ci_low), ("hi", ci_high))}
    curve = [{"prevalence_gap": float(g), "outcome_shift": _tip(measure, estimate, ci_low, ci_high, float(g), p0)}
             for g in gaps]
    marks = []
    for name, (gap, effect) in (benchmarks or {}).items():
        gap, effect = float(gap), float(effect)
        if measure == "rr" and not 0.0 <= p0 + gap <= 1.0:
            continue
        est, lo, hi = (float(_correct(v, gap, effect, measure, p0)) for v in (estimate, ci_low, ci_high))
        marks.append({"name": str(name), "prevalence_gap": gap, "outcome_shift": effect, "corrected_estimate": est,
                      "corrected_ci_low": lo, "corrected_ci_high": hi, "ci_includes_null": bool(lo <= null <= hi)})
    note = ("difference scale: corrected = estimate - outcome_shift x prevalence_gap" if measure == "difference"
            else f"ratio scale: corrected = RR / ((1 + (g - 1) p1) / (1 + (g - 1) p0)), p0 = {p0:g}, p1 = p0 + gap")
    return TippingGrid(measure=measure, estimate=estimate, ci_low=ci_low, ci_high=ci_high, reference_prevalence=p0,
                       prevalence_gap=G.tolist(), outcome_shift=E.tolist(),
                       corrected_estimate=cells["est"].tolist(), corrected_ci_low=cells["lo"].tolist(),
                       corrected_ci_high=cells["hi"].tolist(), tipping_curve=curve, benchmarks=marks,
                       caveat=BENCHMARK_CAVEAT, note=note)


def covariate_benchmarks(terms, X, y, t, *, measure="difference", top=5) -> dict:
    """Where measured covariates would sit on the tipping grid if U were like them.

    For each balance term with a design column: the prevalence among exposed minus reference
    (continuous terms are dichotomized at the overall median, indicator x > median, and named
    "<term> (above median)"), and its outcome effect in a regression of y on all covariates
    among the reference group, with that term's column replaced by its indicator (least squares
    for a difference; Poisson regression with log link for a risk ratio, Zou 2004). The top
    `top` terms by |gap x effect| (|gap x log effect| for ratios) are kept.

    Parameters
    ----------
    terms : list of BalanceTerm
        The balance terms (``name``, ``kind`` "binary"/"continuous", ``column`` into `X` or None;
        terms without a column, such as a dropped reference level, are skipped).
    X : (n, p) float
        Design matrix without intercept.
    y : (n,) float
    t : (n,) int8
    measure : {"difference", "rr"}, default "difference"
    top : int, default 5

    Returns
    -------
    dict name -> (prevalence_gap, outcome_effect), ready for ``tipping_grid(benchmarks=...)``.

    References
    ----------
    Lin DY, Psaty BM, Kronmal RA (1998). Biometrics 54:948-963.
    Zou G (2004). A modified Poisson regression approach to prospective studies with binary data.
    American Journal of Epidemiology 159:702-706.
    """
    X = np.asarray(X, dtype=float)
    y = np.asarray(y, dtype=float)
    t = np.asarray(t)
    if X.ndim != 2 or X.shape[0] != y.size or t.size != y.size:
        raise InputError(f"`X` must be (n, p) with n = len(y) = len(t) = {y.size}, got X {X.shape}, t {t.shape}")
    if measure not in ("difference", "rr"):
        raise InputError(f"`measure` must be 'difference' or 'rr', got {measure!r}")
    if isinstance(top, bool) or not isinstance(top, (int, np.integer)) or top < 1:
        raise InputError(f"`top` must be a positive integer, got {top!r}")
    ref = t == 0
    if ref.sum() <= X.shape[1] + 1:
        warnings.warn(f"Sensitivity benchmarks skipped: the reference group has {int(ref.sum())} rows, "
                      f"too few to regress the outcome on {X.shape[1]} covariates.", ModelWarning)
        return {}
    out = []
    for term in terms:
        j = term.column
        if j is None or not 0 <= j < X.shape[1]:
            continue
        if term.kind == "binary":
            col, label = X[:, j], str(term.name)
        else:
            col = (X[:, j] > np.median(X[:, j])).astype(float)  # dichotomized at the median (stated in the name)
            label = f"{term.name} (above median)"
        if col.min() == col.max():
            continue
        gap = float(col[t == 1].mean() - col[ref].mean())
        Z = X[ref].copy()
        Z[:, j] = col[ref]
        effect = _outcome_effect(Z, y[ref], j, measure)
        if effect is None:
            continue
        size = abs(gap * (effect if measure == "difference" else math.log(effect)))
        out.append((size, label, gap, effect))
    out.sort(key=lambda r: (-r[0], r[1]))
    return {label: (gap, effect) for _, label, gap, effect in out[:top]}


def _outcome_effect(Z, y, j, measure):
    A = np.column_stack([np.ones(len(y)), Z])
    if measure == "difference":
        coef, *_ = np.linalg.lstsq(A, y, rcond=None)
        return float(coef[j + 1])
    import statsmodels.api as sm

    fit = None
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # convergence chatter of an auxiliary fit
        try:
            fit = sm.GLM(y, A, family=sm.families.Poisson()).fit()
        except Exception:  # noqa: BLE001 - a failed benchmark fit only drops that benchmark
            pass
    if fit is None:
        warnings.warn("a Poisson benchmark fit failed; that covariate is left off the tipping grid", ModelWarning)
        return None
    c = float(fit.params[j + 1])
    return math.exp(c) if math.isfinite(c) else None
