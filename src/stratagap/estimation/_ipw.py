"""Inverse probability weighting with a stacked-equation (M-estimation) standard error.

Private helpers of :mod:`stratagap.estimation.crosscheck`. Everything here works on plain arrays and
returns the two weighted means ``(mu1, mu0)`` with their joint covariance; the public module
turns them into a difference, risk ratio or odds ratio.

The score model is refitted here (logistic, intercept plus ``X``, maximum likelihood with
statsmodels) so that the logistic score equations stacked under the weighted-mean equations are
the equations that were actually solved (Lunceford & Davidian 2004).

References
----------
Lunceford JK, Davidian M (2004). Stratification and weighting via the propensity score in
    estimation of causal treatment effects: a comparative study. Statistics in Medicine 23,
    2937-2960.
Reifeis SA, Hudgens MG (2022). On variance of the treatment effect in the treated when
    estimated by inverse probability weighting. American Journal of Epidemiology 191, 1092-1097.
Stefanski LA, Boos DD (2002). The calculus of M-estimation. The American Statistician 56, 29-38.
Kish L (1965). Survey Sampling. Wiley (effective sample size, section 11.7).
Cole SR, Hernán MA (2008). Constructing inverse probability weights for marginal structural
    models. American Journal of Epidemiology 168, 656-664 (weight truncation at percentiles).
"""

from __future__ import annotations

import warnings

import numpy as np

from .._base.linalg import ordered_independent_columns as full_rank_columns
from .._base.logistic import fit_ml
from ..errors import ModelWarning, SeparationWarning, WeightWarning

#: A single unit carrying more than this share of its group's total weight is flagged
#: (our rule of thumb, in the spirit of Cole & Hernán 2008; the share is always reported).
MAX_SHARE_FLAG = 0.10


def fit_logistic(Z: np.ndarray, t: np.ndarray, what: str) -> tuple[np.ndarray, np.ndarray, bool]:
    """Maximum-likelihood logistic regression of ``t`` on ``Z`` (Z includes the intercept).

    Returns ``(beta, fitted, ok)``; ``ok`` is False when the fit separated or did not converge,
    in which case a :class:`~stratagap.errors.SeparationWarning` has been issued naming ``what``.
    No fallback: the sandwich stacks the score equations that were actually solved.
    """
    fit = fit_ml(Z, t)
    if fit.failed:
        warnings.warn(f"{what}: {fit.problems[0]}; estimates that need it are omitted",
                      SeparationWarning, stacklevel=3)
        return np.full(Z.shape[1], np.nan), np.full(Z.shape[0], np.nan), False
    ok = not fit.statsmodels_warned and fit.converged
    ok = ok and bool(np.all((fit.fitted > 1e-12) & (fit.fitted < 1 - 1e-12)))
    if not ok:
        warnings.warn(
            f"{what}: the logistic fit separated or did not converge (fitted values at 0 or 1); "
            "its standard errors are unreliable",
            SeparationWarning,
            stacklevel=3,
        )
    return fit.params, fit.fitted, ok


def sandwich(psi: np.ndarray, A: np.ndarray) -> np.ndarray:
    """Empirical sandwich ``A^{-1} B A^{-T} / n`` with ``B = psi' psi / n`` (Stefanski & Boos 2002)."""
    n = psi.shape[0]
    B = psi.T @ psi / n  # Stefanski & Boos 2002: B_n
    Ainv = np.linalg.inv(A)
    return Ainv @ B @ Ainv.T / n  # Stefanski & Boos 2002: sandwich


def _weight_parts(e: np.ndarray, t: np.ndarray, estimand: str):
    """Hájek weights and d log w / d e for each group (before truncation)."""
    if estimand == "ate":
        w1 = t / e  # Lunceford & Davidian 2004: exposed weight 1/e
        w0 = (1 - t) / (1 - e)  # reference weight 1/(1-e)
        g1 = -1.0 / e
        g0 = 1.0 / (1 - e)
    else:
        w1 = t.astype(float)  # ATT: the exposed are the target population, weight 1
        w0 = (1 - t) * e / (1 - e)  # Reifeis & Hudgens 2022: odds weight e/(1-e)
        g1 = np.zeros_like(e)
        g0 = 1.0 / (e * (1 - e))
    return w1, w0, g1, g0


def truncate_weights(w: np.ndarray, t: np.ndarray, pct):
    """Clip each group's nonzero weights at that group's ``pct = (lo, hi)`` percentiles.

    Returns ``(w_clipped, clipped_mask, bounds)``; ``bounds`` maps group -> [low, high].
    Percentiles are taken within each group because the two groups' weights live on different
    scales (exposed ATE weights are 1/e, reference ones 1/(1-e)); Cole & Hernán 2008 truncate
    at the 1st and 99th percentiles.
    """
    w = w.copy()
    clipped = np.zeros(w.shape, dtype=bool)
    bounds = {}
    for name, g in (("exposed", 1), ("reference", 0)):
        m = t == g
        lo, hi = np.percentile(w[m], pct)  # Cole & Hernán 2008, truncation at percentiles
        clipped[m] = (w[m] < lo) | (w[m] > hi)
        w[m] = np.clip(w[m], lo, hi)
        bounds[name] = [float(lo), float(hi)]
    return w, clipped, bounds


def ipw_equations(theta, y, t, Z, estimand, clip_limits=None):
    """Stacked estimating functions ``psi_i(theta)``, shape ``(n, q + 2)``.

    ``theta = (beta, mu1, mu0)``: logistic score equations, then the two Hájek mean equations.
    ``clip_limits`` (pair of arrays of per-unit lower/upper weight limits) applies truncation.
    """
    q = Z.shape[1]
    beta, mu1, mu0 = theta[:q], theta[q], theta[q + 1]
    e = 1.0 / (1.0 + np.exp(-(Z @ beta)))
    w1, w0, _, _ = _weight_parts(e, t, estimand)
    if clip_limits is not None:
        w1 = np.where(t == 1, np.clip(w1, *clip_limits), 0.0)
        w0 = np.where(t == 0, np.clip(w0, *clip_limits), 0.0)
    return np.column_stack([
        Z * (t - e)[:, None],  # logistic score equations
        w1 * (y - mu1),  # Hájek mean of the exposed (Lunceford & Davidian 2004)
        w0 * (y - mu0),  # Hájek mean of the reference group
    ])


def ipw_bread(theta, y, t, Z, estimand, clip_limits=None):
    """Analytic ``A = -mean d psi / d theta'`` of :func:`ipw_equations`.

    With ``clip_limits`` a truncated unit's weight sits at its percentile and does not move with
    ``beta`` (the percentiles themselves are treated as fixed numbers).
    """
    n, q = Z.shape
    beta, mu1, mu0 = theta[:q], theta[q], theta[q + 1]
    e = 1.0 / (1.0 + np.exp(-(Z @ beta)))
    w1, w0, g1, g0 = _weight_parts(e, t, estimand)
    if clip_limits is not None:
        lo, hi = clip_limits
        w = w1 + w0
        fixed = (w < lo) | (w > hi)
        g1 = np.where(fixed, 0.0, g1)
        g0 = np.where(fixed, 0.0, g0)
        w1 = np.where(t == 1, np.clip(w1, lo, hi), 0.0)
        w0 = np.where(t == 0, np.clip(w0, lo, hi), 0.0)
    de = e * (1 - e)  # d e / d eta for the logit link
    A = np.zeros((q + 2, q + 2))
    A[:q, :q] = (Z * de[:, None]).T @ Z / n  # logistic information
    dw1 = w1 * g1 * de  # d w1 / d eta (chain rule)
    dw0 = w0 * g0 * de
    A[q, :q] = -((y - mu1) * dw1) @ Z / n
    A[q + 1, :q] = -((y - mu0) * dw0) @ Z / n
    A[q, q] = np.mean(w1)
    A[q + 1, q + 1] = np.mean(w0)
    return A


def kish_ess(w: np.ndarray) -> float:
    """Kish effective sample size ``(sum w)^2 / sum w^2``."""
    return float(np.sum(w) ** 2 / np.sum(w**2))  # Kish 1965


def weight_summary(w: np.ndarray, t: np.ndarray) -> dict:
    """Per-group max weight, max normalized share and Kish ESS of the unit weights ``w``."""
    out = {}
    for name, g in (("exposed", 1), ("reference", 0)):
        wg = w[t == g]
        out[name] = {
            "n": int(wg.size),
            "max_weight": float(np.max(wg)),
            "max_share": float(np.max(wg) / np.sum(wg)),  # largest normalized Hájek weight
            "ess": kish_ess(wg),
        }
    return out


def fit_score(t, X, known_score=None):
    """Refit the logistic score on ``[1, X]``; fall back to ``known_score`` if it separates.

    Returns a dict ``Z, beta, e, ok`` or None when the refit separates and no score was given.
    """
    n = t.size
    Z = np.column_stack([np.ones(n), X])
    keep = full_rank_columns(Z)
    if keep.size < Z.shape[1]:
        warnings.warn(
            f"score model for the cross-checks: {Z.shape[1] - keep.size} design column(s) are "
            "linearly dependent on the others and were dropped",
            ModelWarning,
            stacklevel=3,
        )
    Z = Z[:, keep]
    beta, e, ok = fit_logistic(Z, t.astype(float), "score model for the cross-checks")
    if not ok:
        if known_score is None:
            return None
        e = np.asarray(known_score, dtype=float)
    return {"Z": Z, "beta": beta, "e": e, "ok": ok}


def flag_weights(summary: dict) -> None:
    """Warn when one unit carries more than :data:`MAX_SHARE_FLAG` of its group's weight."""
    flagged = [g for g, s in summary.items() if s["max_share"] > MAX_SHARE_FLAG]
    if flagged:
        worst = max(summary[g]["max_share"] for g in flagged)
        warnings.warn(
            f"IPW cross-check: one unit carries {worst:.0%} of the {' and '.join(flagged)} "
            f"group's weight (flag above {MAX_SHARE_FLAG:.0%}); consider truncate=(1, 99) "
            "or a narrower overlap population",
            WeightWarning,
            stacklevel=3,
        )


def ipw_fit(y, t, score_fit, estimand, truncate=None):
    """Hájek IPW means with the stacked sandwich covariance.

    ``score_fit`` comes from :func:`fit_score`. Returns a dict with ``mu (2,)``, ``cov (2, 2)``,
    ``cov_known_score (2, 2)``, ``score``, ``raw_weights``, ``weights`` (used, possibly
    truncated), ``clipped``, ``bounds`` and ``score_ok``. When the refit failed the score block
    is dropped and the covariance treats the given score as known.
    """
    n = y.size
    Z, beta, e, ok = score_fit["Z"], score_fit["beta"], score_fit["e"], score_fit["ok"]
    w1, w0, _, _ = _weight_parts(e, t, estimand)
    raw = w1 + w0
    w, clipped, bounds = raw, np.zeros(n, dtype=bool), None
    if truncate is not None:
        w, clipped, bounds = truncate_weights(raw, t, truncate)
    mu1 = np.sum(w * t * y) / np.sum(w * t)  # Hájek normalized mean (Lunceford & Davidian 2004)
    mu0 = np.sum(w * (1 - t) * y) / np.sum(w * (1 - t))
    # Score treated as known: the two mean equations alone (reported beside, for comparison).
    psi_mu = np.column_stack([w * t * (y - mu1), w * (1 - t) * (y - mu0)])
    A_mu = np.diag([np.mean(w * t), np.mean(w * (1 - t))])
    cov_known = sandwich(psi_mu, A_mu)
    if not ok:
        cov = cov_known
    else:
        theta = np.concatenate([beta, [mu1, mu0]])
        clip_limits = None
        if truncate is not None:  # each unit's own group limits
            lo = np.where(t == 1, bounds["exposed"][0], bounds["reference"][0])
            hi = np.where(t == 1, bounds["exposed"][1], bounds["reference"][1])
            clip_limits = (lo, hi)
        psi = ipw_equations(theta, y, t, Z, estimand, clip_limits)
        A = ipw_bread(theta, y, t, Z, estimand, clip_limits)
        cov = sandwich(psi, A)[-2:, -2:]
    return {
        "mu": np.array([mu1, mu0]),
        "cov": cov,
        "cov_known_score": cov_known,
        "score": e,
        "raw_weights": raw,
        "weights": w,
        "clipped": clipped,
        "bounds": bounds,
        "score_ok": ok,
    }
