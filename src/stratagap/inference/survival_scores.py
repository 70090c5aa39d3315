"""Scores of censored follow-up that are fixed under the sharp null, for the stratified test.

Under the sharp null of no effect of exposure on anyone's observed follow-up (neither the event
time nor the censoring time), any score computed from the follow-up and the covariates alone,
without the exposure, is fixed; shuffling the exposure within strata then gives an exact test
(Rosenbaum 2002). Two scores are provided; both are the ``values`` that
:func:`stratagap.inference.stratified_test` and the Gamma bounds take:

* ``"martingale"`` (the default, covariance-adjusted): martingale residuals of a Cox model of
  the covariates alone, baselines stratified by the score strata, no exposure term,
  ``M_i = delta_i - exp(beta' x_i) Lambda_0s(t_i)`` with our own Breslow estimator of the
  stratum's cumulative baseline hazard, *including the jump at t_i* (0 before a stratum's first
  event). With Breslow ties the exposed sum of these residuals is the partial-likelihood score
  for an exposure coefficient at 0 (Therneau & Grambsch 2000, sec. 4.2, 4.6).
* ``"logrank"``: the same residuals with no covariates (Nelson-Aalen within strata), whose
  exposed sum is observed minus expected events of the stratified log-rank test
  (Peto & Peto 1972; Klein & Moeschberger 2003, sec. 7.3 and 7.5).

The residuals sum to zero within each stratum, so the test's default statistic
(``"mean_difference"``, the estimand-weighted ``sum_s w_s S_s n_s / (n1_s n0_s)``) is the
estimand-weighted form of the exposed sums ``S_s``.

References
----------
Rosenbaum, P. R. (2002). Covariance adjustment in randomized experiments and observational
studies. Statistical Science 17:286-327.
Therneau, T. M. & Grambsch, P. M. (2000). Modeling Survival Data: Extending the Cox Model.
Springer, ch. 4.
Peto, R. & Peto, J. (1972). Asymptotically efficient rank invariant test procedures. JRSS A
135:185-207.
Klein, J. P. & Moeschberger, M. L. (2003). Survival Analysis, 2nd ed. Springer, ch. 7.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field

import numpy as np

from .._base.jsonable import jsonable
from .._base.layout import stratum_codes
from ..errors import InputError, ModelWarning

__all__ = ["SurvivalScores", "survival_scores", "breslow_cumulative_hazard", "logrank_moments",
           "SCORE_KINDS"]

SCORE_KINDS = ("martingale", "logrank")


def breslow_cumulative_hazard(time, event, risk, codes, at=None):
    """Breslow cumulative baseline hazard of each stratum, read at each unit's own time.

    ``Lambda_0s(u) = sum over event times v <= u of d_s(v) / sum_{j in s, t_j >= v} risk_j``
    (Breslow 1972; ties by Breslow's rule). ``at``: times to read it at instead of ``time``
    (same length); 0 before a stratum's first event.
    """
    time = np.asarray(time, dtype=float)
    event = np.asarray(event, dtype=float)
    risk = np.asarray(risk, dtype=float)
    at = time if at is None else np.asarray(at, dtype=float)
    out = np.zeros(time.size)
    for s in np.unique(codes):
        idx = np.flatnonzero(codes == s)
        order = np.argsort(time[idx], kind="stable")
        ts, es, rs = time[idx][order], event[idx][order], risk[idx][order]
        uniq, first = np.unique(ts, return_index=True)
        deaths = np.add.reduceat(es, first)
        at_risk = np.cumsum(rs[::-1])[::-1][first]  # sum of risk over t_j >= v
        jumps = np.where(deaths > 0, deaths / at_risk, 0.0)  # Breslow 1972
        cum = np.concatenate([[0.0], np.cumsum(jumps)])
        out[idx] = cum[np.searchsorted(uniq, at[idx], side="right")]  # includes the jump at t_i
    return out


def logrank_moments(time, event, t, labels):
    """Observed minus expected exposed events and the hypergeometric variance, summed over strata.

    Returns ``(o_minus_e, variance)``; ``(O - E)^2 / V`` is the stratified log-rank chi-square
    (Klein & Moeschberger 2003, eq. 7.3.3 and sec. 7.5). ``V`` is the sum over strata and
    distinct event times of ``d n1 n0 (n - d) / (n^2 (n - 1))``.
    """
    time = np.asarray(time, dtype=float)
    event = np.asarray(event, dtype=float)
    t = np.asarray(t, dtype=float)
    _, codes = stratum_codes(np.asarray(labels))
    o_minus_e, var = 0.0, 0.0
    for s in np.unique(codes):
        idx = np.flatnonzero(codes == s)
        order = np.argsort(time[idx], kind="stable")
        ts, es, xs = time[idx][order], event[idx][order], t[idx][order]
        uniq, first = np.unique(ts, return_index=True)
        d = np.add.reduceat(es, first)
        d1 = np.add.reduceat(es * xs, first)
        n = (ts.size - first).astype(float)
        n1 = np.cumsum(xs[::-1])[::-1][first]
        keep = d > 0
        d, d1, n, n1 = d[keep], d1[keep], n[keep], n1[keep]
        o_minus_e += float(np.sum(d1 - d * n1 / n))
        with np.errstate(divide="ignore", invalid="ignore"):
            v = np.where(n > 1, d * (n1 / n) * (1 - n1 / n) * (n - d) / (n - 1), 0.0)
        var += float(np.sum(v))
    return o_minus_e, var


@dataclass(frozen=True)
class SurvivalScores:
    """Scores of the follow-up, fixed under the sharp null (the test's ``values``).

    Attributes
    ----------
    values : ndarray (n,)
        One score per analysed row (sums to 0 within each stratum).
    kind : {"martingale", "logrank"}
    coefficients : dict
        Cox coefficients of the covariates (empty for the log-rank scores).
    converged : bool
    description : str
        Plain text for the report and results.json.
    notes : list of str
    """

    values: np.ndarray = field(repr=False)
    kind: str
    coefficients: dict
    converged: bool
    description: str
    notes: list = field(default_factory=list)

    def to_dict(self) -> dict:
        return jsonable({"kind": self.kind, "coefficients": self.coefficients,
                         "converged": self.converged, "description": self.description,
                         "notes": self.notes})


def _cox_without_exposure(time, event, X, codes):
    """Coefficients of a Cox model of ``X`` with baselines stratified by ``codes`` (Breslow ties)."""
    from statsmodels.duration.hazard_regression import PHReg

    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        fit = PHReg(time, X, status=event, strata=codes, ties="breslow").fit()
    beta = np.asarray(fit.params, dtype=float)
    converged = bool(np.all(np.isfinite(beta))) and not any(
        "converge" in str(w.message).lower() for w in caught)
    return beta, converged


def survival_scores(time, event, labels, X=None, *, kind="martingale", names=None) -> SurvivalScores:
    """Martingale residuals (covariance-adjusted) or log-rank scores within strata.

    Parameters
    ----------
    time : (n,) positive follow-up times
    event : (n,) 0/1 event indicators (1 = event, 0 = censored)
    labels : (n,) stratum labels (all >= 0)
    X : (n, p) covariate matrix without intercept, or None (required for "martingale";
        p = 0 gives the log-rank scores)
    kind : {"martingale", "logrank"}, default "martingale"
    names : covariate names (for the recorded coefficients)

    Returns
    -------
    SurvivalScores

    Notes
    -----
    The exposure is never used. ``M_i = delta_i - exp(beta' x_i) Lambda_0s(t_i)``, Breslow's
    cumulative hazard including its jump at ``t_i``; with ``beta = 0`` these are the log-rank
    scores. A Cox fit that does not converge falls back to the log-rank scores, with a
    :class:`~stratagap.errors.ModelWarning`.
    """
    if kind not in SCORE_KINDS:
        raise InputError(f"`kind` must be one of {SCORE_KINDS}, got {kind!r}")
    time = np.asarray(time, dtype=float)
    event = np.asarray(event, dtype=float)
    if time.shape != event.shape or time.ndim != 1:
        raise InputError("`time` and `event` must be 1-d arrays of the same length")
    if np.any(~np.isfinite(time)) or np.any(time <= 0):
        raise InputError("`time` must be finite and > 0 for every row")
    if not np.all((event == 0) | (event == 1)):
        raise InputError("`event` must be 0 (censored) or 1 (event) for every row")
    _, codes = stratum_codes(np.asarray(labels))
    notes: list[str] = []
    coefficients: dict = {}
    converged = True
    lin = np.zeros(time.size)
    if kind == "martingale" and X is not None and np.asarray(X).shape[1] > 0:
        X = np.asarray(X, dtype=float)
        names = list(names) if names is not None else [f"x{j}" for j in range(X.shape[1])]
        beta, converged = _cox_without_exposure(time, event, X, codes)
        if converged:
            lin = X @ beta
            coefficients = dict(zip(names, beta.tolist()))
        else:
            warnings.warn("the Cox model of the covariates alone did not converge; the test "
                          "uses log-rank scores within strata instead", ModelWarning,
                          stacklevel=2)
            notes.append("Cox model of the covariates did not converge: log-rank scores used")
            kind = "logrank"
    elif kind == "martingale":
        kind = "logrank"
        notes.append("no covariates: the martingale residuals are the log-rank scores")
    risk = np.exp(lin - lin.max()) if lin.size else lin
    # a common factor in the risk cancels between exp(beta'x) and the Breslow denominator
    values = event - risk * breslow_cumulative_hazard(time, event, risk, codes)
    if kind == "martingale":
        description = ("martingale residuals of a Cox model of the covariates alone, baselines "
                       "stratified by the score strata (Breslow, jump at t_i included), no "
                       "exposure term")
    else:
        description = ("log-rank scores within strata (event minus Nelson-Aalen cumulative "
                       "hazard of the stratum)")
    return SurvivalScores(values=values, kind=kind, coefficients=coefficients,
                          converged=converged, description=description, notes=notes)
