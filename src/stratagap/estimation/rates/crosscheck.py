"""Cross-checks of the rate headline: IP-weighted rates and a Poisson model with offset.

* **IP-weighted rates** (Hájek): ``mu_g = sum_i w_i y_i / sum_i w_i PT_i`` over group ``g``
  with the score weights of :mod:`stratagap.estimation._ipw` (ATE ``1/e``, ``1/(1-e)``; ATT
  ``1``, ``e/(1-e)``), the weighted events per weighted person-time. Standard error from the
  stacked estimating equations ``Z (t - e) = 0``, ``w1 (y - mu1 PT) = 0``,
  ``w0 (y - mu0 PT) = 0`` (Lunceford & Davidian 2004; Stefanski & Boos 2002) with the analytic
  derivative; the SE treating the score as known is given beside it.
* **Poisson model with offset**: ``log E y = log PT + b0 + b1 t + x'b`` (statsmodels GLM,
  HC0 robust covariance, Zou 2004 for robust Poisson SEs). ``exp(b1)`` is the conditional rate
  ratio; the row's estimate is the standardized rate difference: predictions with ``t = 1``
  and ``t = 0`` averaged over the target units weighted by person-time (as the headline),
  delta-method SE from the robust covariance.

Both target the person-time-weighted standardized rates of the headline. Rows are on the
difference scale (measure "difference", events per unit of person-time)
(:mod:`stratagap.estimation.rates.standardized`); rows are rate differences (events per unit of
person-time), with the rate ratio in ``details``.

References
----------
Lunceford, J. K. & Davidian, M. (2004). Statistics in Medicine 23:2937-2960.
Stefanski, L. A. & Boos, D. D. (2002). The calculus of M-estimation. The American
Statistician 56:29-38.
Zou, G. (2004). A modified Poisson regression approach to prospective studies with binary
data. American Journal of Epidemiology 159:702-706.
"""

from __future__ import annotations

import math

import numpy as np
import statsmodels.api as sm
from scipy import stats

from ..._base.linalg import ordered_independent_columns
from .._crosscheck_result import CrossCheckResult, CrossCheckRow
from .._ipw import _weight_parts, sandwich
from ..crosscheck import _diagnostics, _score_or_raise

__all__ = ["ipw_rates", "poisson_offset", "rate_cross_checks"]


def _ratio_details(mu, cov, z):
    """Rate ratio mu1/mu0 with a log-scale delta-method CI (None when a rate is 0)."""
    mu1, mu0 = float(mu[0]), float(mu[1])
    if not (mu1 > 0 and mu0 > 0):
        return {"estimate": None, "ci_low": None, "ci_high": None, "se_log": None}
    g = np.array([1.0 / mu1, -1.0 / mu0])  # d log(mu1 / mu0)
    se = float(np.sqrt(g @ cov @ g))
    lr = math.log(mu1 / mu0)
    return {"estimate": mu1 / mu0, "ci_low": math.exp(lr - z * se),
            "ci_high": math.exp(lr + z * se), "se_log": se}


def _row(method, mu, cov, *, alpha, estimand, label, se_method, notes=(), details=None):
    z = float(stats.norm.isf(alpha / 2))
    est = float(mu[0] - mu[1])
    se = float(np.sqrt(cov[0, 0] + cov[1, 1] - 2 * cov[0, 1]))
    details = dict(details or {})
    details["rate_ratio"] = _ratio_details(mu, cov, z)
    return CrossCheckRow(method=method, estimate=est, se=se, ci_low=est - z * se,
                         ci_high=est + z * se, measure="difference", se_scale="difference",
                         estimand=label, estimand_kind="marginal",
                         population="everyone analysed" if estimand == "ate" else "the exposed",
                         mu1=float(mu[0]), mu0=float(mu[1]), se_method=se_method,
                         notes=tuple(notes), details=details)


def ipw_fit_rates(y, t, pt, sfit, estimand):
    """Hájek IP-weighted rates with the stacked sandwich covariance (see the module docstring)."""
    Z, e, ok = sfit["Z"], sfit["e"], sfit["ok"]
    n, q = Z.shape
    w1, w0, g1, g0 = _weight_parts(e, t, estimand)
    mu1 = np.sum(w1 * y) / np.sum(w1 * pt)  # weighted events / weighted person-time
    mu0 = np.sum(w0 * y) / np.sum(w0 * pt)
    r1, r0 = w1 * (y - mu1 * pt), w0 * (y - mu0 * pt)
    A_mu = np.diag([np.mean(w1 * pt), np.mean(w0 * pt)])
    cov_known = sandwich(np.column_stack([r1, r0]), A_mu)
    cov = cov_known
    if ok:
        de = e * (1 - e)  # d e / d eta (logit link)
        psi = np.column_stack([Z * (t - e)[:, None], r1, r0])
        A = np.zeros((q + 2, q + 2))
        A[:q, :q] = (Z * de[:, None]).T @ Z / n  # logistic information
        A[q, :q] = -((y - mu1 * pt) * w1 * g1 * de) @ Z / n  # d psi_mu1 / d beta (chain rule)
        A[q + 1, :q] = -((y - mu0 * pt) * w0 * g0 * de) @ Z / n
        A[q:, q:] = A_mu
        cov = sandwich(psi, A)[-2:, -2:]
    raw = w1 + w0
    return {"mu": np.array([mu1, mu0]), "cov": cov, "cov_known_score": cov_known,
            "score": e, "raw_weights": raw, "weights": raw, "clipped": np.zeros(n, bool),
            "bounds": None, "score_ok": ok}


def ipw_rates(y, t, pt, X, *, estimand, alpha=0.05, estimand_label=None, score=None):
    """IP-weighted rate difference (row) and the fit (for the weight diagnostics)."""
    sfit = _score_or_raise(t, X, score)
    fit = ipw_fit_rates(y, t, pt, sfit, estimand)
    se_method = ("stacked estimating equations (score estimated)" if fit["score_ok"]
                 else "sandwich treating the given score as known")
    known = float(np.sqrt(fit["cov_known_score"][0, 0] + fit["cov_known_score"][1, 1]
                          - 2 * fit["cov_known_score"][0, 1]))
    row = _row("IP-weighted rates (Hájek)", fit["mu"], fit["cov"], alpha=alpha,
               estimand=estimand, label=estimand_label or estimand.upper(), se_method=se_method,
               details={"se_known_score": known})
    return row, fit


def poisson_offset(y, t, pt, X, *, estimand, alpha=0.05, estimand_label=None):
    """Poisson GLM with offset: standardized rate difference row, conditional RR in details."""
    n = y.size
    D = np.column_stack([np.ones(n), t.astype(float), X])
    keep = ordered_independent_columns(D)
    D = D[:, keep]
    res = sm.GLM(y, D, family=sm.families.Poisson(), offset=np.log(pt)).fit(cov_type="HC0",
                                                                         tol=1e-10)
    beta, cov = res.params, res.cov_params()
    target = t == 1 if estimand == "att" else np.ones(n, bool)
    ptt = pt[target]
    mus, grads = [], []
    for g in (1.0, 0.0):
        Dg = D[target].copy()
        Dg[:, 1] = g
        rate = np.exp(Dg @ beta)
        mus.append(float(np.sum(ptt * rate) / ptt.sum()))  # person-time weighted average
        grads.append((ptt * rate) @ Dg / ptt.sum())
    G = np.stack(grads)
    mu_cov = G @ cov @ G.T
    z = float(stats.norm.isf(alpha / 2))
    b1, se1 = float(beta[1]), float(np.sqrt(cov[1, 1]))
    details = {"conditional_rate_ratio": {
        "estimate": math.exp(b1), "ci_low": math.exp(b1 - z * se1),
        "ci_high": math.exp(b1 + z * se1), "se_log": se1}}
    notes = ["the rate ratio exp(b_exposure) is conditional on the covariates; the row's rate "
             "difference is standardized over the target units (model covariance treated as "
             "the only source of error)"]
    return _row("Poisson model with log person-time offset (standardized)", np.array(mus),
                mu_cov, alpha=alpha, estimand=estimand, label=estimand_label or estimand.upper(),
                se_method="delta method, HC0 robust covariance", notes=notes, details=details)


def rate_cross_checks(y, t, person_time, X, *, estimand, alpha=0.05, score=None,
                      estimand_label=None) -> CrossCheckResult:
    """The rate cross-check table (IP-weighted rates, Poisson model with offset).

    ``score``: the pipeline's propensity score, used (treated as known) only when the
    cross-checks' own logistic refit separates.
    """
    y = np.asarray(y, dtype=float)
    t = np.asarray(t).astype(np.int8)
    pt = np.asarray(person_time, dtype=float)
    X = np.asarray(X, dtype=float).reshape(y.size, -1)
    label = estimand_label or estimand.upper()
    row, fit = ipw_rates(y, t, pt, X, estimand=estimand, alpha=alpha, estimand_label=label,
                         score=score)
    rows = (row, poisson_offset(y, t, pt, X, estimand=estimand, alpha=alpha,
                                estimand_label=label))
    source = ("logistic refit on X (maximum likelihood)" if fit["score_ok"]
              else "given score (refit separated)")
    return CrossCheckResult(rows=rows, weights=_diagnostics(fit, t, estimand, None),
                            estimand=estimand, measure="difference", outcome_type="rate",
                            alpha=alpha, score_source=source)
