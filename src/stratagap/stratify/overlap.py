"""Overlap of the score distributions: ranges, common support and trimming.

Units whose scores have no counterpart in the other group cannot be compared with anyone like
them. What to do about them depends on the estimand: setting aside comparison units outside the
exposed group's range leaves the ATT unchanged, while setting aside exposed units (for the ATT)
or any units (for the ATE) changes the population the estimate describes, and the estimand is
relabelled wherever it is reported.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np

from ..errors import EstimandWarning, InputError, OverlapWarning
from .scores import check_score

__all__ = ["OverlapResult", "apply_overlap", "RULES"]

RULES = ("auto", "none", "common", "crump")
#: Crump, Hotz, Imbens & Mitnik (2009) rule-of-thumb bounds.
CRUMP_BOUNDS = (0.1, 0.9)
#: Poor overlap for the ATE: more than this share of a group outside the other's range ...
POOR_OUTSIDE_SHARE = 0.05
#: ... or less than this share of all units inside the common-support region (common practice).
POOR_COMMON_SHARE = 0.5

ATT_TRIMMED_LABEL = "ATT among exposed units with comparable scores"


@dataclass(frozen=True)
class OverlapResult:
    """Which units are kept for the analysis and what population the estimate then describes.

    Attributes
    ----------
    keep : ndarray of bool (n,)
    rule : str
        The rule requested (``auto``, ``none``, ``common``, ``crump``).
    bounds : tuple (lo, hi) or None
        Score interval used to keep units (for ``auto`` with the ATT: the exposed range, applied
        to comparison units only).
    ranges : dict
        ``{"exposed": [min, max], "reference": [min, max]}`` of the scores before trimming.
    set_aside : dict
        Units set aside per group, ``{"exposed": n, "reference": n}``.
    estimand_label : str
        ``"ATE"``, ``"ATT"`` or the relabelled estimand.
    estimand : str
        ``"ate"`` or ``"att"`` as requested.
    outside_other_range : dict
        Units of each group whose score lies outside the other group's range (before trimming).
    common_support : tuple (lo, hi) or None
        ``[max of minima, min of maxima]``.
    common_support_share : float
        Share of all units whose score lies in the common-support region.
    poor_overlap : bool
    description : str
        One sentence on what was done.
    """

    keep: np.ndarray
    rule: str
    bounds: tuple | None
    ranges: dict
    set_aside: dict
    estimand_label: str
    estimand: str = "ate"
    outside_other_range: dict | None = None
    common_support: tuple | None = None
    common_support_share: float = 1.0
    poor_overlap: bool = False
    description: str = ""

    def to_dict(self) -> dict:
        """JSON-ready summary (the per-unit mask is left out)."""
        return {
            "rule": self.rule,
            "bounds": None if self.bounds is None else [float(v) for v in self.bounds],
            "ranges": {k: [float(v) for v in r] for k, r in self.ranges.items()},
            "set_aside": {k: int(v) for k, v in self.set_aside.items()},
            "n_kept": int(np.sum(self.keep)),
            "estimand": self.estimand,
            "estimand_label": self.estimand_label,
            "outside_other_range": {k: int(v) for k, v in (self.outside_other_range or {}).items()},
            "common_support": None if self.common_support is None
            else [float(v) for v in self.common_support],
            "common_support_share": float(self.common_support_share),
            "poor_overlap": bool(self.poor_overlap),
            "description": self.description,
        }


def apply_overlap(score, t, *, estimand, rule="auto") -> OverlapResult:
    """Apply an overlap rule to propensity scores.

    Parameters
    ----------
    score : array_like (n,)
        Propensity scores in [0, 1].
    t : array_like (n,)
        Exposure, 1 = exposed, 0 = reference.
    estimand : {"ate", "att"}
    rule : {"auto", "none", "common", "crump"}, default "auto"
        ``auto``: for the ATT, set aside comparison units outside the exposed range (estimand
        unchanged) and warn about exposed units outside the comparison range (kept); for the
        ATE, keep everyone and warn when overlap is poor. ``none``: keep everyone (warn when
        overlap is poor). ``common``: keep units inside ``[max(min1, min0), min(max1, max0)]``.
        ``crump``: keep units with ``0.1 <= e <= 0.9``.

    Returns
    -------
    OverlapResult

    Raises
    ------
    InputError
        When the groups' score ranges do not overlap at all, or fewer than 2 units of a group
        remain after the rule.

    Notes
    -----
    Overlap is called poor when more than 5 % of either group lies outside the other group's
    score range, or fewer than 50 % of all units lie in the common-support region (common
    practice). Any trimming that removes units the estimand refers to (exposed units for the
    ATT, any unit for the ATE) relabels the estimand and raises :class:`EstimandWarning`.

    References
    ----------
    Dehejia RH, Wahba S (1999). Causal effects in nonexperimental studies: reevaluating the
    evaluation of training programs. JASA 94:1053-1062.
    Crump RK, Hotz VJ, Imbens GW, Mitnik OA (2009). Dealing with limited overlap in estimation
    of average treatment effects. Biometrika 96:187-199.
    """
    score, t = check_score(score, t)
    estimand = str(estimand).lower()
    if estimand not in ("ate", "att"):
        raise InputError(f"`estimand` must be 'ate' or 'att', got {estimand!r}")
    if rule not in RULES:
        raise InputError(f"`trim` must be one of {', '.join(RULES)}, got {rule!r}")
    e1, e0 = score[t == 1], score[t == 0]
    if e1.size < 2 or e0.size < 2:
        raise InputError(f"need at least 2 units of each group, got {e1.size} exposed and "
                         f"{e0.size} reference; check the exposure coding")
    min1, max1, min0, max0 = e1.min(), e1.max(), e0.min(), e0.max()
    ranges = {"exposed": [float(min1), float(max1)], "reference": [float(min0), float(max0)]}
    lo, hi = max(min1, min0), min(max1, max0)
    if lo > hi:
        raise InputError(
            f"no overlap of propensity scores: exposed in [{min1:.4g}, {max1:.4g}], reference in "
            f"[{min0:.4g}, {max0:.4g}]; check the covariates for one that determines exposure "
            "(remove it or rethink the comparison)")
    out1 = int(np.sum((e1 < min0) | (e1 > max0)))
    out0 = int(np.sum((e0 < min1) | (e0 > max1)))
    share_common = float(np.mean((score >= lo) & (score <= hi)))  # common-support share
    poor = (out1 > POOR_OUTSIDE_SHARE * e1.size or out0 > POOR_OUTSIDE_SHARE * e0.size
            or share_common < POOR_COMMON_SHARE)
    label = estimand.upper()
    bounds = None
    exposed = t == 1

    if rule == "auto" and estimand == "att":
        bounds = (float(min1), float(max1))
        keep = exposed | ((score >= min1) & (score <= max1))  # Dehejia & Wahba 1999
        what = ("comparison units outside the exposed score range "
                f"[{min1:.4g}, {max1:.4g}] set aside (the ATT is unchanged)")
        if out1:
            warnings.warn(
                f"{out1} of {e1.size} exposed units have scores outside the comparison range "
                f"[{min0:.4g}, {max0:.4g}]; they are kept, so their comparisons rest on "
                "extrapolation; `trim=common` would set them aside (and relabel the estimand)",
                OverlapWarning, stacklevel=2)
    elif rule in ("auto", "none"):
        keep = np.ones(score.size, dtype=bool)
        what = "no units set aside"
    else:
        bounds = (float(lo), float(hi)) if rule == "common" else CRUMP_BOUNDS
        keep = (score >= bounds[0]) & (score <= bounds[1])  # Crump et al. 2009 for "crump"
        what = f"units with scores outside [{bounds[0]:.4g}, {bounds[1]:.4g}] set aside"

    if poor and (rule == "none" or (rule == "auto" and estimand == "ate")):
        warnings.warn(
            f"poor overlap of propensity scores: {out1} of {e1.size} exposed and {out0} of "
            f"{e0.size} reference units lie outside the other group's range, and "
            f"{share_common:.0%} of units lie in the common support [{lo:.4g}, {hi:.4g}]; "
            "estimates there rest on extrapolation: consider `trim=crump` or `trim=common`",
            OverlapWarning, stacklevel=2)

    n1_kept, n0_kept = int(np.sum(keep & exposed)), int(np.sum(keep & ~exposed))
    set_aside = {"exposed": int(e1.size - n1_kept), "reference": int(e0.size - n0_kept)}
    if n1_kept < 2 or n0_kept < 2:
        raise InputError(
            f"overlap rule `trim={rule}` leaves {n1_kept} exposed and {n0_kept} reference "
            "units; at least 2 of each are needed: check the covariates for one that determines "
            "exposure, or use a different `trim` rule")
    if estimand == "ate" and (set_aside["exposed"] or set_aside["reference"]):
        label = ("ATE in the common-support population" if rule == "common"
                 else "ATE in the overlap population [0.1, 0.9]")
    elif estimand == "att" and set_aside["exposed"]:
        label = ATT_TRIMMED_LABEL
    if label != estimand.upper():
        warnings.warn(
            f"trimming by `trim={rule}` set aside {set_aside['exposed']} exposed and "
            f"{set_aside['reference']} reference units; the estimate now refers to: {label}",
            EstimandWarning, stacklevel=2)
    description = f"rule {rule} for the {estimand.upper()}: {what}; estimand: {label}"
    return OverlapResult(keep=keep, rule=rule, bounds=bounds, ranges=ranges, set_aside=set_aside,
                         estimand_label=label, estimand=estimand,
                         outside_other_range={"exposed": out1, "reference": out0},
                         common_support=(float(lo), float(hi)), common_support_share=share_common,
                         poor_overlap=bool(poor), description=description)
