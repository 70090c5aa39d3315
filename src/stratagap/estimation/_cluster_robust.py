"""Cluster-robust variances for least-squares contrasts: CR1, CR2 and Bell-McCaffrey df.

Private helper of :mod:`stratagap.estimation.clustered`. For OLS of ``y`` on a full-rank ``D``
with residuals ``e`` and clusters ``g = 1..G``, the sandwich of a contrast ``c' beta`` is

    V = sum_g (c' (D'D)^-1 D_g' A_g e_g)^2,

with ``A_g = I`` and the factor ``G/(G-1) (n-1)/(n-k)`` for CR1 (the small-sample factor
statsmodels' ``cov_type="cluster"`` uses), and ``A_g = (I - H_gg)^(-1/2)`` for CR2 (Bell &
McCaffrey 2002), ``H_gg`` the cluster's block of the hat matrix; the symmetric square root of
the Moore-Penrose inverse when a block has leverage 1 (Pustejovsky & Tipton 2018, sec. 3).
CR2 is unbiased when the errors are independent with equal variance.

Degrees of freedom (Bell & McCaffrey 2002, sec. 3; Pustejovsky & Tipton 2018, eq. 11, working
model ``Phi = I``; from memory): writing ``V = e' B e`` with ``e = M y``, ``M = I - H``, under
the working model ``V / sigma^2`` is a weighted sum of chi-square(1) with weights the
eigenvalues of the ``G x G`` matrix ``Omega_gh = b_g' M b_h``, where ``b_g`` is the vector
``A_g D_g (D'D)^-1 c`` on the rows of cluster g. Satterthwaite: ``df = tr(Omega)^2 /
tr(Omega^2)``. ``Omega_gh = [g = h] |b_g|^2 - (D_g' b_g)' (D'D)^-1 (D_h' b_h)`` needs no n x n
matrix.

Cost: one thin SVD per cluster of its rows of ``Q`` (``n_g x k``), so ``O(n k^2)`` in all; the
dense design is ``n x k`` floats.

References
----------
Bell, R. M. & McCaffrey, D. F. (2002). Bias reduction in standard errors for linear regression
with multi-stage samples. Survey Methodology 28:169-181.
Pustejovsky, J. E. & Tipton, E. (2018). Small-sample methods for cluster-robust variance
estimation and hypothesis testing in fixed effects models. Journal of Business & Economic
Statistics 36:672-683.
Cameron, A. C. & Miller, D. L. (2015). A practitioner's guide to cluster-robust inference.
Journal of Human Resources 50:317-372 (CR1 factor).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["ClusterSandwich", "cluster_sandwich"]

#: An eigenvalue of ``I - H_gg`` below this counts as zero (leverage 1 inside the cluster).
PINV_TOL = 1e-10


@dataclass(frozen=True, eq=False)
class ClusterSandwich:
    """Coefficients, contrasts, their cluster-robust covariance and df.

    ``estimate (q,)`` = ``C' beta``; ``cov (q, q)``; ``df (q,)`` the Bell-McCaffrey degrees
    of freedom of each contrast (CR2; for CR1 ``G - 1``, the usual rule); ``kind`` "CR1" or
    "CR2"; ``n_clusters``.
    """

    beta: np.ndarray
    estimate: np.ndarray
    cov: np.ndarray
    df: np.ndarray
    kind: str
    n_clusters: int


def _codes(groups):
    _, codes = np.unique(np.asarray(groups), return_inverse=True)
    return codes.ravel()


def cluster_sandwich(D, y, groups, C, *, kind="CR2") -> ClusterSandwich:
    """Cluster-robust covariance of the contrasts ``C' beta`` of the OLS fit of ``y`` on ``D``.

    Parameters
    ----------
    D : (n, k) float array of full column rank (include the intercept yourself)
    y : (n,) float array
    groups : (n,) cluster labels (any hashable values)
    C : (k, q) float array, one contrast per column
    kind : {"CR2", "CR1"}

    Returns
    -------
    ClusterSandwich
    """
    D = np.asarray(D, dtype=float)
    y = np.asarray(y, dtype=float)
    C = np.asarray(C, dtype=float).reshape(D.shape[1], -1)
    n, k = D.shape
    codes = _codes(groups)
    G = int(codes.max()) + 1
    Q, R = np.linalg.qr(D)
    Rinv = np.linalg.inv(R)
    beta = Rinv @ (Q.T @ y)
    e = y - D @ beta
    # (D'D)^-1 D_g' = Rinv Q_g': the contrast's row weights are L = Q Rinv' C  (n x q)
    L = Q @ (Rinv.T @ C)
    order = np.argsort(codes, kind="stable")
    bounds = np.searchsorted(codes[order], np.arange(G + 1))
    U = np.empty((G, C.shape[1]))  # per cluster: c' (D'D)^-1 D_g' A_g e_g
    B = np.zeros((n, C.shape[1]))  # b_g = A_g L_g, stacked
    for g in range(G):
        rows = order[bounds[g]:bounds[g + 1]]
        if kind == "CR2":
            B[rows] = _adjust(Q[rows], L[rows])  # A_g L_g (A_g symmetric)
        else:
            B[rows] = L[rows]
        U[g] = B[rows].T @ e[rows]
    cov = U.T @ U
    if kind == "CR1":
        cov = cov * (G / (G - 1)) * ((n - 1) / (n - k))  # Cameron & Miller 2015, sec. VI.B
        df = np.full(C.shape[1], float(G - 1))
    elif kind == "CR2":
        df = np.array([_bell_mccaffrey_df(B[:, j], D, Rinv, codes, G) for j in range(C.shape[1])])
    else:
        raise ValueError(f"kind must be 'CR1' or 'CR2', got {kind!r}")
    return ClusterSandwich(beta=beta, estimate=C.T @ beta, cov=cov, df=df, kind=kind,
                           n_clusters=G)


def _adjust(Qg, Lg):
    """``(I - Q_g Q_g')^(-1/2) L_g`` from the thin SVD of ``Q_g`` (Bell & McCaffrey 2002)."""
    try:
        U, s, _ = np.linalg.svd(Qg, full_matrices=False)
    except np.linalg.LinAlgError:  # LAPACK's divide-and-conquer can fail to converge on finite
        from scipy import linalg   # input; the slower QR-iteration driver does not
        U, s, _ = linalg.svd(Qg, full_matrices=False, lapack_driver="gesvd")
    one_minus = 1.0 - s * s  # eigenvalues of I - H_gg on the span of U (1 elsewhere)
    with np.errstate(divide="ignore"):
        # Moore-Penrose square root: a zero eigenvalue maps to zero (Pustejovsky & Tipton 2018)
        factor = np.where(one_minus > PINV_TOL, 1.0 / np.sqrt(np.maximum(one_minus, PINV_TOL)), 0.0)
    return Lg + U @ ((factor - 1.0)[:, None] * (U.T @ Lg))


def _bell_mccaffrey_df(b, D, Rinv, codes, G):
    """Satterthwaite df of ``sum_g (b_g' e_g)^2`` under the working model ``sigma^2 I``."""
    sq = np.bincount(codes, weights=b * b, minlength=G)  # |b_g|^2
    W = np.stack([np.bincount(codes, weights=D[:, j] * b, minlength=G)
                  for j in range(D.shape[1])])  # (k, G): D_g' b_g
    P = Rinv.T @ W  # so that P' P = W' (D'D)^-1 W
    omega = np.diag(sq) - P.T @ P  # Bell & McCaffrey 2002: Omega_gh = b_g' M b_h
    trace = float(np.trace(omega))
    frob = float(np.sum(omega * omega))
    return trace * trace / frob if frob > 0 else float("nan")
