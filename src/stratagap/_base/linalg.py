"""Column rank rules and least squares with the HC2 covariance.

Two rank rules, because the stages need different answers:

- :func:`ordered_independent_columns`: keeps the intercept and the first of any dependent set,
  in the given order (unpivoted QR). Used where the column order means something: intercept and
  exposure first in a regression whose exposure coefficient is the estimate.
- :func:`pivoted_independent_columns`: a maximal independent set chosen by pivoted QR on
  standardized columns, for the score model, where no column is privileged.

References
----------
MacKinnon JG, White H (1985). Some heteroskedasticity-consistent covariance matrix estimators
    with improved finite sample properties. Journal of Econometrics 29, 305-325.
Golub GH, Van Loan CF (2013). Matrix Computations, 4th ed., section 5.4.2 (QR with column
    pivoting).
"""

from __future__ import annotations

import numpy as np
from scipy import linalg

__all__ = ["ordered_independent_columns", "pivoted_independent_columns", "hc2_ols",
           "COLLINEAR_TOL", "LEVERAGE_TOL"]

#: A column whose norm after projecting out the columns before it is below this share of its own
#: norm is treated as a linear combination of them.
COLLINEAR_TOL = 1e-9
#: A leverage within this of 1 makes the HC2 weight 1 / (1 - h) unusable.
LEVERAGE_TOL = 1e-10


def _ordered_diag(Z: np.ndarray) -> np.ndarray:
    """|R_jj| of the unpivoted QR of ``Z``: column j's norm after projecting out columns < j.

    With fewer rows than columns, the columns beyond the number of rows get 0 (dependent).
    """
    r = np.linalg.qr(Z, mode="r")
    diag = np.zeros(Z.shape[1])
    k = min(Z.shape)
    diag[:k] = np.abs(np.diag(r))[:k]
    return diag


def ordered_independent_columns(Z: np.ndarray, tol: float = COLLINEAR_TOL) -> np.ndarray:
    """Indices of the columns of ``Z`` that are not linear combinations of earlier kept ones.

    One dependent column is dropped at a time, the first found, and the QR is redone: in the QR
    of a matrix with a dependent column, that column's direction is rounding noise, and
    projecting the later columns on it could make an independent column look dependent (which
    one would then depend on the order of the rows). Columns before the first dependent one are
    not affected by the columns after it, so the answer is the greedy one.
    """
    keep = np.arange(Z.shape[1])
    norms = np.maximum(np.linalg.norm(Z, axis=0), 1e-300)
    while keep.size:
        dependent = np.flatnonzero(_ordered_diag(Z[:, keep]) <= tol * norms[keep])
        if dependent.size == 0:
            break
        keep = np.delete(keep, dependent[0])
    return keep


def pivoted_independent_columns(Z: np.ndarray) -> np.ndarray:
    """Indices of a maximal set of linearly independent columns (pivoted QR), in order."""
    if Z.shape[1] == 0:
        return np.arange(0)
    _, R, piv = linalg.qr(Z, mode="economic", pivoting=True)
    d = np.abs(np.diag(R))
    tol = max(Z.shape) * np.finfo(float).eps * (d[0] if d.size else 0.0)
    rank = int(np.sum(d > max(tol, 1e-9 * np.sqrt(Z.shape[0]))))
    return np.sort(piv[:rank])


def hc2_ols(D: np.ndarray, y: np.ndarray):
    """OLS of ``y`` on ``D`` with the HC2 covariance, or ``(None, None, reason)`` if not estimable.

    Returns ``(beta, cov, None)`` on success. HC2: ``(D'D)^-1 D' diag(e_i^2 / (1 - h_ii)) D
    (D'D)^-1`` (MacKinnon & White 1985), computed from the thin QR ``D = QR``:
    ``h_ii = ||Q_i||^2`` and ``(D'D)^-1 D' = R^-1 Q'``.
    """
    n, k = D.shape
    if n <= k:
        return None, None, f"{n} units for {k} coefficients"
    Q, R = np.linalg.qr(D)
    norms = np.linalg.norm(D, axis=0)
    diag = np.abs(np.diag(R))
    if np.any(diag <= COLLINEAR_TOL * np.where(norms > 0, norms, 1.0)):
        return None, None, "design rank deficient"
    h = np.einsum("ij,ij->i", Q, Q)  # leverages
    if h.max() >= 1.0 - LEVERAGE_TOL:
        return None, None, f"leverage reaches 1 for {int(np.sum(h >= 1.0 - LEVERAGE_TOL))} unit(s)"
    Rinv = np.linalg.inv(R)  # k x k, upper triangular and well conditioned (scaled columns)
    beta = Rinv @ (Q.T @ y)
    e = y - D @ beta
    u = e * e / (1.0 - h)  # MacKinnon & White 1985: HC2 weights
    meat = (Q * u[:, None]).T @ Q
    cov = Rinv @ meat @ Rinv.T
    return beta, cov, None
