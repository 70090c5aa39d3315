"""The outcome missing for some rows: counts by group, and inverse-probability-of-censoring weights.

Rows whose outcome is missing are dropped from the analysis; :func:`missing_outcome` counts them
by group and warns when the shares differ, and with ``censoring_weights`` the weights
:func:`observed_weights` (and the exposure score of :func:`exposure_score_all_rows`, fitted on
every row with complete covariates) feed the cross-check row that reweights for it.

References
----------
Hernán MA, Robins JM (2020). Causal Inference: What If. Chapman & Hall/CRC, §12.6.
"""

from __future__ import annotations

import warnings

import numpy as np
from scipy import stats

from .._base.logistic import fit_ml
from ..errors import MissingDataWarning

__all__ = ["missing_outcome", "observed_weights", "exposure_score_all_rows", "GROUP_CODES"]

GROUP_CODES = {"exposed": 1, "reference": 0, "unknown": -1}


def exposure_score_all_rows(X, t) -> np.ndarray | None:
    """P(exposed | X) from a logistic model fitted on every row with complete covariates.

    With censoring weights the exposure model is fitted on all rows whose covariates are known,
    those with a missing outcome included (Hernán & Robins 2020, §12.6, fit it on all 1,629
    NHEFS rows, from memory): the complete cases alone would give the exposure model of the
    uncensored, which is not the population the weights stand for. None when the fit
    separates or fails (the cross-check then uses its own complete-case score and says so).
    """
    fit = fit_ml(np.column_stack([np.ones(len(t)), np.asarray(X, float)]), np.asarray(t, float))
    if fit.failed or fit.problems or not fit.converged:
        return None
    return fit.fitted


def observed_weights(X, t, observed) -> np.ndarray:
    """Inverse-probability-of-censoring weights, 1 / P(outcome observed | X, t).

    A logistic model of ``observed`` on an intercept, ``X`` and ``t`` (statsmodels GLM,
    Binomial). Rows with an unobserved outcome get weight 0. When the model separates, a
    ridge-penalized fit is used instead (with a :class:`MissingDataWarning`).

    References
    ----------
    Hernán MA, Robins JM (2020). Causal Inference: What If, §12.6 (IP weighting for censoring).
    """
    observed = np.asarray(observed, bool)
    w = np.zeros(observed.shape[0])
    if observed.all():
        return w + 1.0
    Z = np.column_stack([np.ones(len(observed)), np.asarray(X, float), np.asarray(t, float)])
    fit = fit_ml(Z, observed.astype(float))
    # Any difficulty at all (a warning of any kind included) sends the fit to the ridge.
    usable = (not fit.failed and not fit.problems and not fit.other_warnings
              and np.min(fit.fitted[observed]) >= 1e-8)
    if usable:
        p = fit.fitted
    else:
        import statsmodels.api as sm

        warnings.warn("censoring-weight model (outcome observed ~ covariates + exposure) separated or did "
                      "not converge; a ridge-penalized fit was used", MissingDataWarning, stacklevel=2)
        ridge = sm.GLM(observed.astype(float), Z, family=sm.families.Binomial()).fit_regularized(
            alpha=1e-3, L1_wt=0.0)
        p = 1.0 / (1.0 + np.exp(-Z @ ridge.params))
    w[observed] = 1.0 / p[observed]  # Hernán & Robins 2020, §12.6: W^C = 1 / Pr[C = 0 | L, A]
    return w


def missing_outcome(group, miss_y):
    """Missing-outcome counts and shares per group; warn when they differ (two-proportion z-test)."""
    out = {}
    for g in ("exposed", "reference"):
        n_g = int(np.sum(group == GROUP_CODES[g]))
        m = int(np.sum(miss_y & (group == GROUP_CODES[g])))
        out[g] = {"n": m, "share": m / n_g if n_g else float("nan")}
    n1, n0 = int(np.sum(group == 1)), int(np.sum(group == 0))
    m1, m0 = out["exposed"]["n"], out["reference"]["n"]
    pooled = (m1 + m0) / (n1 + n0) if n1 + n0 else 0.0
    if n1 == 0 or n0 == 0 or pooled in (0.0, 1.0):
        return out, None
    z = (m1 / n1 - m0 / n0) / np.sqrt(pooled * (1 - pooled) * (1 / n1 + 1 / n0))  # pooled two-proportion z
    p = float(2 * stats.norm.sf(abs(z)))
    if abs(m1 / n1 - m0 / n0) > 0.02 and p < 0.05:
        warnings.warn(f"the outcome is missing for {m1 / n1:.1%} of the exposed and {m0 / n0:.1%} of the "
                      f"reference group (p = {p:.2g}); complete-case analysis may be biased: consider the "
                      "`censoring_weights` option (inverse-probability-of-censoring weights)",
                      MissingDataWarning, stacklevel=3)
    return out, p
