"""Outcome-model estimators: standardization (g-formula) and augmented IPW.

Private helpers of :mod:`stratagap.estimation.crosscheck`. Both return the two marginal means
``(mu1, mu0)`` of the estimand's population with their joint covariance.

Outcome model: OLS (continuous) or logistic GLM (binary) with statsmodels, on the design
``D(a, X) = [1, a, X, a * X[:, S]]`` where ``S`` are the covariates allowed to interact with the
exposure. ``S`` = all covariates is the same fit as separate models in each group.

References
----------
Robins JM (1986). A new approach to causal inference in mortality studies with a sustained
    exposure period. Mathematical Modelling 7, 1393-1512 (the g-formula).
Hernán MA, Robins JM (2020). Causal Inference: What If. Chapman & Hall/CRC, ch. 13
    (standardization) and ch. 12 (IP weighting).
Stefanski LA, Boos DD (2002). The calculus of M-estimation. The American Statistician 56, 29-38.
Robins JM, Rotnitzky A, Zhao LP (1994). Estimation of regression coefficients when some
    regressors are not always observed. JASA 89, 846-866 (augmented IPW).
Lunceford JK, Davidian M (2004). Statistics in Medicine 23, 2937-2960 (AIPW for the ATE
    and its influence-function variance).
Hahn J (1998). On the role of the propensity score in efficient semiparametric estimation of
    average treatment effects. Econometrica 66, 315-331 (efficient influence function of the ATT).
Mercatanti A, Li F (2014). Do debit cards increase household spending? Evidence from a
    semiparametric causal analysis of a survey. Annals of Applied Statistics 8, 2485-2508
    (doubly robust ATT estimator; from memory).
"""

from __future__ import annotations

import warnings

import numpy as np
import statsmodels.api as sm
from statsmodels.tools.sm_exceptions import (
    ConvergenceWarning,
    PerfectSeparationError,
    PerfectSeparationWarning,
)

from ..errors import ModelWarning
from ._ipw import full_rank_columns, sandwich


def interaction_columns(interactions, p: int) -> np.ndarray:
    """Resolve ``interactions`` ("all", "none" or a sequence of column indexes of X)."""
    if isinstance(interactions, str):
        return np.arange(p) if interactions == "all" else np.arange(0)
    return np.asarray(sorted(set(int(j) for j in interactions)), dtype=int)


def design(a, X: np.ndarray, S: np.ndarray) -> np.ndarray:
    """``[1, a, X, a * X[:, S]]``; ``a`` is a scalar or an (n,) array of exposures."""
    n = X.shape[0]
    a = np.broadcast_to(np.asarray(a, dtype=float), (n,))
    return np.column_stack([np.ones(n), a, X, a[:, None] * X[:, S]])


class OutcomeModel:
    """A fitted outcome model: coefficients, link and the design recipe."""

    def __init__(self, y, t, X, outcome_type, interactions="all"):
        self.binary = outcome_type == "binary"
        self.S = interaction_columns(interactions, X.shape[1])
        D = design(t, X, self.S)
        self.keep = full_rank_columns(D)
        if self.keep.size < D.shape[1]:
            warnings.warn(
                f"outcome model: {D.shape[1] - self.keep.size} design column(s) (covariates or "
                "exposure interactions) are linearly dependent on the others, e.g. a covariate "
                "constant within one group, and were dropped",
                ModelWarning,
                stacklevel=3,
            )
        D = D[:, self.keep]
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            try:
                if self.binary:
                    res = sm.GLM(y, D, family=sm.families.Binomial()).fit(maxiter=100)
                else:
                    res = sm.OLS(y, D).fit()
            except PerfectSeparationError:
                res = None
        bad = [w for w in caught if issubclass(w.category, (PerfectSeparationWarning, ConvergenceWarning))]
        if res is not None and self.binary:
            f = np.asarray(res.fittedvalues)
            bad = bad or bool(np.any((f < 1e-8) | (f > 1 - 1e-8)))  # quasi-separation
        if res is None or bad:
            warnings.warn(
                "outcome model: the logistic fit separated or did not converge (an outcome "
                "constant within a group or a covariate level); its predictions and standard "
                "errors are unreliable",
                ModelWarning,
                stacklevel=3,
            )
        self.beta = np.asarray(res.params, dtype=float) if res is not None else np.full(D.shape[1], np.nan)
        self.D = D
        self.y = y

    def design(self, a, X):
        return design(a, X, self.S)[:, self.keep]

    def mean(self, D):
        eta = D @ self.beta
        return 1.0 / (1.0 + np.exp(-eta)) if self.binary else eta

    def dmean(self, D):
        """d mean / d eta (canonical links: the variance function)."""
        if self.binary:
            m = self.mean(D)
            return m * (1 - m)
        return np.ones(D.shape[0])

    def equations(self):
        """Score equations ``D_i (y_i - m_i)`` (OLS normal equations or logistic score)."""
        return self.D * (self.y - self.mean(self.D))[:, None]

    def information(self):
        """``-mean d score / d beta'`` = mean of ``v_i D_i D_i'``."""
        return (self.D * self.dmean(self.D)[:, None]).T @ self.D / self.D.shape[0]


def standardize_fit(y, t, X, estimand, outcome_type, interactions="all"):
    """Standardized means ``mu_a = mean over the population of m(a, X_i)``, stacked sandwich.

    The population is everyone (ATE) or the exposed (ATT). Stacking the outcome model's score
    equations with the two averaging equations gives a covariance that accounts for both the
    estimated coefficients and the sampling of the covariates (Stefanski & Boos 2002).
    """
    model = OutcomeModel(y, t, X, outcome_type, interactions)
    s = np.ones(y.size) if estimand == "ate" else t.astype(float)
    D1, D0 = model.design(1.0, X), model.design(0.0, X)
    m1, m0 = model.mean(D1), model.mean(D0)
    mu1 = np.sum(s * m1) / np.sum(s)  # g-formula: Robins 1986; What If §13.3
    mu0 = np.sum(s * m0) / np.sum(s)
    n, q = model.D.shape
    psi = np.column_stack([model.equations(), s * (m1 - mu1), s * (m0 - mu0)])
    A = np.zeros((q + 2, q + 2))
    A[:q, :q] = model.information()
    A[q, :q] = -(s * model.dmean(D1)) @ D1 / n  # d/d beta of the averaging equation
    A[q + 1, :q] = -(s * model.dmean(D0)) @ D0 / n
    A[q, q] = A[q + 1, q + 1] = np.mean(s)
    cov = sandwich(psi, A)[-2:, -2:]
    return {"mu": np.array([mu1, mu0]), "cov": cov, "model": model, "m1": m1, "m0": m0,
            "n_coef": int(q)}


def aipw_fit(y, t, X, e, estimand, outcome_type):
    """Augmented IPW means and their influence-function covariance.

    ATE (Lunceford & Davidian 2004):
    ``mu1 = mean(m1 + t (y - m1) / e)``, ``mu0 = mean(m0 + (1 - t)(y - m0) / (1 - e))``.
    ATT (Hahn 1998; Mercatanti & Li 2014):
    ``tau = [sum t (y - m0) - sum (1 - t) e/(1 - e) (y - m0)] / sum t``, i.e.
    ``mu1 = sum t y / sum t`` and ``mu0 = [sum t m0 + sum (1-t) e/(1-e) (y - m0)] / sum t``.
    The covariance is the empirical covariance of the estimated influence functions / n, with
    the nuisance models treated as fixed (valid when both models are right; otherwise a
    first-order approximation).
    """
    model = OutcomeModel(y, t, X, outcome_type, "all")  # separate models in each group
    m1 = model.mean(model.design(1.0, X))
    m0 = model.mean(model.design(0.0, X))
    n = y.size
    if estimand == "ate":
        a1 = m1 + t * (y - m1) / e  # Lunceford & Davidian 2004
        a0 = m0 + (1 - t) * (y - m0) / (1 - e)
        mu1, mu0 = a1.mean(), a0.mean()
        phi = np.column_stack([a1 - mu1, a0 - mu0])
    else:
        p = t.mean()
        r = e / (1 - e)
        mu1 = np.sum(t * y) / np.sum(t)
        mu0 = (np.sum(t * m0) + np.sum((1 - t) * r * (y - m0))) / np.sum(t)  # Mercatanti & Li 2014
        phi = np.column_stack([
            t * (y - mu1) / p,  # Hahn 1998, efficient influence function of E[Y(1) | T=1]
            (t * (m0 - mu0) + (1 - t) * r * (y - m0)) / p,  # ... and of E[Y(0) | T=1]
        ])
    cov = phi.T @ phi / n**2
    return {"mu": np.array([mu1, mu0]), "cov": cov, "influence": phi}
