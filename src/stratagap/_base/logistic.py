"""One maximum-likelihood logistic fit, and Firth's penalized fit for when it does not exist.

Three stages fit a logistic model (the score model, the score refitted for the weighting
cross-checks, the model of an observed outcome for censoring weights). They share
:func:`fit_ml`, which runs statsmodels' GLM (Binomial) and reports what went wrong instead of
deciding what to do about it, because the stages answer differently, on purpose:

- score model: Firth's likelihood (:func:`firth`), then an L2 fit if that fails: the scores are
  needed, and a penalized score still subclassifies;
- weighting cross-checks: no fallback; the estimate is omitted with a warning, because its
  sandwich variance stacks the score equations that were actually solved;
- censoring weights: an L2 fit (statsmodels, alpha 1e-3) with a warning.

References
----------
Albert A, Anderson JA (1984). On the existence of maximum likelihood estimates in logistic
    regression models. Biometrika 71, 1-10.
Firth D (1993). Bias reduction of maximum likelihood estimates. Biometrika 80, 27-38.
Heinze G, Schemper M (2002). A solution to the problem of separation in logistic regression.
    Statistics in Medicine 21, 2409-2419.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field

import numpy as np
from scipy.special import expit

__all__ = ["MLFit", "fit_ml", "firth", "separates"]


@dataclass
class MLFit:
    """What :func:`fit_ml` found.

    ``params``, ``bse`` and ``fitted`` are None when the fit raised. ``problems`` holds one plain
    sentence per difficulty (raised, did not converge, non-finite coefficients, statsmodels'
    separation or convergence warnings); ``other_warnings`` counts any other warning statsmodels
    issued during the fit.
    """

    params: np.ndarray | None
    bse: np.ndarray | None
    fitted: np.ndarray | None
    converged: bool
    problems: list = field(default_factory=list)
    other_warnings: int = 0
    statsmodels_warned: bool = False  # a separation or convergence warning from statsmodels

    @property
    def failed(self) -> bool:
        return self.params is None


def fit_ml(Z: np.ndarray, y: np.ndarray, *, maxiter: int = 100) -> MLFit:
    """Maximum-likelihood logistic regression of ``y`` (0/1) on ``Z`` (intercept included).

    statsmodels' GLM with the Binomial family (IRLS, at most ``maxiter`` iterations, its
    default). Warnings raised during the fit are captured and turned into ``problems``.
    """
    import statsmodels.api as sm
    from statsmodels.tools import sm_exceptions as sme

    problems = []
    params = bse = fitted = None
    converged = False
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            res = sm.GLM(y, Z, family=sm.families.Binomial()).fit(maxiter=maxiter)
        except (sme.PerfectSeparationError, np.linalg.LinAlgError, ValueError) as exc:
            problems.append(f"the maximum-likelihood fit failed ({type(exc).__name__})")
            res = None
        if res is not None:  # inside the block: bse and fitted values are computed lazily
            params = np.asarray(res.params, dtype=float)
            bse = np.asarray(res.bse, dtype=float)
            fitted = np.asarray(res.fittedvalues, dtype=float)
            converged = bool(getattr(res, "converged", True))
            if not converged:
                problems.append("the fit did not converge")
            if not np.all(np.isfinite(params)):
                problems.append("coefficients are not finite")
    other, warned = 0, False
    for w in caught:
        if issubclass(w.category, sme.PerfectSeparationWarning):
            problems.append("statsmodels reported perfect separation")
            warned = True
        elif issubclass(w.category, sme.ConvergenceWarning):
            problems.append("statsmodels reported non-convergence")
            warned = True
        else:
            other += 1
    return MLFit(params=params, bse=bse, fitted=fitted, converged=converged,
                 problems=problems, other_warnings=other, statsmodels_warned=warned)


def firth(Z, y, maxiter=200, tol=1e-8):
    """Firth's penalized logistic regression by modified-score Newton steps with step halving.

    Returns ``(coefficients, converged)``. Maximizes l(b) + 0.5 log det I(b) (Firth 1993, eq. 2);
    the modified score is U*(b) = Z'(y - p + h (1/2 - p)) with h the hat-matrix diagonal (Heinze
    & Schemper 2002, eq. 2).
    """
    def penalized_ll(b):
        eta = Z @ b
        p = expit(eta)
        info = Z.T @ (Z * (p * (1 - p))[:, None])
        sign, logdet = np.linalg.slogdet(info)
        if sign <= 0:
            return -np.inf
        return float(np.sum(y * eta - np.logaddexp(0.0, eta)) + 0.5 * logdet)  # Firth 1993, eq. 2

    b = np.zeros(Z.shape[1])
    current = penalized_ll(b)
    for _ in range(maxiter):
        p = expit(Z @ b)
        w = p * (1 - p)
        info = Z.T @ (Z * w[:, None])
        try:
            info_inv = np.linalg.inv(info)
        except np.linalg.LinAlgError:
            return b, False
        h = w * np.einsum("ij,jk,ik->i", Z, info_inv, Z)  # hat diagonal of W^1/2 Z I^-1 Z' W^1/2
        step = info_inv @ (Z.T @ (y - p + h * (0.5 - p)))  # Heinze & Schemper 2002, eq. 2
        biggest = np.max(np.abs(step))
        if biggest > 5.0:
            step *= 5.0 / biggest
        for _ in range(40):
            trial = penalized_ll(b + step)
            if trial >= current - 1e-12:
                break
            step /= 2.0
        b = b + step
        current = penalized_ll(b)
        if np.max(np.abs(step)) < tol:
            return b, bool(np.isfinite(current))
    return b, False


def separates(Z: np.ndarray, y: np.ndarray) -> bool:
    """Whether the 0/1 outcome ``y`` is (quasi-)completely separated by the columns of ``Z``.

    The maximum-likelihood estimate exists exactly when no direction b has
    (2 y_i - 1) z_i'b >= 0 for every row with at least one strict inequality (Albert & Anderson
    1984, theorems 1-3). A linear program decides it: maximize sum_i (2 y_i - 1) z_i'b subject to
    (2 y_i - 1) z_i'b >= 0 and -1 <= b_j <= 1; a positive optimum is a separating direction.
    Columns are scaled to unit RMS first so the box and the tolerance mean the same for every
    column; the tolerance, 1e-6 per row, sits well above the solver's feasibility tolerance.
    """
    from scipy.optimize import linprog

    Z = np.asarray(Z, dtype=float)
    scale = np.sqrt(np.mean(Z * Z, axis=0))
    Zs = Z / np.where(scale > 0, scale, 1.0)
    A = (2.0 * np.asarray(y, dtype=float) - 1.0)[:, None] * Zs
    res = linprog(-A.sum(axis=0), A_ub=-A, b_ub=np.zeros(len(A)), bounds=[(-1.0, 1.0)] * Z.shape[1],
                  method="highs")
    if res.status != 0:  # the problem is always feasible (b = 0) and bounded: a solver failure
        return True      # then proves nothing either way; keep the cautious answer
    return -res.fun > 1e-6 * len(A)
