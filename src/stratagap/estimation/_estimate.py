"""Result types and shared input checks of the effect estimators (private to effects).

References
----------
Imbens, G. W. & Rubin, D. B. (2015). Causal Inference for Statistics, Social, and Biomedical
Sciences. Cambridge University Press, ch. 10 (matched-pair variance).
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field

import numpy as np

from .._base.checks import check_alpha
from ..errors import InputError
from .._base.layout import layout_for
from .._base.jsonable import jsonable

#: Matched-set rule: every stratum has one unit in a group and at most this many units.
MATCHED_SET_MAX = 10



@dataclass(frozen=True)
class Estimate:
    """One effect estimate with its normal-theory confidence interval.

    ``se`` is on the scale named by ``scale``: ``"identity"`` for differences, ``"log"`` for
    risk and odds ratios (whose CI is ``exp(log estimate +- z se)``).
    """

    estimate: float
    se: float
    ci_low: float
    ci_high: float
    measure: str
    estimand: str
    population: str
    method: str
    alpha: float = 0.05
    scale: str = "identity"

    def to_dict(self) -> dict:
        return jsonable(asdict(self))


@dataclass(frozen=True)
class CrudeEstimate(Estimate):
    """The crude comparison of a binary outcome: an :class:`Estimate` plus each group's risk
    (the share with the event among the exposed and among the reference rows), so a report
    can show the two risks beside their difference or ratio."""

    risk_exposed: float | None = None
    risk_reference: float | None = None


@dataclass(frozen=True)
class StratifiedEstimate(Estimate):
    """The headline: an :class:`Estimate` plus the per-stratum table and the model choices.

    ``per_stratum``: one dict per stratum (stratum, n_exposed, n_reference, estimate, se,
    ci_low, ci_high, model, reason, covariates, interacted, weight, reference_mean; ``interacted``
    lists the columns whose slope differs by group). ``choices``: one line
    per stratum whose model was simplified, plus the variance rule. ``risk_exposed`` and
    ``risk_reference``: the standardized risks ``sum_s w_s (a_s + tau_s)`` and
    ``sum_s w_s a_s`` (binary outcomes; None otherwise). ``variance_method`` says which
    variance was used; ``settings`` records the thresholds; ``ci_for`` says what the interval
    is for (the sample average over the analysed units, see
    :data:`stratagap.estimation.effects.CI_FOR`).
    """

    per_stratum: list = field(default_factory=list)
    choices: list = field(default_factory=list)
    risk_exposed: float | None = None
    risk_reference: float | None = None
    variance_method: str = ""
    settings: dict = field(default_factory=dict)
    #: what the interval is for (the estimand's inference target), in plain words
    ci_for: str = ""


# --------------------------------------------------------------------------- input checks
_check_alpha = check_alpha  # the "interval" variant: (0, 1)


def _check_estimand(estimand) -> str:
    est = str(estimand).lower()
    if est not in ("ate", "att"):
        raise InputError(f"`estimand` must be 'ate' or 'att', got {estimand!r}")
    return est


def _check_yt(y, t):
    y = np.asarray(y, dtype=float).ravel()
    t = np.asarray(t).ravel()
    if y.shape != t.shape:
        raise InputError(f"outcome and exposure have different lengths ({len(y)} vs {len(t)}); "
                         "pass arrays for the same rows")
    if not np.all(np.isfinite(y)):
        raise InputError(f"outcome has {int(np.sum(~np.isfinite(y)))} missing or non-finite "
                         "values; drop or impute those rows first")
    if not np.all(np.isin(t, (0, 1))):
        raise InputError("exposure must be coded 0/1 (1 = exposed); found values "
                         f"{sorted(set(np.unique(t).tolist()) - {0, 1})[:5]}")
    return y, t.astype(np.int8)


def _check_labels(labels, n):
    labels = np.asarray(labels).ravel()
    if labels.shape != (n,):
        raise InputError(f"`labels` has length {labels.size}, expected {n} (one stratum label "
                         "per row)")
    if not np.issubdtype(labels.dtype, np.integer):
        if not np.all(np.isfinite(labels)) or np.any(labels != np.round(labels)):
            raise InputError("`labels` must be integer stratum labels (-1 = set aside)")
        labels = labels.astype(np.int64)
    if np.any(labels < -1):
        raise InputError(f"`labels` must be >= -1 (-1 = set aside); found {int(labels.min())}")
    return labels.astype(np.int64)


def _check_X(X, n):
    X = np.asarray(X, dtype=float)
    if X.ndim == 1:
        X = X[:, None] if X.size == n else X.reshape(n, 0)
    if X.ndim != 2 or X.shape[0] != n:
        raise InputError(f"covariate matrix `X` has shape {X.shape}, expected ({n}, p)")
    if not np.all(np.isfinite(X)):
        raise InputError("covariate matrix `X` has missing or non-finite values; drop or impute "
                         "those rows first")
    return X


def _outcome_kind(y, outcome_type):
    if outcome_type in (None, "auto"):
        return "binary" if np.all(np.isin(y, (0.0, 1.0))) else "continuous"
    if outcome_type not in ("binary", "continuous"):
        raise InputError(f"`outcome_type` must be 'binary' or 'continuous', got {outcome_type!r}")
    if outcome_type == "binary" and not np.all(np.isin(y, (0.0, 1.0))):
        raise InputError("a binary outcome must be coded 0/1; found other values")
    return outcome_type


def _strata(t, labels):
    """Strata present (label >= 0), each with both groups; returns ids, n1, n0."""
    ids = np.unique(labels[labels >= 0])
    if len(ids) == 0:
        raise InputError("no stratum left (every label is -1); check the strata step")
    n1 = np.array([int(np.sum(t[labels == s])) for s in ids])
    n = np.array([int(np.sum(labels == s)) for s in ids])
    n0 = n - n1
    bad = ids[(n1 == 0) | (n0 == 0)]
    if len(bad):
        raise InputError(f"strata {bad.tolist()[:5]} lack one of the groups; label such rows -1 "
                         "(set aside) or merge strata")
    return ids, n1, n0


def _layout(t, labels, estimand, layout=None):
    """The stratum layout (sizes, estimand weights) of the rows with ``labels >= 0``.

    ``layout``: the caller's layout of those rows (checked and used), or None to build it.
    """
    keep = labels >= 0
    return layout_for(layout, labels[keep], t[keep], estimand)


def _matched_sets(n1, n0) -> bool:
    """Every stratum is a pair or matched set: one unit in a group, at most 10 units."""
    return bool(np.all(((n1 == 1) | (n0 == 1)) & (n1 + n0 <= MATCHED_SET_MAX)))


def _between_set_variance(tau, w) -> float:
    """Weighted between-set variance of the within-set differences.

    ``S/(S-1) sum_s w_s^2 (tau_s - tau)^2``; with equal weights ``1/S`` it is
    ``sum_s (tau_s - mean)^2 / (S (S-1))`` (Imbens & Rubin 2015, ch. 10).
    """
    S = len(tau)
    if S < 2:
        return math.nan
    est = np.sum(w * tau)
    return float(S / (S - 1) * np.sum(w ** 2 * (tau - est) ** 2))  # Imbens & Rubin 2015, ch. 10


