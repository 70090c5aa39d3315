"""Propensity-score models: logistic (with separation handling) and cross-fitted boosting."""

import json
import warnings

import numpy as np
import pytest
import statsmodels.api as sm
from scipy.optimize import minimize
from scipy.special import expit
from scipy.stats import mannwhitneyu
from sklearn.metrics import roc_auc_score

from stratagap.errors import InputError, ModelWarning, SeparationWarning
from stratagap.stratify.scores import fit_propensity


def confounded(n=1500, seed=11):
    rng = np.random.default_rng(seed)
    age = rng.normal(50, 10, n)
    smoker = (rng.random(n) < 0.3).astype(float)
    bmi = rng.normal(27, 4, n)
    lin = -4.0 + 0.06 * age + 0.8 * smoker + 0.03 * bmi
    t = (rng.random(n) < expit(lin)).astype(np.int8)
    return np.column_stack([age, smoker, bmi]), t, ["age", "smoker", "bmi"]


def test_logistic_coefficients_match_statsmodels_logit():
    X, t, names = confounded()
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # a well-posed fit raises no warning at all
        fit = fit_propensity(X, t, names)
    # Independent reference: statsmodels' discrete-choice Logit (Newton), not the GLM used inside.
    ref = sm.Logit(t.astype(float), sm.add_constant(X)).fit(disp=0, tol=1e-12, maxiter=100)
    got = np.array([fit.coefficients[k] for k in ["intercept", *names]])
    np.testing.assert_allclose(got, ref.params, rtol=1e-6, atol=1e-6)
    np.testing.assert_allclose(fit.score, ref.predict(), rtol=1e-6, atol=1e-9)
    assert not fit.penalized and fit.converged and fit.separation_terms == []
    assert fit.method == "logistic"


def test_auc_matches_mann_whitney_and_sklearn():
    X, t, names = confounded()
    fit = fit_propensity(X, t, names)
    # AUC = U / (n1 n0) (Mann-Whitney form of the c-statistic; Hanley & McNeil 1982).
    u = mannwhitneyu(fit.score[t == 1], fit.score[t == 0]).statistic
    assert fit.auc == pytest.approx(u / ((t == 1).sum() * (t == 0).sum()), abs=1e-12)
    assert fit.auc == pytest.approx(roc_auc_score(t, fit.score), abs=1e-12)


def test_logit_is_clipped_score_logit():
    X, t, names = confounded()
    fit = fit_propensity(X, t, names)
    s = np.clip(fit.score, 1e-6, 1 - 1e-6)
    np.testing.assert_allclose(fit.logit, np.log(s / (1 - s)), rtol=1e-12)


def test_complete_separation_names_covariate_and_gives_finite_scores():
    rng = np.random.default_rng(3)
    n = 300
    dose = rng.normal(size=n)
    noise = rng.normal(size=n)
    t = (dose > 0.2).astype(np.int8)  # 'dose' alone determines exposure
    with pytest.warns(SeparationWarning, match=r"covariates involved: dose;.*Firth"):
        fit = fit_propensity(np.column_stack([noise, dose]), t, ["noise", "dose"])
    assert fit.penalized and fit.penalty == "firth" and fit.converged
    assert fit.separation_terms == ["dose"]
    assert np.all(np.isfinite(fit.score)) and np.all(np.isfinite(fit.logit))
    assert all(np.isfinite(v) for v in fit.coefficients.values())


def test_quasi_separation_by_a_dummy_is_detected():
    rng = np.random.default_rng(5)
    n = 400
    x = rng.normal(size=n)
    flag = (rng.random(n) < 0.1).astype(float)
    t = (rng.random(n) < expit(x)).astype(np.int8)
    t[flag == 1] = 1  # every unit with flag = 1 is exposed
    with pytest.warns(SeparationWarning, match="flag"):
        fit = fit_propensity(np.column_stack([x, flag]), t, ["x", "flag"])
    assert fit.separation_terms == ["flag"]
    assert np.all((fit.score > 0) & (fit.score < 1))


def test_firth_solution_maximizes_the_penalized_likelihood():
    # Independent check: a general-purpose optimizer on Firth's (1993) penalized log-likelihood
    # l(b) + 0.5 log det I(b), on the original covariate scale.
    rng = np.random.default_rng(8)
    n = 120
    x = rng.normal(size=n)
    z = rng.normal(size=n)
    t = (x + 0.3 * z > 0).astype(np.int8)
    with pytest.warns(SeparationWarning):
        fit = fit_propensity(np.column_stack([x, z]), t, ["x", "z"])
    Z = np.column_stack([np.ones(n), x, z])

    def neg_pll(b):
        eta = Z @ b
        p = expit(eta)
        info = Z.T @ (Z * (p * (1 - p))[:, None])
        return -(np.sum(t * eta - np.logaddexp(0, eta)) + 0.5 * np.linalg.slogdet(info)[1])

    got = np.array([fit.coefficients[k] for k in ("intercept", "x", "z")])
    best = minimize(neg_pll, got * 0.9, method="BFGS", options={"gtol": 1e-9})
    assert neg_pll(got) <= best.fun + 1e-7
    np.testing.assert_allclose(got, best.x, rtol=1e-3, atol=1e-3)


def test_collinear_column_is_left_out_with_a_warning():
    X, t, names = confounded()
    X2 = np.column_stack([X, X[:, 0] + X[:, 2]])
    with pytest.warns(ModelWarning, match="age_plus_bmi"):
        fit = fit_propensity(X2, t, [*names, "age_plus_bmi"])
    assert fit.coefficients["age_plus_bmi"] is None
    assert fit.dropped_collinear == ["age_plus_bmi"]
    ref = fit_propensity(X, t, names)
    np.testing.assert_allclose(fit.score, ref.score, rtol=1e-8)


def test_boosting_is_cross_fitted_and_reproducible():
    # Exposure independent of the covariates: a model that saw a unit would score it well
    # (in-sample AUC far above 0.5); out-of-fold scores carry no information. Under no
    # association the AUC has SE sqrt((n1 + n0 + 1) / (12 n1 n0)) ~ 0.018 here (Hanley &
    # McNeil 1982); 0.5 +- 0.08 is more than 4 SE.
    from sklearn.ensemble import HistGradientBoostingClassifier
    from threadpoolctl import threadpool_limits

    rng = np.random.default_rng(21)
    n = 1000
    X = rng.normal(size=(n, 4))
    t = (rng.random(n) < 0.5).astype(np.int8)
    fit = fit_propensity(X, t, list("abcd"), method="boosting", folds=5, seed=4)
    assert abs(fit.auc - 0.5) < 0.08
    with threadpool_limits(limits=1, user_api="openmp"):  # avoids thread oversubscription
        model = HistGradientBoostingClassifier(random_state=0).fit(X, t)
    in_sample = model.predict_proba(X)[:, 1]
    assert roc_auc_score(t, in_sample) > 0.75
    again = fit_propensity(X, t, list("abcd"), method="boosting", folds=5, seed=4)
    np.testing.assert_array_equal(fit.score, again.score)
    other = fit_propensity(X, t, list("abcd"), method="boosting", folds=5, seed=5)
    assert not np.array_equal(fit.score, other.score)
    assert fit.coefficients is None and fit.folds == 5


def test_boosting_learns_a_real_score():
    # The data follow a logistic model, so cross-fitted boosting cannot beat it by much, but
    # must find the signal: under no association the AUC's SE is ~0.011 at n = 3000 (Hanley &
    # McNeil 1982), so 0.6 is about 9 SE above chance.
    X, t, names = confounded(n=3000)
    fit = fit_propensity(X, t, names, method="boosting", folds=3)
    logistic = fit_propensity(X, t, names)
    assert 0.6 < fit.auc < logistic.auc + 0.02


def test_to_dict_is_json_ready():
    X, t, names = confounded()
    d = fit_propensity(X, t, names).to_dict()
    assert json.loads(json.dumps(d)) == d
    assert set(d) >= {"method", "auc", "penalized", "separation_terms", "converged",
                      "coefficients"}


@pytest.mark.parametrize("kwargs, match", [
    ({"method": "forest"}, "`method`"),
    ({"method": "boosting", "folds": 1}, "`folds`"),
    ({"method": "boosting", "folds": 5000}, "`folds`"),
    ({"seed": -1}, "`seed`"),
])
def test_bad_arguments(kwargs, match):
    X, t, names = confounded(n=200)
    with pytest.raises(InputError, match=match):
        fit_propensity(X, t, names, **kwargs)


def test_bad_inputs():
    X, t, names = confounded(n=200)
    with pytest.raises(InputError, match="one group"):
        fit_propensity(X, np.ones_like(t), names)
    with pytest.raises(InputError, match="names"):
        fit_propensity(X, t, names[:2])
    bad = X.copy()
    bad[3, 1] = np.nan
    with pytest.raises(InputError, match="smoker"):
        fit_propensity(bad, t, names)


def test_tiny_scores_without_separation_keep_the_maximum_likelihood_fit():
    """Units with truly tiny scores (a strong but overlapping confounder) are not separation:
    the maximum-likelihood estimate exists (Albert & Anderson 1984, Biometrika 71:1-10), so
    the scores are statsmodels' GLM fit, not a penalized refit."""
    import statsmodels.api as sm

    rng = np.random.default_rng(1)
    x = rng.normal(size=3000)
    t = (rng.random(3000) < 1 / (1 + np.exp(-(-3 + 14 * x)))).astype(np.int8)
    with warnings.catch_warnings():
        warnings.simplefilter("error", SeparationWarning)
        fit = fit_propensity(x[:, None], t, ["x"])
    ref = sm.GLM(t, sm.add_constant(x), family=sm.families.Binomial()).fit()
    assert not fit.penalized and np.sum(fit.score < 1e-8) > 100
    np.testing.assert_allclose(fit.score, ref.fittedvalues, rtol=1e-10, atol=1e-300)
    assert any("linear program found no separation" in n for n in fit.notes)


def test_linear_program_finds_quasi_complete_separation():
    from stratagap._base.logistic import separates

    x = np.arange(-5.0, 6.0)
    Z = np.column_stack([np.ones(x.size), x])
    assert separates(Z, (x >= 0).astype(float))        # complete
    y = (x > 0).astype(float)
    y[x == 0] = 1.0
    y = np.append(y, 0.0)
    Zq = np.vstack([Z, [1.0, 0.0]])                      # a tie at the threshold: quasi-complete
    assert separates(Zq, y)
    rng = np.random.default_rng(0)
    y_overlap = (rng.random(x.size) < 0.5).astype(float)
    y_overlap[[0, 1]] = [1.0, 0.0]
    y_overlap[[-1, -2]] = [0.0, 1.0]
    assert not separates(Z, y_overlap)
