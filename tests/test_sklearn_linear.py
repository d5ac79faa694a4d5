"""LikelihoodRegressor / LikelihoodClassifier, the likelihood metrics and the scorer.

Outside references used below:
* statsmodels GLM (IRLS, tol=1e-13) for Poisson, Gamma (log link), Gaussian and Binomial fits;
* scikit-learn QuantileRegressor (HiGHS linear programme) for the pinball objective;
* scikit-learn PoissonRegressor / GammaRegressor / Ridge for the ridge-penalised optimum;
* scikit-learn's d2_* and r2 scores, scipy.stats log densities, scipy.optimize for maximum likelihood;
* datasets that ship inside statsmodels and scikit-learn (named beside each check).
"""
import subprocess
import sys
import warnings

import numpy as np
import pytest
import statsmodels.api as sm
from scipy import optimize, stats

import lossfam
from user_families import LogisticErrors
from lossfam.sklearn import (
    LikelihoodClassifier,
    LikelihoodRegressor,
    UnboundedLikelihoodWarning,
    d2_score,
    mean_deviance,
    mean_nll,
    scorer,
)

RTOL = 1e-6


def params(est):
    return np.r_[est.intercept_, est.coef_]


def sm_fit(y, X, fam, **kw):
    return sm.GLM(y, sm.add_constant(X, has_constant="add"), family=fam, **kw).fit(tol=1e-13, maxiter=200)


def synthetic(family, n=600, p=4, seed=0):
    rng = np.random.default_rng(seed)
    X = rng.standard_normal((n, p))
    beta = rng.normal(0.0, 0.4, p)
    eta = 0.3 + X @ beta
    if family == "poisson":
        y = rng.poisson(np.exp(eta)).astype(float)
    elif family == "gamma":
        y = rng.gamma(3.0, np.exp(eta) / 3.0)
    elif family == "gaussian":
        y = eta + rng.normal(0.0, 0.7, n)
    else:
        y = (rng.random(n) < 1.0 / (1.0 + np.exp(-eta))).astype(float)
    w = rng.uniform(0.2, 3.0, n)
    return X, y, w


SM_FAMILY = {
    "poisson": lambda: sm.families.Poisson(),
    "gamma": lambda: sm.families.Gamma(sm.families.links.Log()),
    "gaussian": lambda: sm.families.Gaussian(),
    "bernoulli": lambda: sm.families.Binomial(),
}


# --------------------------------------------------------------------------- statsmodels GLM agreement
@pytest.mark.parametrize("family", ["poisson", "gamma", "gaussian", "bernoulli"])
@pytest.mark.parametrize("weighted", [False, True])
def test_coefficients_match_statsmodels_glm_synthetic(family, weighted):
    X, y, w = synthetic(family)
    w = w if weighted else None
    ours = LikelihoodRegressor(family=family).fit(X, y, sample_weight=w)
    # statsmodels GLM with var_weights multiplies each row's log-likelihood by its weight
    ref = sm_fit(y, X, SM_FAMILY[family](), var_weights=w)
    np.testing.assert_allclose(params(ours), ref.params, rtol=RTOL, err_msg=family)
    np.testing.assert_allclose(ours.predict(X), ref.fittedvalues, rtol=RTOL)


def test_large_poisson_fit_with_subsampled_hessians_matches_statsmodels(monkeypatch):
    # n >= 100 000: Newton's method on one row in 8 gives the start, then chord steps on all rows
    # reuse its factorisation; the solution must still be the exact maximum-likelihood estimate
    from lossfam._sk import _solvers

    calls = []
    real = _solvers.dense_sweep
    monkeypatch.setattr(_solvers, "dense_sweep",
                        lambda *a, **k: calls.append((a[1].shape[0], a[10])) or real(*a, **k))
    X, y, _ = synthetic("poisson", n=120_000, p=3, seed=19)
    ours = LikelihoodRegressor(family="poisson").fit(X, y)
    assert (15_000, "full") in calls and (120_000, None) in calls  # both kinds of step were taken
    ref = sm_fit(y, X, sm.families.Poisson())
    np.testing.assert_allclose(params(ours), ref.params, rtol=RTOL)


def test_poisson_cpunish_matches_statsmodels():
    # statsmodels.datasets.cpunish: executions by US state (17 rows), log income as in its docs
    data = sm.datasets.cpunish.load_pandas()
    X = data.exog.copy()
    X["INCOME"] = np.log(X["INCOME"])
    y = data.endog.to_numpy(float)
    ours = LikelihoodRegressor(family="poisson").fit(X, y)
    ref = sm_fit(y, X, sm.families.Poisson())
    np.testing.assert_allclose(params(ours), ref.params, rtol=RTOL)
    assert list(ours.feature_names_in_) == list(X.columns)


def test_poisson_randhie_matches_statsmodels():
    # statsmodels.datasets.randhie: RAND health insurance experiment, 20190 rows, mdvis counts
    data = sm.datasets.randhie.load_pandas()
    X, y = data.exog.to_numpy(float), data.endog.to_numpy(float)
    ours = LikelihoodRegressor(family="poisson").fit(X, y)
    ref = sm_fit(y, X, sm.families.Poisson())
    np.testing.assert_allclose(params(ours), ref.params, rtol=RTOL)
    assert ours.n_iter_ <= 20  # steps, counting the cheap chord steps that reuse a factorisation


def test_gamma_scotland_matches_statsmodels_and_shape_is_the_mle():
    # statsmodels.datasets.scotland: 1997 Scottish referendum "YES" share by council (32 rows)
    data = sm.datasets.scotland.load_pandas()
    X, y = data.exog.to_numpy(float), data.endog.to_numpy(float)
    ours = LikelihoodRegressor(family="gamma").fit(X, y)
    ref = sm_fit(y, X, sm.families.Gamma(sm.families.links.Log()))
    np.testing.assert_allclose(params(ours), ref.params, rtol=RTOL)
    # statsmodels' gamma scale is Pearson chi2 / df_resid, not the maximum-likelihood value, so the
    # shape is checked against an independent maximisation of sum scipy.stats.gamma.logpdf over k
    mu = ref.fittedvalues

    def negll(log_k):
        k = np.exp(log_k)
        return -np.sum(stats.gamma.logpdf(y, a=k, scale=mu / k))

    k_ml = np.exp(optimize.minimize_scalar(negll, bracket=(0.0, 8.0), tol=1e-12).x)
    np.testing.assert_allclose(ours.family_.shape, k_ml, rtol=1e-6)
    assert abs(ours.family_.shape - 1.0 / ref.scale) / ours.family_.shape > 1e-3  # they differ


def test_binomial_spector_matches_statsmodels():
    # statsmodels.datasets.spector: Spector & Mazzeo (1980) grade improvement, 32 rows
    data = sm.datasets.spector.load_pandas()
    X, y = data.exog.to_numpy(float), data.endog.to_numpy(float)
    ours = LikelihoodClassifier(alpha=0.0).fit(X, y)
    ref = sm_fit(y, X, sm.families.Binomial())
    np.testing.assert_allclose(params(ours), ref.params, rtol=RTOL)
    np.testing.assert_allclose(ours.predict_proba(X)[:, 1], ref.fittedvalues, rtol=RTOL)
    reg = LikelihoodRegressor(family="bernoulli").fit(X, y)
    np.testing.assert_allclose(params(reg), ref.params, rtol=RTOL)


def test_gaussian_diabetes_matches_statsmodels_and_scale_is_the_mle():
    # sklearn.datasets.load_diabetes ships inside scikit-learn (442 rows, 10 features)
    from sklearn.datasets import load_diabetes

    X, y = load_diabetes(return_X_y=True)
    ours = LikelihoodRegressor().fit(X, y)
    ref = sm_fit(y, X, sm.families.Gaussian())
    np.testing.assert_allclose(params(ours), ref.params, rtol=RTOL)
    # statsmodels' scale is SSR / df_resid; the maximum-likelihood variance is SSR / n
    np.testing.assert_allclose(ours.family_.scale ** 2, ref.scale * ref.df_resid / len(y), rtol=1e-10)


def test_poisson_offset_matches_statsmodels_exposure_cancer():
    # statsmodels.datasets.cancer: cancer counts with population at risk (301 rows)
    data = sm.datasets.cancer.load_pandas().data
    y = data["cancer"].to_numpy(float)
    pop = data["population"].to_numpy(float)
    X = np.log(pop)[:, None]
    ours = LikelihoodRegressor(family="poisson").fit(X, y, offset=np.log(pop))
    ref = sm_fit(y, X, sm.families.Poisson(), exposure=pop)
    np.testing.assert_allclose(params(ours), ref.params, rtol=RTOL)
    np.testing.assert_allclose(ours.predict(X, offset=np.log(pop)), ref.fittedvalues, rtol=RTOL)
    # an all-zero feature (singular design): its coefficient stays 0 and the intercept is the
    # rate log(sum y / sum exposure) of the intercept-only model
    rate = LikelihoodRegressor(family="poisson").fit(np.zeros((len(y), 1)), y, offset=np.log(pop))
    assert rate.coef_[0] == 0.0
    np.testing.assert_allclose(rate.intercept_, np.log(y.sum() / pop.sum()), rtol=1e-10)


# --------------------------------------------------------------------------- quantile families (LP)
def engel():
    # statsmodels.datasets.engel: Engel's food expenditure data (235 households); foodexp on income
    d = sm.datasets.engel.load_pandas().data
    return d[["income"]].to_numpy(float), d["foodexp"].to_numpy(float)


def pinball_total(y, pred, tau, w=None):
    r = y - pred
    loss = np.maximum(tau * r, (tau - 1.0) * r)
    return float(np.sum(loss if w is None else w * loss))


@pytest.mark.parametrize("tau", [0.5, 0.1, 0.9])
def test_quantile_objective_equals_sklearn_quantile_regressor_engel(tau):
    from sklearn.linear_model import QuantileRegressor

    X, y = engel()
    if tau == 0.5:
        ours = LikelihoodRegressor(family="laplace").fit(X, y)
    else:
        ours = LikelihoodRegressor(family="asymmetric_laplace", family_params={"quantile": tau}).fit(X, y)
    ref = QuantileRegressor(quantile=tau, alpha=0.0, solver="highs").fit(X, y)
    ours_obj, ref_obj = pinball_total(y, ours.predict(X), tau), pinball_total(y, ref.predict(X), tau)
    assert abs(ours_obj - ref_obj) <= 1e-8 * ref_obj
    # the fitted scale is the maximum-likelihood value: the mean pinball loss (x2 for laplace's |r|)
    factor = 2.0 if tau == 0.5 else 1.0
    np.testing.assert_allclose(ours.family_.scale, factor * ours_obj / len(y), rtol=1e-12)


def test_quantile_weighted_synthetic_equals_sklearn():
    from sklearn.linear_model import QuantileRegressor

    rng = np.random.default_rng(3)
    X = rng.standard_normal((300, 3))
    y = X @ [1.0, -2.0, 0.5] + rng.standard_t(3, 300)
    w = rng.uniform(0.1, 2.0, 300)
    ours = LikelihoodRegressor(family="asymmetric_laplace", family_params={"quantile": 0.75})
    ours.fit(X, y, sample_weight=w)
    ref = QuantileRegressor(quantile=0.75, alpha=0.0, solver="highs").fit(X, y, sample_weight=w)
    a, b = pinball_total(y, ours.predict(X), 0.75, w), pinball_total(y, ref.predict(X), 0.75, w)
    assert abs(a - b) <= 1e-8 * b


def pinball_certificate(X, y, coef, intercept, tau, c, alpha, tol=1e-7):
    """Independent optimality check for min sum c rho_tau(y - X coef - b) + alpha/2 |coef|^2.

    Rows with a clearly non-zero residual have a fixed subgradient; for the rows fitted exactly a
    subgradient in [tau - 1, tau] must exist that makes the stationarity equations hold.  That is a
    bounded least-squares problem (scipy.optimize.lsq_linear); its residual norm is returned.
    """
    r = y - X @ coef - intercept
    zero = np.abs(r) <= tol * (1 + np.abs(y).max())
    s_fixed = np.where(r > 0, tau, tau - 1.0)[~zero]
    A = np.vstack([X[zero].T * c[zero], c[zero]])
    target = np.r_[alpha * coef - X[~zero].T @ (c[~zero] * s_fixed), -np.dot(c[~zero], s_fixed)]
    if zero.sum() == 0:
        return float(np.linalg.norm(target))
    res = optimize.lsq_linear(A, target, bounds=(tau - 1.0, tau), method="bvls", tol=1e-14)
    return float(np.linalg.norm(A @ res.x - target))


@pytest.mark.parametrize("tau", [0.5, 0.1, 0.9])
@pytest.mark.parametrize("alpha", [1e-3, 1.0, 100.0])
def test_ridge_penalised_quantile_fit_is_certified_optimal_engel(tau, alpha):
    X, y = engel()  # statsmodels.datasets.engel, foodexp on income
    if tau == 0.5:
        est = LikelihoodRegressor(family="laplace", alpha=alpha).fit(X, y)
        c = np.full(len(y), 2.0 / len(y))  # nll = |r| / b = 2 rho_0.5(r) / b with b = 1
    else:
        est = LikelihoodRegressor(family="asymmetric_laplace", family_params={"quantile": tau}, alpha=alpha)
        est.fit(X, y)
        c = np.full(len(y), 1.0 / len(y))
    assert pinball_certificate(X, y, est.coef_, est.intercept_, tau, c, alpha) <= 1e-9

    def objective(theta):
        r = y - X @ theta[1:] - theta[0]
        return np.dot(c, np.maximum(tau * r, (tau - 1.0) * r)) + 0.5 * alpha * theta[1:] @ theta[1:]

    ours = np.r_[est.intercept_, est.coef_]
    # no derivative-free search from nearby starts finds a lower value
    for shift in ([1.0, 0.0], [0.0, 1e-3], [-5.0, 0.01]):
        other = optimize.minimize(objective, ours + shift, method="Nelder-Mead",
                                  options={"xatol": 1e-12, "fatol": 1e-14, "maxiter": 4000})
        assert objective(ours) <= other.fun + 1e-12 * abs(other.fun)


@pytest.mark.parametrize("seed", range(12))
def test_ridge_penalised_quantile_fit_random_problems(seed):
    # varied sizes, units, quantiles, penalties, ties (rounded targets) and weights
    rng = np.random.default_rng(seed)
    n, p = int(rng.integers(5, 300)), int(rng.integers(1, 7))
    tau, alpha = float(rng.uniform(0.05, 0.95)), float(10 ** rng.uniform(-5, 2))
    X = rng.standard_normal((n, p)) * 10 ** rng.uniform(-1, 3)
    y = X @ rng.normal(size=p) + rng.standard_t(2, n) * 10 ** rng.uniform(-1, 2)
    if seed % 3 == 0:
        y = np.round(y)
    w = rng.uniform(0.0, 2.0, n)
    est = LikelihoodRegressor(family="asymmetric_laplace", family_params={"quantile": tau}, alpha=alpha)
    est.fit(X, y, sample_weight=w)
    assert pinball_certificate(X, y, est.coef_, est.intercept_, tau, w / w.sum(), alpha) <= 1e-9


def test_ridge_penalised_quantile_fit_weighted_synthetic():
    rng = np.random.default_rng(17)
    X = rng.standard_normal((400, 4))
    y = X @ [1.0, -2.0, 0.5, 0.0] + rng.standard_t(3, 400)
    w = rng.uniform(0.0, 2.0, 400)
    w[:20] = 0.0  # rows with zero weight do not count
    est = LikelihoodRegressor(family="asymmetric_laplace", family_params={"quantile": 0.3, "scale": 2.0},
                              alpha=0.05).fit(X, y, sample_weight=w)
    c = w / w.sum() / 2.0  # nll = rho / b with the given scale b = 2
    keep = w > 0
    assert pinball_certificate(X[keep], y[keep], est.coef_, est.intercept_, 0.3, c[keep], 0.05) <= 1e-9
    # the penalty shrinks: the unpenalised fit has larger coefficients
    free = LikelihoodRegressor(family="asymmetric_laplace", family_params={"quantile": 0.3}).fit(X, y, sample_weight=w)
    assert np.linalg.norm(est.coef_) < np.linalg.norm(free.coef_)


# --------------------------------------------------------------------------- ridge penalty
def objective_gradient(est, X, y, w=None, offset=None):
    """Gradient of (1/sum w) sum w nll + alpha/2 ||coef||^2, from family.grad_hess (independent of the solver)."""
    w = np.ones_like(y) if w is None else w
    raw = X @ est.coef_ + est.intercept_ + (0.0 if offset is None else offset)
    fam = lossfam.family(est.family if hasattr(est, "family") else "bernoulli", **(getattr(est, "family_params", None) or {}))
    g, _ = fam.grad_hess(y, raw, weight=w / w.sum())
    return np.r_[g.sum(), X.T @ g + est.alpha * est.coef_]


@pytest.mark.parametrize("family", ["poisson", "gamma", "gaussian", "bernoulli"])
def test_ridge_solution_satisfies_optimality(family):
    X, y, w = synthetic(family, seed=5)
    est = LikelihoodRegressor(family=family, alpha=0.3, tol=1e-10).fit(X, y, sample_weight=w)
    grad = objective_gradient(est, X, y, w)
    assert np.max(np.abs(grad)) <= 1e-10
    assert np.max(np.abs(est.coef_)) > 1e-3  # a genuine, not a trivial, solution


@pytest.mark.parametrize("family", ["poisson", "gamma"])
def test_ridge_matches_sklearn_glm(family):
    # scikit-learn's objective 1/(2n) sum deviance + alpha/2 ||w||^2 equals ours up to a constant
    # (gamma with shape 1, the default)
    from sklearn.linear_model import GammaRegressor, PoissonRegressor

    X, y, _ = synthetic(family, seed=7)
    cls = PoissonRegressor if family == "poisson" else GammaRegressor
    ref = cls(alpha=0.2, solver="newton-cholesky", tol=1e-12, max_iter=1000).fit(X, y)
    ours = LikelihoodRegressor(family=family, alpha=0.2).fit(X, y)
    np.testing.assert_allclose(params(ours), np.r_[ref.intercept_, ref.coef_], rtol=RTOL)


def test_gaussian_ridge_matches_sklearn_ridge():
    from sklearn.linear_model import Ridge

    X, y, _ = synthetic("gaussian", seed=9)
    ours = LikelihoodRegressor(alpha=0.05).fit(X, y)
    # (1/n) sum r^2/2 + a/2 |b|^2 has the minimiser of sum r^2 + n a |b|^2
    ref = Ridge(alpha=0.05 * len(y)).fit(X, y)
    np.testing.assert_allclose(params(ours), np.r_[ref.intercept_, ref.coef_], rtol=RTOL)


# --------------------------------------------------------------------------- huber
def test_huber_joint_maximum_likelihood():
    rng = np.random.default_rng(11)
    X = rng.standard_normal((400, 2))
    y = 1.0 + X @ [2.0, -1.0] + rng.standard_t(2, 400)
    est = LikelihoodRegressor(family="huber").fit(X, y)
    delta = est.family_.delta

    def total_nll(theta):
        # Huber's least-favourable density, written out here independently of lossfam
        b0, b1, b2, log_s = theta
        s = np.exp(log_s)
        u = (y - b0 - X @ [b1, b2]) / s
        a = np.abs(u)
        rho = np.where(a <= delta, 0.5 * u * u, delta * a - 0.5 * delta**2)
        c = np.sqrt(2 * np.pi) * (2 * stats.norm.cdf(delta) - 1) + 2 * np.exp(-delta**2 / 2) / delta
        return np.sum(rho) + len(y) * (log_s + np.log(c))

    start = np.r_[np.median(y), 0.0, 0.0, 0.0]
    ref = optimize.minimize(total_nll, start, method="Nelder-Mead",
                            options={"xatol": 1e-10, "fatol": 1e-12, "maxiter": 20000, "maxfev": 40000})
    ours = np.r_[est.intercept_, est.coef_, np.log(est.family_.scale)]
    assert total_nll(ours) <= ref.fun + 1e-9 * abs(ref.fun)
    np.testing.assert_allclose(ours, ref.x, rtol=1e-5, atol=1e-6)


# --------------------------------------------------------------------------- classifier
def test_classifier_labels_probabilities_and_statsmodels():
    X, y, _ = synthetic("bernoulli", seed=2)
    labels = np.where(y == 1, "yes", "no")
    clf = LikelihoodClassifier(alpha=0.0).fit(X, labels)
    assert list(clf.classes_) == ["no", "yes"]
    ref = sm_fit(y, X, sm.families.Binomial())
    np.testing.assert_allclose(params(clf), ref.params, rtol=RTOL)
    proba = clf.predict_proba(X)
    np.testing.assert_allclose(proba.sum(axis=1), 1.0)
    np.testing.assert_array_equal(clf.predict(X), np.where(proba[:, 1] > 0.5, "yes", "no"))
    np.testing.assert_allclose(clf.predict_log_proba(X), np.log(proba), rtol=1e-12)
    np.testing.assert_allclose(clf.predict_distribution(X).mean(), proba[:, 1])


def test_separated_classes_warn_and_penalty_keeps_them_finite():
    rng = np.random.default_rng(4)
    X = rng.standard_normal((60, 2))
    y = (X[:, 0] + 0.5 * X[:, 1] > 0).astype(int)
    with pytest.warns(UnboundedLikelihoodWarning, match="separated"):
        LikelihoodClassifier(alpha=0.0).fit(X, y)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        est = LikelihoodClassifier(alpha=1e-2).fit(X, y)
    assert np.all(np.isfinite(est.coef_)) and np.max(np.abs(est.coef_)) < 50


def test_overlapping_classes_do_not_warn():
    X, y, _ = synthetic("bernoulli", seed=8)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        LikelihoodClassifier(alpha=0.0).fit(X, y)


def test_classifier_refuses_multiclass_and_single_class():
    X = np.random.default_rng(0).standard_normal((9, 2))
    with pytest.raises(ValueError, match="Only binary classification"):
        LikelihoodClassifier().fit(X, np.arange(9) % 3)
    with pytest.raises(ValueError, match="only one class"):
        LikelihoodClassifier().fit(X, np.ones(9))


# --------------------------------------------------------------------------- predictions, scores, metrics
def test_predict_distribution_and_d2_against_sklearn_metrics():
    from sklearn.metrics import d2_absolute_error_score, d2_pinball_score, d2_tweedie_score, r2_score

    X, y, w = synthetic("poisson", seed=12)
    est = LikelihoodRegressor(family="poisson").fit(X, y)
    law = est.predict_distribution(X)
    np.testing.assert_allclose(law.mean(), est.predict(X))
    np.testing.assert_allclose(est.score(X, y), d2_tweedie_score(y, est.predict(X), power=1), rtol=1e-10)
    np.testing.assert_allclose(est.score(X, y, sample_weight=w),
                               d2_tweedie_score(y, est.predict(X), power=1, sample_weight=w), rtol=1e-10)
    Xg, yg, _ = synthetic("gaussian", seed=12)
    g = LikelihoodRegressor().fit(Xg, yg)
    np.testing.assert_allclose(g.score(Xg, yg), r2_score(yg, g.predict(Xg)), rtol=1e-10)
    np.testing.assert_allclose(g.predict_distribution(Xg).std(), g.family_.scale)
    lap = LikelihoodRegressor(family="laplace").fit(Xg, yg)
    np.testing.assert_allclose(lap.score(Xg, yg), d2_absolute_error_score(yg, lap.predict(Xg)), rtol=1e-10)
    q = LikelihoodRegressor(family="asymmetric_laplace", family_params={"quantile": 0.8}).fit(Xg, yg)
    np.testing.assert_allclose(q.score(Xg, yg), d2_pinball_score(yg, q.predict(Xg), alpha=0.8), rtol=1e-10)


def test_metric_functions_take_response_scale_predictions():
    from sklearn.metrics import d2_log_loss_score, mean_gamma_deviance

    rng = np.random.default_rng(1)
    mu = rng.uniform(0.5, 4.0, 50)
    y = rng.poisson(mu).astype(float)
    np.testing.assert_allclose(mean_nll(y, mu, "poisson"), -np.mean(stats.poisson.logpmf(y, mu)), rtol=1e-12)
    yg = rng.gamma(2.0, mu / 2.0)
    np.testing.assert_allclose(mean_deviance(yg, mu, "gamma"), mean_gamma_deviance(yg, mu), rtol=1e-12)
    p = rng.uniform(0.1, 0.9, 50)
    yb = (rng.random(50) < p).astype(float)
    np.testing.assert_allclose(d2_score(yb, p, "bernoulli"), d2_log_loss_score(yb, np.c_[1 - p, p]), rtol=1e-10)
    with pytest.raises(ValueError, match="shape"):
        mean_nll(y, mu[:-1], "poisson")


def test_scorer_in_grid_search_and_cross_val_score():
    from sklearn.linear_model import PoissonRegressor
    from sklearn.model_selection import GridSearchCV, KFold, cross_val_score

    X, y, _ = synthetic("poisson", seed=13, n=300)
    cv = KFold(3, shuffle=True, random_state=0)
    s = scorer("poisson", kind="nll")
    scores = cross_val_score(LikelihoodRegressor(family="poisson"), X, y, cv=cv, scoring=s)
    # by hand: minus the held-out mean nll, from scipy.stats
    manual = []
    for tr, te in cv.split(X):
        est = LikelihoodRegressor(family="poisson").fit(X[tr], y[tr])
        manual.append(np.mean(stats.poisson.logpmf(y[te], est.predict(X[te]))))
    np.testing.assert_allclose(scores, manual, rtol=1e-10)
    grid = GridSearchCV(LikelihoodRegressor(family="poisson"), {"alpha": [0.0, 0.1, 10.0]},
                        cv=cv, scoring=scorer("poisson", kind="deviance")).fit(X, y)
    assert grid.best_params_["alpha"] != 10.0 and np.all(grid.cv_results_["mean_test_score"] < 0)
    # any scikit-learn estimator: its mean predictions are scored
    d2 = cross_val_score(PoissonRegressor(alpha=0.0), X, y, cv=cv, scoring=scorer("poisson", kind="d2"))
    assert np.all((d2 > 0) & (d2 < 1))
    with pytest.raises(ValueError, match="kind"):
        scorer("poisson", kind="accuracy")


def test_scorer_uses_fitted_nuisance_parameters_and_classifier_labels():
    X, y, _ = synthetic("gaussian", seed=14)
    est = LikelihoodRegressor().fit(X, y)
    expected = np.mean(stats.norm.logpdf(y, est.predict(X), est.family_.scale))  # greater is better
    np.testing.assert_allclose(scorer("gaussian")(est, X, y), expected, rtol=1e-12)
    Xb, yb, _ = synthetic("bernoulli", seed=14)
    clf = LikelihoodClassifier().fit(Xb, np.where(yb == 1, "b", "a"))
    p = clf.predict_proba(Xb)[:, 1]
    expected = np.mean(stats.bernoulli.logpmf(yb, p))
    np.testing.assert_allclose(scorer("bernoulli")(clf, Xb, np.where(yb == 1, "b", "a")), expected, rtol=1e-10)


# --------------------------------------------------------------------------- bad input
@pytest.mark.parametrize(
    "family, y_bad, match",
    [
        ("poisson", -1.0, r"poisson: y must be finite and >= 0; 1 row outside, e.g. row \[3\]"),
        ("gamma", 0.0, r"gamma: y must be finite and > 0; 1 row outside, e.g. row \[3\]"),
        ("bernoulli", 0.5, r"bernoulli: y must be 0 or 1"),
    ],
)
def test_target_outside_support(family, y_bad, match):
    X, y, _ = synthetic(family, n=20)
    y = y.copy()
    y[3] = y_bad
    with pytest.raises(ValueError, match=match):
        LikelihoodRegressor(family=family).fit(X, y)


def test_bad_shapes_nan_and_parameters():
    X, y, w = synthetic("poisson", n=20)
    est = LikelihoodRegressor(family="poisson")
    with pytest.raises(ValueError, match=r"X contains NaN or inf in 1 row, e.g. row \[1\] \(columns \[1\]\) = \[nan\]"):
        est.fit(np.where(np.arange(80).reshape(20, 4) == 5, np.nan, X), y)
    with pytest.raises(ValueError, match=r"poisson: y must be finite and >= 0; 1 row outside, e.g. row \[2\] = \[nan\]"):
        est.fit(X, np.where(np.arange(20) == 2, np.nan, y))
    with pytest.raises(ValueError, match="inconsistent numbers of samples"):
        est.fit(X, y[:-1])
    with pytest.raises(ValueError, match="offset has shape"):
        est.fit(X, y, offset=np.zeros(19))
    with pytest.raises(ValueError, match=r"offset must be a finite real number; 1 row outside"):
        est.fit(X, y, offset=np.where(np.arange(20) == 4, np.inf, 0.0))
    with pytest.raises(ValueError, match="sample_weight has shape"):
        est.fit(X, y, sample_weight=w[:-2])
    with pytest.raises(ValueError, match=r"sample_weight must be finite and >= 0; 1 row outside, e.g. row \[0\]"):
        est.fit(X, y, sample_weight=np.r_[-1.0, w[1:]])
    with pytest.raises(ValueError, match="alpha must be a finite number >= 0"):
        LikelihoodRegressor(alpha=-1.0).fit(X, y)
    with pytest.raises(ValueError, match="unknown family 'poison'"):
        LikelihoodRegressor(family="poison").fit(X, y)
    fitted = est.fit(X, y)
    with pytest.raises(ValueError, match=r"X contains NaN or inf in 2 rows, e.g. rows \[0, 3\]"):
        fitted.predict(np.where(np.isin(np.arange(80).reshape(20, 4), [2, 13]), np.inf, X))
    with pytest.raises(ValueError, match="features"):
        fitted.predict(X[:, :3])
    with pytest.raises(ValueError, match="offset has shape"):
        fitted.predict(X, offset=np.zeros(3))


def test_importing_lossfam_does_not_import_sklearn():
    code = "import sys, lossfam; assert 'sklearn' not in sys.modules, 'sklearn imported'; print('ok')"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "ok"


def test_missing_sklearn_names_the_extra():
    code = (
        "import sys; sys.modules['sklearn'] = None\n"
        "try:\n    import lossfam.sklearn\nexcept ImportError as e:\n    print(e)\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert 'pip install "lossfam[sklearn]"' in out.stdout


# --------------------------------------------------------------------------- a user family
def test_user_family_with_exact_hessian_is_fitted_by_newton():
    rng = np.random.default_rng(21)
    X = rng.standard_normal((500, 3))
    y = 0.5 + X @ [1.0, -0.5, 0.25] + rng.logistic(0.0, 0.8, 500)
    est = LikelihoodRegressor(family=LogisticErrors()).fit(X, y)
    assert est.n_iter_ <= 15

    def total(theta):  # independent: scipy.stats.logistic with the scale held at 1, as during the fit
        return -np.sum(stats.logistic.logpdf(y, loc=theta[0] + X @ theta[1:], scale=1.0))

    ref = optimize.minimize(total, np.zeros(4), method="BFGS", options={"gtol": 1e-10})
    np.testing.assert_allclose(params(est), ref.x, rtol=RTOL, atol=1e-7)
    # the scale is then fitted by maximum likelihood (generic Nelder-Mead on log scale): compare loosely
    s_ml = optimize.minimize_scalar(
        lambda s: -np.sum(stats.logistic.logpdf(y, loc=est.predict(X), scale=s)), bounds=(0.1, 5.0),
        method="bounded", options={"xatol": 1e-10}).x
    np.testing.assert_allclose(est.family_.scale, s_ml, rtol=1e-3)


def test_huber_scale_on_interpolated_data_is_reported():
    # three rows, two features and an intercept: every residual can be zero, so the joint
    # maximum-likelihood scale does not exist (the likelihood grows without bound as s -> 0)
    X = np.array([[0.0, 1.0], [1.0, 0.0], [2.0, 3.0]])
    y = np.array([1.0, 2.0, 0.5])
    with pytest.warns(UserWarning, match="huber scale shrinks"):
        est = LikelihoodRegressor(family="huber").fit(X, y)
    np.testing.assert_allclose(est.predict(X), y, atol=1e-6)
    assert est.family_.scale > 0
