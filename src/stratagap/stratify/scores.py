"""Propensity scores: the probability of being exposed given the covariates.

The default model is a main-effects logistic regression (statsmodels GLM, Binomial family,
intercept added). When the groups are separated by the covariates the maximum-likelihood fit
does not exist (coefficients run off to infinity, fitted probabilities pile up at 0 or 1); we
detect that, name the covariates involved, and refit with Firth's penalized likelihood, which
always has a finite solution. The flexible alternative is histogram gradient boosting with K-fold
cross-fitting, so that no unit's score comes from a model that saw that unit.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field

import numpy as np
from scipy.special import expit

from ..errors import InputError, ModelWarning, SeparationWarning
from .._base.linalg import pivoted_independent_columns
from .._base.logistic import firth, fit_ml, separates
from .._base.rng import check_seed, substream

__all__ = ["PropensityFit", "fit_propensity", "check_score"]

#: Scores are clipped to this distance from 0 and 1 before the logit is taken.
CLIP = 1e-6
#: A fitted probability this close to 0 or 1 is a sign of (quasi-)separation.
NEAR_BOUNDARY = 1e-8
#: |coefficient x SD of the covariate| beyond this (log-odds per SD) is treated as diverging.
HUGE_STD_COEF = 10.0
#: Standard error x SD beyond this is treated as diverging.
HUGE_STD_SE = 1e3


@dataclass(frozen=True)
class PropensityFit:
    """A fitted propensity-score model.

    Attributes
    ----------
    score, logit : ndarray (n,)
        Estimated probability of exposure and its logit (the linearized score), the logit taken
        after clipping the score to ``[1e-6, 1 - 1e-6]``.
    auc : float
        c-statistic (ROC AUC) of the score for the exposure.
    method : str
        ``"logistic"`` or ``"boosting"``.
    penalized : bool
        True when the maximum-likelihood fit failed and a penalized fit was used.
    separation_terms : list of str
        Covariates found to separate (or nearly separate) the groups.
    converged : bool
        Whether the fit that produced the scores converged.
    coefficients : dict or None
        Name -> coefficient on the original covariate scale, including ``"intercept"``; None for
        a column left out as collinear; None for boosting.
    penalty : str or None
        ``"firth"`` or ``"ridge"`` when penalized.
    folds : int or None
        Cross-fitting folds (boosting).
    seed : int
        Seed of the cross-fitting stream.
    dropped_collinear : list of str
        Columns left out of the logistic model because they are constant or linear combinations
        of other columns.
    notes : list of str
        Plain-text account of every choice made.
    """

    score: np.ndarray
    logit: np.ndarray
    auc: float
    method: str
    penalized: bool
    separation_terms: list
    converged: bool
    coefficients: dict | None
    penalty: str | None = None
    folds: int | None = None
    seed: int = 0
    dropped_collinear: list = field(default_factory=list)
    notes: list = field(default_factory=list)

    def to_dict(self) -> dict:
        """JSON-ready summary (per-unit scores are left out; they live in the tables)."""
        return {
            "method": self.method,
            "auc": _num(self.auc),
            "penalized": bool(self.penalized),
            "penalty": self.penalty,
            "separation_terms": list(self.separation_terms),
            "converged": bool(self.converged),
            "coefficients": None if self.coefficients is None
            else {k: _num(v) for k, v in self.coefficients.items()},
            "folds": self.folds,
            "seed": int(self.seed),
            "dropped_collinear": list(self.dropped_collinear),
            "notes": list(self.notes),
            "score_min": _num(np.min(self.score)),
            "score_max": _num(np.max(self.score)),
        }


def _num(v):
    if v is None:
        return None
    v = float(v)
    return v if np.isfinite(v) else None


def fit_propensity(X, t, names, *, method="logistic", folds=5, seed=0) -> PropensityFit:
    """Estimate propensity scores.

    Parameters
    ----------
    X : array_like (n, p)
        Design matrix without an intercept column.
    t : array_like (n,)
        Exposure, 1 = exposed, 0 = reference.
    names : sequence of str
        Names of the columns of ``X`` (used in warnings and for the coefficients).
    method : {"logistic", "boosting"}, default "logistic"
        Main-effects logistic regression, or histogram gradient boosting with cross-fitting.
    folds : int, default 5
        Number of cross-fitting folds for ``"boosting"``.
    seed : int, default 0
        Seed for the cross-fitting fold split and the boosting model.

    Returns
    -------
    PropensityFit

    Notes
    -----
    Separation is declared when statsmodels reports perfect separation or non-convergence, when
    parameters are not finite, or when some fitted probabilities lie within 1e-8 of 0 or 1 while
    a coefficient (per SD of its covariate) exceeds 10 or a standard error (per SD) exceeds 1e3.
    The covariates named are those that on their own put one group entirely on one side of a
    threshold (quasi-complete separation, Albert & Anderson 1984), plus those with diverging
    coefficients. The fallback is Firth's (1993) penalized likelihood, computed by Newton steps
    with the modified score of Heinze & Schemper (2002); if that fails to converge, a ridge
    logistic regression (scikit-learn, C = 1 on standardized covariates) is used.

    References
    ----------
    Albert A, Anderson JA (1984). On the existence of maximum likelihood estimates in logistic
    regression models. Biometrika 71:1-10.
    Firth D (1993). Bias reduction of maximum likelihood estimates. Biometrika 80:27-38.
    Heinze G, Schemper M (2002). A solution to the problem of separation in logistic regression.
    Statistics in Medicine 21:2409-2419.
    Chernozhukov V et al. (2018). Double/debiased machine learning. Econometrics Journal 21:C1-C68
    (cross-fitting).
    """
    X, t, names = _check_inputs(X, t, names)
    seed = check_seed(seed)
    if method == "logistic":
        fit = _fit_logistic(X, t, names, seed)
    elif method == "boosting":
        fit = _fit_boosting(X, t, folds, seed)
    else:
        raise InputError(f"`method` must be 'logistic' or 'boosting', got {method!r}; "
                         "pick one of the two")
    return fit


def _check_inputs(X, t, names):
    X = np.asarray(X, dtype=np.float64)
    if X.ndim == 1:
        X = X[:, None]
    t = np.asarray(t)
    if X.ndim != 2 or t.ndim != 1 or X.shape[0] != t.shape[0]:
        raise InputError(f"`X` must be (n, p) and `t` (n,), got shapes {X.shape} and {t.shape}; "
                         "pass one row per unit")
    names = [str(n) for n in names]
    if len(names) != X.shape[1]:
        raise InputError(f"`names` has {len(names)} entries for {X.shape[1]} columns of `X`; "
                         "give one name per column")
    if not np.all(np.isin(t, (0, 1))):
        raise InputError("`t` must hold only 0 (reference) and 1 (exposed); recode the exposure")
    t = t.astype(np.int8)
    n1 = int(t.sum())
    if n1 < 1 or n1 == t.size:
        raise InputError(f"exposure has one group only ({n1} exposed of {t.size}); "
                         "a score model needs units of both groups")
    bad = ~np.isfinite(X).all(axis=0)
    if bad.any():
        cols = ", ".join(np.asarray(names)[bad])
        raise InputError(f"covariate column(s) {cols} hold NaN or inf values; "
                         "drop or impute them before fitting the score")
    return X, t, names


def _auc(t, score) -> float:
    from sklearn.metrics import roc_auc_score
    return float(roc_auc_score(t, score))


def _logit_of(score):
    s = np.clip(score, CLIP, 1.0 - CLIP)
    return np.log(s / (1.0 - s))


# ----------------------------------------------------------------------------- logistic
def _fit_logistic(X, t, names, seed):
    import statsmodels.api as sm

    notes = []
    mu = X.mean(axis=0)
    sd = X.std(axis=0)
    Zs = (X - mu) / np.where(sd > 0, sd, 1.0)  # constant columns become 0 and drop out below
    keep = pivoted_independent_columns(Zs)
    dropped = [names[j] for j in range(X.shape[1]) if j not in set(keep.tolist())]
    if dropped:
        msg = (f"score model: column(s) {', '.join(dropped)} are constant or linear combinations "
               "of other columns and were left out of the logistic fit")
        warnings.warn(msg, ModelWarning, stacklevel=3)
        notes.append(msg)
    Xk, sdk, muk = X[:, keep], sd[keep], mu[keep]
    kept_names = [names[j] for j in keep]

    design = sm.add_constant(Xk, has_constant="add")
    fit = fit_ml(design, t.astype(float))
    problems = list(fit.problems)
    big_coef = np.zeros(len(keep), dtype=bool)
    near = 0
    if not fit.failed:
        params, bse, p = fit.params, fit.bse, fit.fitted
        near = int(np.sum((p < NEAR_BOUNDARY) | (p > 1 - NEAR_BOUNDARY)))
        std_coef = np.abs(params[1:] * sdk)
        std_se = np.abs(bse[1:] * sdk)
        big_coef = (~np.isfinite(std_coef) | (std_coef > HUGE_STD_COEF)
                    | ~np.isfinite(std_se) | (std_se > HUGE_STD_SE))
        if near and big_coef.any():
            problems.append(f"{near} fitted probabilities within {NEAR_BOUNDARY:g} of 0 or 1 "
                            "with diverging coefficients")

    # Fitted probabilities at 0 or 1 and large coefficients are signs, not proof: real data can
    # have units whose scores are truly tiny. A converged fit with finite coefficients stands
    # unless a linear program proves separation (Albert & Anderson 1984).
    settled = not fit.failed and fit.converged and np.all(np.isfinite(fit.params))
    if problems and settled and near and not separates(design, t):
        notes.append(f"score model: {near} fitted probabilities within {NEAR_BOUNDARY:g} of 0 or 1; "
                     "a linear program found no separation (Albert & Anderson 1984), so the "
                     "maximum-likelihood fit stands")
        problems = []
    if not problems:
        score = np.asarray(fit.fitted, dtype=float)
        coefs = _coef_dict(names, keep, [float(fit.params[0])] + list(fit.params[1:]), None)
        return PropensityFit(score=score, logit=_logit_of(score), auc=_auc(t, score),
                             method="logistic", penalized=False, separation_terms=[],
                             converged=True, coefficients=coefs, seed=seed,
                             dropped_collinear=dropped, notes=notes)

    # Separation: name the covariates, then refit with a penalty.
    terms = _separating_columns(X, t, names)
    if not terms:  # no single covariate separates: name those whose coefficients diverged
        terms = [kept_names[j] for j in np.flatnonzero(big_coef)]
    Z = np.column_stack([np.ones(len(t)), Zs[:, keep]])
    b, ok = firth(Z, t.astype(float))
    penalty = "firth"
    if not ok:
        from sklearn.linear_model import LogisticRegression
        lr = LogisticRegression(C=1.0, max_iter=1000).fit(Zs[:, keep], t)
        b = np.concatenate([lr.intercept_, lr.coef_[0]])
        penalty, ok = "ridge", True
    # back to the original covariate scale
    slopes = b[1:] / np.where(sdk > 0, sdk, 1.0)
    intercept = b[0] - float(np.sum(slopes * muk))
    coefs = _coef_dict(names, keep, [intercept] + list(slopes), None)
    score = expit(Z @ b)
    who = ", ".join(terms) if terms else "a combination of covariates (no single one separates)"
    kind = "Firth-penalized likelihood" if penalty == "firth" else "ridge-penalized (L2, C=1)"
    msg = (f"score model: {'; '.join(dict.fromkeys(problems))}; covariates involved: {who}; "
           f"refitted with {kind} logistic regression. Check whether {who} determines exposure "
           "(then the groups cannot be compared on it) or use the penalized scores with care")
    warnings.warn(msg, SeparationWarning, stacklevel=3)
    notes.append(msg)
    return PropensityFit(score=score, logit=_logit_of(score), auc=_auc(t, score),
                         method="logistic", penalized=True, separation_terms=terms,
                         converged=bool(ok), coefficients=coefs, penalty=penalty, seed=seed,
                         dropped_collinear=dropped, notes=notes)


def _coef_dict(names, keep, values, missing):
    out = {"intercept": float(values[0])}
    pos = {int(j): i for i, j in enumerate(keep)}
    for j, name in enumerate(names):
        out[name] = float(values[1 + pos[j]]) if j in pos else missing
    return out


def _separating_columns(X, t, names):
    """Columns that on their own place the groups on two sides of a threshold (quasi-complete)."""
    out = []
    x1, x0 = X[t == 1], X[t == 0]
    for j, name in enumerate(names):
        if np.ptp(X[:, j]) == 0:
            continue
        if x0[:, j].max() <= x1[:, j].min() or x1[:, j].max() <= x0[:, j].min():
            out.append(name)
    return out


# ----------------------------------------------------------------------------- boosting
def _fit_boosting(X, t, folds, seed):
    from sklearn.ensemble import HistGradientBoostingClassifier
    from sklearn.model_selection import StratifiedKFold

    if isinstance(folds, bool) or not isinstance(folds, (int, np.integer)) or folds < 2:
        raise InputError(f"`folds` must be an integer >= 2, got {folds!r}; pass e.g. 5")
    folds = int(folds)
    smallest = int(min(t.sum(), t.size - t.sum()))
    if folds > smallest:
        raise InputError(f"`folds`={folds} exceeds the size of the smaller group ({smallest}); "
                         f"use {smallest} or fewer folds, or the logistic score model")
    rng = substream(seed, "crossfit")
    split_seed, model_seed = (int(v) for v in rng.integers(0, 2**31 - 1, size=2))
    splitter = StratifiedKFold(n_splits=folds, shuffle=True, random_state=split_seed)
    from threadpoolctl import threadpool_limits  # installed with scikit-learn

    score = np.empty(t.size)
    # One OpenMP thread: the scores then cannot depend on the machine's thread count.
    with threadpool_limits(limits=1, user_api="openmp"):
        for train, test in splitter.split(X, t):
            model = HistGradientBoostingClassifier(random_state=model_seed)
            model.fit(X[train], t[train])
            score[test] = model.predict_proba(X[test])[:, 1]  # out-of-fold: never seen
    note = (f"boosting scores cross-fitted over {folds} stratified folds "
            f"(seeded from the 'crossfit' stream of seed {seed})")
    return PropensityFit(score=score, logit=_logit_of(score), auc=_auc(t, score),
                         method="boosting", penalized=False, separation_terms=[], converged=True,
                         coefficients=None, folds=folds, seed=seed, notes=[note])


def check_score(score, t, *, probabilities=True):
    """Check a score/exposure pair handed to a later stage; returns float64 score, int8 t.

    ``probabilities=False`` accepts any finite balancing score (subclassification works on any
    monotone transform of the propensity score, or on a single confounder itself).
    """
    score = np.asarray(score, dtype=np.float64)
    t = np.asarray(t)
    if score.ndim != 1 or t.shape != score.shape:
        raise InputError(f"`score` and `t` must be 1-d of equal length, got {score.shape} and "
                         f"{t.shape}; pass one score per unit")
    if not np.all(np.isin(t, (0, 1))):
        raise InputError("`t` must hold only 0 (reference) and 1 (exposed); recode the exposure")
    if not np.all(np.isfinite(score)):
        raise InputError("`score` holds NaN or inf values; refit the score model")
    if probabilities and (score.min() < 0 or score.max() > 1):
        raise InputError("`score` must be probabilities in [0, 1]; refit the score model")
    return score, t.astype(np.int8)
