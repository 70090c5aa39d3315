"""The headline for follow-up times: the adjusted risk difference at the horizon.

Within each stratum of the score, the risk ``1 - S(H)`` of each group is estimated for the
stratum's target units (ATE: all its units; ATT: its exposed units) and the group difference is
combined over strata with the estimand weights, as the headline of the other outcome types is.
A plain stratified Kaplan-Meier would carry the confounding left inside each stratum of the
score (Lunceford & Davidian 2004), so within a stratum-group that has the events for it, a Cox
model of the covariates (Breslow baseline) predicts ``S(H | x)`` for every target unit, and the
predictions are averaged (standardization; Hernan & Robins, What If, ch. 17; Austin 2014).

Rule (common practice, no single source: about ten events per parameter, Peduzzi et al. 1995):
a stratum-group gets its Cox model when it has at least ``EVENTS_PER_COLUMN`` events per
covariate column (constant columns in it dropped) and the fit converges; otherwise the
stratum's Cox model of exposure and the covariates (shared covariate effects and baseline,
exposure as one term) when the stratum has that many events per column; otherwise one Cox
model of exposure and the covariates over all strata, each stratum with its own Breslow
baseline, when the whole sample has them (small strata borrow the covariate effects of the
others rather than falling back to a Kaplan-Meier that keeps the confounding inside the
stratum); otherwise the stratum-group's Kaplan-Meier ``S(H)``. The model used is recorded per
stratum.

Confidence interval: a bootstrap within stratum-groups (group sizes per stratum fixed, so the
estimand weights are fixed), the whole within-stratum procedure repeated; ``B`` resamples from
the named stream ``"survival-bootstrap"`` of the run's seed, in blocks of 250 with one child
stream each (results do not depend on the batch size); interval ``estimate +- z SE_boot``. The
risk ratio at the horizon ``R_1 / R_0`` gets its interval from the SE of the bootstrap log ratios.

References
----------
Lunceford, J. K. & Davidian, M. (2004). Stratification and weighting via the propensity score
in estimation of causal treatment effects. Statistics in Medicine 23:2937-2960.
Austin, P. C. (2014). The use of propensity score methods with survival or time-to-event
outcomes. Statistics in Medicine 33:1242-1258.
Peduzzi, P. et al. (1995). Importance of events per independent variable in proportional
hazards regression analysis. J Clin Epidemiol 48:1503-1510.
Breslow, N. E. (1972). Discussion of Cox (1972). JRSS B 34:216-217.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import stats

from ..._base.jsonable import jsonable
from ..._base.rng import BLOCK
from ._curves import kaplan_meier
from ._cox_fit import cox_newton

__all__ = ["RiskDifference", "adjusted_risk_difference", "EVENTS_PER_COLUMN",
           "DEFAULT_BOOTSTRAP", "bootstrap_generators"]

#: Events per covariate column a stratum-group needs for its own Cox model (Peduzzi 1995).
EVENTS_PER_COLUMN = 10
#: Bootstrap resamples of the headline's interval.
DEFAULT_BOOTSTRAP = 200


def bootstrap_generators(seed: int, label: str, n_resamples: int):
    """One generator per block of ``BLOCK`` resamples of the named stream ``label``."""
    root = np.random.SeedSequence([int(seed), *[ord(c) for c in label]])
    return [np.random.default_rng(c) for c in root.spawn(-(-n_resamples // BLOCK))]


def _breslow_at(time, event, risk, horizon):
    """Breslow's cumulative baseline hazard at ``horizon`` (Breslow 1972).

    With tied times the denominator is the risk set at the first of the ties.
    """
    order = np.argsort(time, kind="stable")
    ts, es, rs = time[order], event[order], risk[order]
    at_risk = np.cumsum(rs[::-1])[::-1]
    uniq, first = np.unique(ts, return_index=True)
    d = np.add.reduceat(es, first)
    return float(np.sum(np.where((d > 0) & (uniq <= horizon), d / at_risk[first], 0.0)))


def _survival_cox(time, event, X, target, horizon, start=None):
    """Mean predicted S(H | x) over ``target`` rows and the coefficients, or None.

    ``start``: Newton's starting values (the full-sample fit, in the bootstrap; the maximum
    does not depend on them).
    """
    beta = cox_newton(time, event, X, start=start)  # equals PHReg's Breslow fit
    if beta is None:
        return None
    lin = X @ beta
    shift = lin.max()
    cum0 = _breslow_at(time, event, np.exp(lin - shift), horizon)
    return float(np.mean(np.exp(-cum0 * np.exp(target @ beta - shift)))), beta


def _varying(X):
    return np.flatnonzero(np.ptp(X, axis=0) > 0) if X.shape[0] else np.zeros(0, int)


def _pooled_survival(time, event, t, X, in_s, target, g, horizon, cache, betas, starts, s):
    """Mean S(H | x, a = g) from the stratum's Cox model of exposure and covariates, or None.

    The fallback of a stratum-group without the events for its own model: both groups of the
    stratum share the covariate effects and the baseline, exposure enters as one term. Fitted
    when the stratum has ``EVENTS_PER_COLUMN`` events per column (covariates + exposure).
    """
    if "fit" not in cache:
        cache["fit"] = None
        rows = np.flatnonzero(in_s)
        Z = np.column_stack([t[rows].astype(float), X[rows]])
        cols = _varying(Z)
        cache["cols"] = cols
        if cols.size > 1 and cols[0] == 0 and event[rows].sum() >= EVENTS_PER_COLUMN * cols.size:
            start = None if starts is None else starts.get((s, "pooled"))
            start = start if start is not None and start.size == cols.size else None
            cache["fit"] = (rows, Z[:, cols], start)
    if cache["fit"] is None:
        return None
    rows, Z, start = cache["fit"]
    aim = np.column_stack([np.full(target.shape[0], float(g)), target])[:, cache["cols"]]
    fitted = _survival_cox(time[rows], event[rows], Z, aim, horizon, start)
    if fitted is None:
        return None
    betas[(s, "pooled")] = fitted[1]
    return fitted[0]


def _joint_model(time, event, t, X, codes, S, horizon, starts):
    """The Cox model of exposure and the covariates over all strata, baselines by stratum.

    The last model before Kaplan-Meier: covariate effects and the exposure term shared by the
    strata, each stratum with its own Breslow baseline (so the score strata still carry the
    confounding between them). Fitted when the whole sample has ``EVENTS_PER_COLUMN`` events
    per column. Returns ``(beta, cols, cum0, shift)`` with ``cum0`` the (S,) baselines at H
    (on the scale of ``exp(lin - shift)``), or None.
    """
    Z = np.column_stack([t.astype(float), X])
    cols = _varying(Z)
    # without a covariate there is nothing to adjust within a stratum: Kaplan-Meier is the answer
    if cols.size < 2 or cols[0] != 0 or event.sum() < EVENTS_PER_COLUMN * cols.size:
        return None
    start = None if starts is None else starts.get("joint")
    start = start if start is not None and start.size == cols.size else None
    beta = cox_newton(time, event, Z[:, cols], strata=codes, start=start)
    if beta is None:
        return None
    lin = Z[:, cols] @ beta
    shift = lin.max()
    risk = np.exp(lin - shift)
    cum0 = np.array([_breslow_at(time[codes == s], event[codes == s], risk[codes == s], horizon)
                     for s in range(S)])
    return beta, cols, cum0, shift


def _stratum_risks(time, event, t, X, codes, S, estimand, horizon, cells, starts=None):
    """(S, 2) survival at H (exposed, reference), the model used and the Cox coefficients."""
    surv = np.full((S, 2), np.nan)
    models = [["", ""] for _ in range(S)]
    betas = {}
    joint = {}  # the model over all strata, fitted when first needed
    for s in range(S):
        in_s = codes == s
        target = X[in_s] if estimand == "ate" else X[in_s & (t == 1)]
        pooled = {}  # the stratum's Cox model with an exposure term, fitted when first needed
        for j, g in enumerate((1, 0)):
            rows = cells[s][j]
            tt, ee = time[rows], event[rows]
            cols = _varying(X[rows])
            value = None
            if cols.size and ee.sum() >= EVENTS_PER_COLUMN * cols.size:
                start = None if starts is None else starts.get((s, j))
                start = start if start is not None and start.size == cols.size else None
                fitted = _survival_cox(tt, ee, X[rows][:, cols], target[:, cols], horizon,
                                       start)
                if fitted is not None:
                    value, betas[(s, j)] = fitted
                    models[s][j] = "cox"
            if value is None:
                value = _pooled_survival(time, event, t, X, in_s, target, g, horizon, pooled,
                                         betas, starts, s)
                models[s][j] = "cox with exposure term (stratum)" if value is not None else ""
            if value is None:
                if "joint" not in joint:  # fitted once, when a first stratum-group needs it
                    joint["joint"] = _joint_model(time, event, t, X, codes, S, horizon, starts)
                if joint["joint"] is not None:
                    beta, jcols, cum0, shift = joint["joint"]
                    betas["joint"] = beta
                    aim = np.column_stack([np.full(target.shape[0], float(g)), target])[:, jcols]
                    value = float(np.mean(np.exp(-cum0[s] * np.exp(aim @ beta - shift))))
                    models[s][j] = "cox with exposure term (all strata)"
            if value is None:
                value = float(kaplan_meier(tt, ee).at(horizon)[0])
                models[s][j] = "kaplan-meier"
            surv[s, j] = value
    return surv, models, betas


@dataclass(frozen=True)
class RiskDifference:
    """Adjusted risk difference at the horizon (exposed minus reference, risk = 1 - S(H))."""

    estimate: float
    se: float
    ci_low: float
    ci_high: float
    risk_exposed: float
    risk_reference: float
    horizon: float
    estimand: str
    alpha: float
    per_stratum: list
    rule: str
    bootstrap: dict
    risk_ratio: dict = field(default_factory=dict)
    bootstrap_draws: np.ndarray = field(repr=False, default=None)

    def to_dict(self) -> dict:
        d = {k: getattr(self, k) for k in ("estimate", "se", "ci_low", "ci_high",
                                           "risk_exposed", "risk_reference", "horizon",
                                           "estimand", "alpha", "per_stratum", "rule",
                                           "bootstrap", "risk_ratio")}
        return jsonable(d)


def _combine(surv, weights):
    risk = 1.0 - surv
    r1, r0 = float(np.sum(weights * risk[:, 0])), float(np.sum(weights * risk[:, 1]))
    return r1 - r0, r1, r0


def adjusted_risk_difference(time, event, t, X, codes, weights, horizon, *, estimand,
                             alpha=0.05, bootstrap=DEFAULT_BOOTSTRAP, seed=0,
                             progress=None) -> RiskDifference:
    """Adjusted risk difference at ``horizon``; see the module docstring.

    Parameters
    ----------
    time, event, t : (n,) follow-up times (> 0), 0/1 events, 0/1 exposure
    X : (n, p) covariate matrix (no intercept)
    codes : (n,) stratum codes 0..S-1 (every stratum holds both groups)
    weights : (S,) estimand weights
    horizon : float
    estimand : "ate" or "att"
    bootstrap : resamples B (0: no interval)
    seed : run seed; the stream is ``"survival-bootstrap"``
    progress : optional ``progress(done, total)``
    """
    time = np.asarray(time, float)
    event = np.asarray(event, float)
    X = np.asarray(X, float).reshape(time.size, -1)
    S = len(weights)
    cells = [[np.flatnonzero((codes == s) & (t == g)) for g in (1, 0)] for s in range(S)]
    surv, models, betas = _stratum_risks(time, event, t, X, codes, S, estimand, horizon, cells)
    est, r1, r0 = _combine(surv, weights)
    draws = np.full((bootstrap, 3), np.nan)  # risk difference, risk exposed, risk reference
    per_draws = np.full((bootstrap, S), np.nan)  # stratum risk differences
    done = 0
    for block, gen in enumerate(bootstrap_generators(seed, "survival-bootstrap", bootstrap)):
        size = min(BLOCK, bootstrap - block * BLOCK)
        picks = [[gen.integers(0, c.size, size=(size, c.size)) for c in pair] for pair in cells]
        for b in range(size):
            rows = np.concatenate([cells[s][j][picks[s][j][b]] for s in range(S) for j in (0, 1)])
            bsurv, _, _ = _stratum_risks(time[rows], event[rows], t[rows], X[rows], codes[rows],
                                         S, estimand, horizon,
                                         _cells_of(codes[rows], t[rows], S), betas)
            draws[block * BLOCK + b] = _combine(bsurv, weights)
            per_draws[block * BLOCK + b] = bsurv[:, 1] - bsurv[:, 0]
            done += 1
            if progress is not None and (done % 10 == 0 or done == bootstrap):
                progress(done, bootstrap)  # each resample refits up to 2S Cox models
    z = float(stats.norm.isf(alpha / 2))
    se = float(np.std(draws[:, 0], ddof=1)) if bootstrap > 1 else np.nan
    with np.errstate(divide="ignore", invalid="ignore"):
        log_rr = np.log(draws[:, 1] / draws[:, 2])
        rr = r1 / r0 if r0 > 0 else np.nan
    ok = np.isfinite(log_rr)
    se_log = float(np.std(log_rr[ok], ddof=1)) if ok.sum() > 1 and np.isfinite(rr) and rr > 0 \
        else np.nan
    ratio = {"estimate": rr, "se_log": se_log,
             "ci_low": rr * np.exp(-z * se_log) if np.isfinite(se_log) else np.nan,
             "ci_high": rr * np.exp(z * se_log) if np.isfinite(se_log) else np.nan}
    per_se = np.std(per_draws, axis=0, ddof=1) if bootstrap > 1 else np.full(S, np.nan)
    per = [{"stratum": s + 1, "weight": float(weights[s]),
            "n_exposed": int(cells[s][0].size), "n_reference": int(cells[s][1].size),
            "estimate": float(surv[s, 1] - surv[s, 0]), "se": float(per_se[s]),
            "ci_low": float(surv[s, 1] - surv[s, 0] - z * per_se[s]),
            "ci_high": float(surv[s, 1] - surv[s, 0] + z * per_se[s]),
            "measure": "risk difference",
            "risk_exposed": float(1 - surv[s, 0]), "risk_reference": float(1 - surv[s, 1]),
            "model_exposed": models[s][0], "model_reference": models[s][1],
            "events_exposed": int(event[cells[s][0]].sum()),
            "events_reference": int(event[cells[s][1]].sum())} for s in range(S)]
    rule = (f"within each stratum-group, a Cox model of the covariates (Breslow baseline) when "
            f"it has at least {EVENTS_PER_COLUMN} events per covariate column, else the "
            "stratum's Cox model with an exposure term when the stratum has them, else one Cox "
            "model of exposure and the covariates over all strata with a baseline per stratum "
            "when the sample has them, else the stratum-group's Kaplan-Meier; predicted S(H) "
            "averaged over the stratum's "
            f"{'units' if estimand == 'ate' else 'exposed units'}; estimand weights")
    boot = {"resamples": int(bootstrap), "seed": int(seed), "stream": "survival-bootstrap",
            "scheme": "rows resampled within stratum-groups; interval estimate +- z SE"}
    return RiskDifference(estimate=est, se=se, ci_low=est - z * se, ci_high=est + z * se,
                          risk_exposed=r1, risk_reference=r0, horizon=float(horizon),
                          estimand=estimand, alpha=alpha, per_stratum=per, rule=rule,
                          bootstrap=boot, risk_ratio=ratio, bootstrap_draws=draws)


def _cells_of(codes, t, S):
    return [[np.flatnonzero((codes == s) & (t == g)) for g in (1, 0)] for s in range(S)]
