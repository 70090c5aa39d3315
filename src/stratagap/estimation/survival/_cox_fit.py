"""Breslow-ties Cox coefficients by Newton's method, vectorised for the headline's bootstrap.

The headline refits up to 2S + 1 small Cox models in each of B bootstrap resamples; at that
count statsmodels' ``PHReg`` spends most of its time in per-call setup and in Python loops over
the event times. This fit maximises the same partial likelihood (Breslow's handling of ties;
Breslow 1974, Biometrics 30:89-99) with cumulative sums over each stratum's units sorted by
time, and is tested against ``PHReg(..., ties="breslow", strata=...)`` to 1e-8. ``PHReg``
stays the fit of the hazard ratio (one fit per analysis, with its robust covariance).

Partial likelihood with baselines stratified by ``strata``: for each event unit i in stratum s,
``eta_i - log sum_{j in s, t_j >= t_i} exp(eta_j)``; its gradient and Hessian use the risk-set
sums ``S0 = sum r_j``, ``S1 = sum r_j z_j``, ``S2 = sum r_j z_j z_j'`` over the same sets.
"""

from __future__ import annotations

import numpy as np

__all__ = ["cox_newton"]

#: Newton steps before a fit is declared not converged (monotone likelihood, separation).
MAX_STEPS = 40
#: Convergence: the largest coefficient step below this.
STEP_TOL = 1e-9
#: Above this many entries of the (n, p, p) risk-set products the fit goes to ``PHReg``, whose
#: memory grows with n p rather than n p^2 (the vectorised fit is for the bootstrap's many
#: small fits; at a million rows and 20 columns it would hold several GB).
VECTORISED_LIMIT = 20_000_000


def _risk_set_layout(time, strata):
    """Row order (stratum, then time descending) and, per row, the index of its risk set's end.

    In that order the risk set of unit i (same stratum, t_j >= t_i) is the run of rows from the
    stratum's first row to the last row tied with t_i, so a cumulative sum read at that last
    row, minus the sum before the stratum, is the risk-set sum.
    """
    order = np.lexsort((-time, strata))
    ts, ss = time[order], strata[order]
    n = ts.size
    # last row of each (stratum, time) tie run
    new_run = np.r_[True, (ts[1:] != ts[:-1]) | (ss[1:] != ss[:-1])]
    run_id = np.cumsum(new_run) - 1
    run_end = np.r_[np.flatnonzero(new_run)[1:] - 1, n - 1]
    end = run_end[run_id]
    new_stratum = np.r_[True, ss[1:] != ss[:-1]]
    start = np.flatnonzero(new_stratum)[np.cumsum(new_stratum) - 1]
    return order, end, start


def _sums_at(values, end, start):
    """Risk-set sums of ``values`` (rows in layout order) for every row."""
    c = np.cumsum(values, axis=0)
    before = np.where((start > 0).reshape((-1,) + (1,) * (values.ndim - 1)),
                      c[np.maximum(start - 1, 0)], 0.0)
    return c[end] - before


def cox_newton(time, event, Z, strata=None, start=None):
    """Cox coefficients maximising the Breslow partial likelihood, or None.

    None when the design is singular or the iterations do not settle within ``MAX_STEPS``
    (a monotone likelihood, for example a covariate that separates events from the rest).
    """
    time = np.asarray(time, float)
    event = np.asarray(event, float)
    Z = np.asarray(Z, float).reshape(time.size, -1)
    if Z.shape[0] * Z.shape[1] ** 2 > VECTORISED_LIMIT:
        return _phreg(time, event, Z, strata, start)
    strata = np.zeros(time.size, np.int64) if strata is None else np.asarray(strata)
    order, end, first = _risk_set_layout(time, strata)
    Zs, es = Z[order], event[order]
    ev = es > 0
    Ze = Zs[ev]
    outer = Zs[:, :, None] * Zs[:, None, :]
    beta = np.zeros(Z.shape[1]) if start is None else np.asarray(start, float).copy()

    def loglik_parts(b):
        eta = Zs @ b
        shift = eta.max()
        r = np.exp(eta - shift)
        s0 = _sums_at(r, end, first)[ev]
        ll = float(np.sum(es[ev] * (eta[ev] - shift - np.log(s0))))
        return ll, r, s0

    ll, r, s0 = loglik_parts(beta)
    for _ in range(MAX_STEPS):
        s1 = _sums_at(r[:, None] * Zs, end, first)[ev]
        s2 = _sums_at(r[:, None, None] * outer, end, first)[ev]
        d = es[ev]
        mean = s1 / s0[:, None]
        grad = np.sum(d[:, None] * (Ze - mean), axis=0)
        info = np.einsum("k,kij->ij", d / s0, s2) - np.einsum("k,ki,kj->ij", d, mean, mean)
        if not np.all(np.isfinite(info)) or np.linalg.cond(info) > 1e12:
            return None  # collinear columns (or no events): the coefficients are not identified
        step = np.linalg.solve(info, grad)
        # step halving keeps every iterate an ascent (Newton can overshoot far from the maximum)
        for _ in range(30):
            new = beta + step
            new_ll, new_r, new_s0 = loglik_parts(new)
            if np.isfinite(new_ll) and new_ll >= ll - 1e-12 * abs(ll):
                break
            step = step / 2
        else:
            return None
        beta, ll, r, s0 = new, new_ll, new_r, new_s0
        if np.max(np.abs(step)) < STEP_TOL:
            return beta if np.all(np.isfinite(beta)) else None
    return None


def _phreg(time, event, Z, strata, start):
    """The same fit by statsmodels ``PHReg`` (large designs), or None when it fails."""
    import warnings

    from statsmodels.duration.hazard_regression import PHReg

    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            beta = np.asarray(PHReg(time, Z, status=event, strata=strata, ties="breslow")
                              .fit(start_params=start).params)
        except (np.linalg.LinAlgError, ValueError):
            return None
    if not np.all(np.isfinite(beta)) or any("converge" in str(w.message).lower() for w in caught):
        return None
    return beta
