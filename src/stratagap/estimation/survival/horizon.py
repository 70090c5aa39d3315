"""The horizon at which the headline is read, and the censoring check before it.

Default horizon (common practice, no single source): the largest follow-up time at which every
stratum-group still has at least ``MIN_AT_RISK`` units and ``MIN_SHARE_AT_RISK`` of its units
at risk, so that no stratum's Kaplan-Meier tail rests on a handful of people. A stratum-group
with fewer than ``MIN_AT_RISK`` units cannot meet the count; then all of its units must still be
at risk (the horizon is its shortest follow-up), and the reason says so. A horizon given by the
user at which some stratum-group has nobody at risk is refused: its survival there is not
estimable without extrapolation.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass

import numpy as np

from ..._base.jsonable import jsonable
from ...errors import DataWarning, InputError

__all__ = ["Horizon", "choose_horizon", "censoring_difference", "MIN_AT_RISK",
           "MIN_SHARE_AT_RISK", "CENSORING_GAP"]

#: Units a stratum-group must keep at risk at the default horizon (common practice).
MIN_AT_RISK = 10
#: Share of its units a stratum-group must keep at risk at the default horizon (common practice).
MIN_SHARE_AT_RISK = 0.10
#: Estimand-weighted gap in the share censored before the horizon that triggers the warning.
CENSORING_GAP = 0.10


@dataclass(frozen=True)
class Horizon:
    value: float
    chosen_by: str  # "user" or "default rule"
    reason: str
    min_at_risk: int  # fewest units at risk at the horizon over the stratum-groups

    def to_dict(self) -> dict:
        return jsonable({"value": self.value, "chosen_by": self.chosen_by,
                         "reason": self.reason, "min_at_risk": self.min_at_risk})


def _cells(t, codes):
    S = int(codes.max()) + 1
    return [(s, g) for s in range(S) for g in (1, 0) if np.any((codes == s) & (t == g))]


def choose_horizon(time, t, codes, horizon=None) -> Horizon:
    """The horizon given (checked) or the default rule's; see the module docstring."""
    time = np.asarray(time, dtype=float)
    cells = _cells(t, codes)
    group = {1: "exposed", 0: "reference"}
    if horizon is not None:
        h = float(horizon)
        if not math.isfinite(h) or h <= 0:
            raise InputError(f"`horizon` must be a positive finite number, got {horizon!r}")
        for s, g in cells:
            if not np.any(time[(codes == s) & (t == g)] >= h):
                longest = float(time[(codes == s) & (t == g)].max())
                raise InputError(
                    f"`horizon` {h:g} is beyond the follow-up of the {group[g]} group in stratum "
                    f"{s + 1} (longest follow-up {longest:g}): nobody is at risk there; give a "
                    f"horizon of at most {longest:g} or leave it out for the default rule")
        low = min(int(np.sum(time[(codes == s) & (t == g)] >= h)) for s, g in cells)
        return Horizon(value=h, chosen_by="user", reason=f"given by the user ({h:g})",
                       min_at_risk=low)
    limits, small = [], []
    for s, g in cells:
        ts = np.sort(time[(codes == s) & (t == g)])[::-1]
        need = max(MIN_AT_RISK, math.ceil(MIN_SHARE_AT_RISK * ts.size))
        if ts.size < need:
            small.append(f"{group[g]} group of stratum {s + 1} ({ts.size} units)")
            need = ts.size
        limits.append(float(ts[need - 1]))  # at u = ts[need-1], `need` units have time >= u
    h = min(limits)
    low = min(int(np.sum(time[(codes == s) & (t == g)] >= h)) for s, g in cells)
    reason = (f"largest time at which every stratum-group keeps at least {MIN_AT_RISK} units "
              f"and {MIN_SHARE_AT_RISK:.0%} of its units at risk")
    if small:
        reason += ("; " + ", ".join(small) + " had fewer than "
                   f"{MIN_AT_RISK} units, so all of them must be at risk")
    return Horizon(value=h, chosen_by="default rule", reason=reason, min_at_risk=low)


def censoring_difference(time, event, t, codes, weights, horizon) -> dict:
    """Estimand-weighted share censored before the horizon by group, and a warning if they differ.

    Under the sharp null neither event nor censoring time depends on exposure; censoring that
    differs between the groups within strata is then itself a departure the test can detect
    (and a hint of informative censoring). Threshold ``CENSORING_GAP`` (common practice).
    """
    early = (np.asarray(event) == 0) & (np.asarray(time) < horizon)
    share = {}
    for g, name in ((1, "exposed"), (0, "reference")):
        per = np.array([early[(codes == s) & (t == g)].mean() if np.any((codes == s) & (t == g))
                        else 0.0 for s in range(len(weights))])
        share[name] = float(np.sum(weights * per))
    gap = share["exposed"] - share["reference"]
    flagged = abs(gap) >= CENSORING_GAP
    if flagged:
        warnings.warn(
            f"censoring before the horizon differs between the groups within strata (exposed "
            f"{share['exposed']:.1%}, reference {share['reference']:.1%}): the test then also "
            "reflects that difference, and the estimates assume censoring independent of the "
            "outcome given the covariates", DataWarning, stacklevel=2)
    return {"censored_before_horizon": share, "difference": gap, "flagged": bool(flagged),
            "threshold": CENSORING_GAP}
