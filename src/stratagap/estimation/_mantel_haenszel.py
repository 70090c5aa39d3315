"""Mantel-Haenszel common-effect estimates over 2x2 strata, with their published variances.

Private helper of :mod:`stratagap.estimation.effects`. Per stratum ``k``: ``a`` exposed events, ``b``
exposed non-events, ``c`` reference events, ``d`` reference non-events, ``n1 = a + b``,
``n0 = c + d``, ``N = n1 + n0``. Strata lacking a group contribute nothing to any sum.

References
----------
Mantel, N. & Haenszel, W. (1959). Statistical aspects of the analysis of data from
retrospective studies of disease. Journal of the National Cancer Institute 22, 719-748.
Greenland, S. & Robins, J. M. (1985). Estimation of a common effect parameter from sparse
follow-up data. Biometrics 41, 55-68.
Robins, J., Breslow, N. & Greenland, S. (1986). Estimators of the Mantel-Haenszel variance
consistent in both sparse data and large-strata limiting models. Biometrics 42, 311-323.
Sato, T. (1989). On the variance estimator for the Mantel-Haenszel risk difference.
Biometrics 45, 1323-1324.
"""

from __future__ import annotations

import math
import warnings

import numpy as np
from scipy import stats

from ..errors import InputError, ModelWarning
from ._estimate import Estimate, _check_alpha, _check_labels, _check_yt


def tables(y: np.ndarray, t: np.ndarray, labels: np.ndarray) -> np.ndarray:
    """``(K, 4)`` array of cell counts ``a, b, c, d`` for the strata present (label >= 0)."""
    keep = labels >= 0
    y, t, labels = y[keep], t[keep], labels[keep]
    _, inv = np.unique(labels, return_inverse=True)
    k = inv.max() + 1 if len(inv) else 0
    out = np.zeros((k, 4))
    for cell, (tv, yv) in enumerate(((1, 1), (1, 0), (0, 1), (0, 0))):
        out[:, cell] = np.bincount(inv, weights=((t == tv) & (y == yv)).astype(float), minlength=k)
    return out


def mh_estimates(cells: np.ndarray) -> dict:
    """MH risk difference, log risk ratio and log odds ratio with their variances.

    Returns a dict ``{"rd": (rd, var), "log_rr": (log_rr, var), "log_or": (log_or, var)}``;
    entries are NaN (or +-inf for a log ratio) when a needed sum is zero.
    """
    a, b, c, d = cells.T
    n1, n0 = a + b, c + d
    N = n1 + n0
    N = np.where(N > 0, N, 1.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        # Risk difference: MH weights n1 n0 / N (Greenland & Robins 1985).
        W = n1 * n0 / N
        rd = np.sum(a * n0 / N - c * n1 / N) / W.sum()
        # Sato 1989: variance consistent in sparse and large strata.
        P = (n1 ** 2 * c - n0 ** 2 * a + n1 * n0 * (n0 - n1) / 2.0) / N ** 2
        Q = (a * (n0 - c) + c * (n1 - a)) / (2.0 * N)
        var_rd = (rd * P.sum() + Q.sum()) / W.sum() ** 2

        # Risk ratio and the variance of its log: Greenland & Robins 1985.
        R_rr, S_rr = np.sum(a * n0 / N), np.sum(c * n1 / N)
        log_rr = np.log(R_rr) - np.log(S_rr)
        var_log_rr = np.sum((n1 * n0 * (a + c) - a * c * N) / N ** 2) / (R_rr * S_rr)

        # Odds ratio: Mantel & Haenszel 1959; variance Robins, Breslow & Greenland 1986.
        R, S = a * d / N, b * c / N
        Pn, Qn = (a + d) / N, (b + c) / N
        Rs, Ss = R.sum(), S.sum()
        log_or = np.log(Rs) - np.log(Ss)
        var_log_or = (np.sum(Pn * R) / (2 * Rs ** 2) + np.sum(Pn * S + Qn * R) / (2 * Rs * Ss)
                      + np.sum(Qn * S) / (2 * Ss ** 2))
    return {"rd": (float(rd), float(var_rd)), "log_rr": (float(log_rr), float(var_log_rr)),
            "log_or": (float(log_or), float(var_log_or))}


def mantel_haenszel(y, t, labels, *, alpha=0.05) -> dict:
    """Mantel-Haenszel common risk difference, risk ratio and odds ratio (binary outcomes).

    Returns
    -------
    dict with keys ``risk_difference``, ``risk_ratio``, ``odds_ratio``, each an
    :class:`Estimate`. These are conditional, common-effect measures (they assume one effect
    shared by every stratum); the odds ratio is not collapsible, so it need not match a
    marginal odds ratio. Variances: risk difference Sato (1989); log risk ratio Greenland &
    Robins (1985); log odds ratio Robins, Breslow & Greenland (1986). Ratio CIs are
    ``exp(log estimate +- z se)``; ``se`` is on the log scale for them.

    References
    ----------
    See :mod:`stratagap.estimation._mantel_haenszel`.
    """
    alpha = _check_alpha(alpha)
    y, t = _check_yt(y, t)
    labels = _check_labels(labels, len(y))
    if not np.all(np.isin(y, (0.0, 1.0))):
        raise InputError("Mantel-Haenszel measures need a binary (0/1) outcome; the outcome has "
                         "other values")
    cells = tables(y, t, labels)
    if len(cells) == 0:
        raise InputError("no stratum left (every label is -1); check the strata step")
    res = mh_estimates(cells)
    z = stats.norm.ppf(1 - alpha / 2)
    pop = f"{int(cells.sum())} units in {len(cells)} strata"
    out = {}
    rd, var = res["rd"]
    se = math.sqrt(var) if var >= 0 else math.nan
    z = float(z)
    out["risk_difference"] = Estimate(rd, se, rd - z * se, rd + z * se, "risk difference",
                                      "conditional common effect", pop,
                                      "Mantel-Haenszel risk difference; Sato 1989 variance", alpha)
    for key, name, cite in (("log_rr", "risk_ratio", "Greenland & Robins 1985 variance"),
                            ("log_or", "odds_ratio", "Robins, Breslow & Greenland 1986 variance")):
        lv, var = res[key]
        se = math.sqrt(var) if np.isfinite(var) and var >= 0 else math.nan
        if not np.isfinite(lv):
            warnings.warn(f"Mantel-Haenszel {name.replace('_', ' ')} is not finite (zero cells "
                          "in every stratum)", ModelWarning, stacklevel=2)
        out[name] = Estimate(math.exp(lv) if np.isfinite(lv) else math.nan, se,
                             math.exp(lv - z * se), math.exp(lv + z * se),
                             name.replace("_", " "), "conditional common effect", pop,
                             f"Mantel-Haenszel {name.replace('_', ' ')}; {cite}", alpha, "log")
    return out
