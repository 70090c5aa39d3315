"""Exposure scores of a rate outcome: events minus expected, fixed under the sharp null.

For event counts ``y_i`` over person-time ``PT_i`` in score strata ``s``, the test's ``values``
are the residuals ``y_i - mu_i`` of a Poisson model with a log person-time offset, one effect
per stratum and the covariates, and **no exposure term**:

    log E y_i = log PT_i + alpha_s + x_i' beta.

The stratum effects are profiled out in closed form (``exp(alpha_s) = E_s / sum_{i in s} PT_i
exp(x_i' beta)``, E_s the stratum's events), which leaves the conditional (multinomial)
likelihood of beta; Newton steps with step halving maximise it. A stratum with no events has
``mu_i = 0`` and residual 0 (its effect is at minus infinity), so it adds nothing to the test.
With the canonical log link the residuals sum to zero within every stratum, so the stratified
mean-difference statistic of :func:`stratagap.inference.stratified_test` on them is
``sum_s w_s S_s n_s / (n1_s n0_s)`` (the estimand-weighted exposed sum, ``S_s`` the exposed sum
of residuals); the plain exposed sum ``sum_s S_s`` is the Poisson score for an exposure term at
0 (Breslow & Day 1987, ch. 3). The model never sees the exposure, so the values are fixed
under the sharp null of no effect on anyone's count and the within-stratum shuffle is exact
(Rosenbaum 2002).

``statistic="difference"`` uses the stratum effects alone: ``mu_i = PT_i E_s / PT_s``.

References
----------
Breslow, N. E. & Day, N. E. (1987). Statistical Methods in Cancer Research, vol. II: the
design and analysis of cohort studies. IARC, ch. 3 (Poisson score for rates, from memory).
Rosenbaum, P. R. (2002). Covariance adjustment in randomized experiments and observational
studies. Statistical Science 17:286-327.
McCullagh, P. & Nelder, J. A. (1989). Generalized Linear Models, 2nd ed., ch. 6 (log-linear
Poisson models; the stratum effects' score equations make the residuals sum to 0 per stratum).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np

from .._base.layout import stratum_codes
from .._base.linalg import ordered_independent_columns
from ..errors import InputError, ModelWarning

__all__ = ["RateScores", "rate_scores", "fit_stratified_poisson"]

#: Newton iterations before the profile fit is declared not converged.
MAX_ITER = 100
#: Convergence: largest absolute score, relative to the events, below this.
TOL = 1e-10


@dataclass(frozen=True)
class RateScores:
    """Events minus expected per unit, and the fit that produced them.

    ``values``: the residuals (the test's values); ``expected``: ``mu_i``; ``coefficients``:
    beta of the kept covariate columns (``columns`` indexes X); ``converged``, ``iterations``;
    ``form``: "covariates and stratum effects" or "stratum effects only".
    """

    values: np.ndarray
    expected: np.ndarray
    coefficients: np.ndarray
    columns: np.ndarray
    converged: bool
    iterations: int
    form: str


def _check(y, person_time, labels, X):
    y = np.asarray(y, dtype=float).ravel()
    pt = np.asarray(person_time, dtype=float).ravel()
    labels = np.asarray(labels).ravel()
    n = y.size
    if pt.shape != (n,) or labels.shape != (n,):
        raise InputError(f"`person_time` and `labels` must have one value per row ({n}); got "
                         f"{pt.size} and {labels.size}")
    if not (np.all(np.isfinite(y)) and np.all(y >= 0) and np.all(y == np.round(y))):
        raise InputError("`y` must hold event counts (whole numbers >= 0) for a rate outcome")
    if not (np.all(np.isfinite(pt)) and np.all(pt > 0)):
        raise InputError("`person_time` must be positive and finite in every row")
    if np.any(labels < 0):
        raise InputError("`labels` must be strata 0..S-1 of the analysed rows (no -1)")
    X = np.zeros((n, 0)) if X is None else np.asarray(X, dtype=float).reshape(n, -1)
    return y, pt, labels.astype(np.int64), X


def _profile(beta, y, logpt, codes, events, Xk, S):
    """mu, the profile log-likelihood, its gradient and Hessian at ``beta``."""
    eta = logpt + Xk @ beta
    eta = eta - eta.max() if eta.size else eta  # common shift: cancels in the ratio below
    e = np.exp(eta)
    denom = np.bincount(codes, weights=e, minlength=S)
    share = e / np.where(denom > 0, denom, 1.0)[codes]  # unit's share of its stratum's events
    mu = events[codes] * share
    with np.errstate(divide="ignore", invalid="ignore"):
        loglik = float(np.sum(np.where(y > 0, y * np.log(share), 0.0)))  # multinomial, given E_s
    grad = Xk.T @ (y - mu)
    # Hessian of the conditional likelihood: -sum_s [sum mu x x' - (sum mu x)(sum mu x)' / E_s]
    mx = np.stack([np.bincount(codes, weights=mu * Xk[:, j], minlength=S)
                   for j in range(Xk.shape[1])], axis=1) if Xk.shape[1] else np.zeros((S, 0))
    inv_e = np.where(events > 0, 1.0 / np.where(events > 0, events, 1.0), 0.0)
    hess = -(Xk * mu[:, None]).T @ Xk + (mx * inv_e[:, None]).T @ mx
    return mu, loglik, grad, hess


def fit_stratified_poisson(y, person_time, labels, X=None):
    """Poisson model ``log E y = log PT + alpha_s + x' beta`` with the stratum effects profiled.

    Returns ``(mu, beta, columns, converged, iterations)``: fitted means (0 in strata without
    events), coefficients of the kept columns of X (``columns``: those independent of the
    others and of the stratum effects on the rows of strata with events). See the module
    docstring for the method.
    """
    y, pt, labels, X = _check(y, person_time, labels, X)
    ids, codes = stratum_codes(labels)
    S = ids.size
    events = np.bincount(codes, weights=y, minlength=S)
    live = events[codes] > 0
    # rank rule on the rows that inform beta: within-stratum centred columns (stratum effects)
    columns = np.arange(0)
    if X.shape[1] and live.any():
        n_live = np.bincount(codes[live], minlength=S)
        means = np.stack([np.bincount(codes[live], weights=X[live, j], minlength=S)
                          for j in range(X.shape[1])], axis=1) / np.maximum(n_live, 1)[:, None]
        centred = X[live] - means[codes[live]]
        scale = np.linalg.norm(centred, axis=0)
        cand = np.flatnonzero(scale > 1e-12 * max(1.0, float(np.abs(X).max())))
        if cand.size:
            columns = cand[ordered_independent_columns(centred[:, cand])]
    Xk = X[:, columns]
    logpt = np.log(pt)
    beta = np.zeros(columns.size)
    mu, loglik, grad, hess = _profile(beta, y, logpt, codes, events, Xk, S)
    converged, it = columns.size == 0, 0
    scale = max(1.0, float(events.sum()))
    while not converged and it < MAX_ITER:
        it += 1
        try:
            step = np.linalg.solve(-hess, grad)
        except np.linalg.LinAlgError:
            step = np.linalg.lstsq(-hess, grad, rcond=None)[0]
        for _ in range(40):  # step halving keeps the likelihood rising
            new = _profile(beta + step, y, logpt, codes, events, Xk, S)
            if new[1] >= loglik - 1e-12 * abs(loglik):
                break
            step = step / 2.0
        beta = beta + step
        mu, loglik, grad, hess = new
        converged = float(np.max(np.abs(grad))) < TOL * scale
    if not converged:
        warnings.warn("Poisson model of the covariates for the rate test did not converge in "
                      f"{MAX_ITER} Newton steps (a covariate may separate units with and "
                      "without events); its residuals still do not use the exposure, so the "
                      "test stays valid, but it may lose power", ModelWarning, stacklevel=2)
    return mu, beta, columns, converged, it


def rate_scores(y, person_time, labels, X=None, *, statistic="adjusted") -> RateScores:
    """Events minus expected under a Poisson model without exposure (the rate test's values).

    Parameters
    ----------
    y : (n,) event counts (whole numbers >= 0)
    person_time : (n,) positive person-time
    labels : (n,) stratum labels 0..S-1 of the analysed rows
    X : (n, p) covariate matrix without intercept, or None
    statistic : {"adjusted", "difference"}
        "adjusted": covariates and stratum effects; "difference": stratum effects only
        (``mu_i = PT_i E_s / PT_s``).

    Returns
    -------
    RateScores

    References
    ----------
    See :mod:`stratagap.inference.rate_scores`.
    """
    if statistic not in ("adjusted", "difference"):
        raise InputError(f"`statistic` must be 'adjusted' or 'difference' for a rate outcome, "
                         f"got {statistic!r}")
    use_x = None if statistic == "difference" else X
    mu, beta, columns, converged, it = fit_stratified_poisson(y, person_time, labels, use_x)
    y = np.asarray(y, dtype=float).ravel()
    form = ("stratum effects only" if statistic == "difference"
            else "covariates and stratum effects")
    return RateScores(values=y - mu, expected=mu, coefficients=beta, columns=columns,
                      converged=converged, iterations=it, form=form)
