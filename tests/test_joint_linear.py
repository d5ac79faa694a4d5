"""JointLikelihoodRegressor: a linear model per raw score of a several-score family, fitted jointly."""
import numpy as np
import pandas as pd
import pytest
from scipy import optimize, stats
from sklearn.exceptions import ConvergenceWarning
from sklearn.utils.estimator_checks import parametrize_with_checks

import lossfam
from lossfam.sklearn import JointLikelihoodRegressor, LikelihoodRegressor


def _engel():
    # Engel food expenditure data shipped with statsmodels (statsmodels.datasets.engel: 235 Belgian
    # households, income and food expenditure; Koenker and Bassett 1982, Econometrica 50, 43-61):
    # the spread of food expenditure grows with income, a textbook case of heteroscedasticity.
    from statsmodels.datasets import engel

    d = engel.load_pandas().data
    return d[["income"]] / 1000.0, d["foodexp"].to_numpy() / 1000.0


def _direct_gaussian_mle(X, y, w=None):
    """Reference: maximise sum w log N(y; a + X b, exp(c + X d)^2) with scipy.optimize (BFGS), the
    log density from scipy.stats.norm.logpdf, the gradient written out here by hand:
    d/d mu = (y - mu) / s^2, d/d log s = z^2 - 1."""
    n, p = X.shape
    w = np.ones(n) if w is None else w
    Z = np.column_stack([np.ones(n), X])

    def f(theta):
        mu, ls = Z @ theta[:p + 1], Z @ theta[p + 1:]
        z = (y - mu) / np.exp(ls)
        val = -np.sum(w * stats.norm.logpdf(y, loc=mu, scale=np.exp(ls))) / w.sum()
        g = -np.concatenate([Z.T @ (w * z / np.exp(ls)), Z.T @ (w * (z * z - 1.0))]) / w.sum()
        return val, g

    start = np.zeros(2 * (p + 1))
    start[0], start[p + 1] = np.average(y, weights=w), np.log(np.std(y))
    res = optimize.minimize(f, start, jac=True, method="BFGS", options={"gtol": 1e-12, "maxiter": 10_000})
    # BFGS may stop on its line search before gtol: polish with Newton-free restarts until it settles
    for _ in range(5):
        res = optimize.minimize(f, res.x, jac=True, method="BFGS", options={"gtol": 1e-12, "maxiter": 10_000})
    return res.x[:p + 1], res.x[p + 1:], res


def test_gaussian_log_linear_sigma_matches_direct_maximisation_engel():
    X, y = _engel()
    m = JointLikelihoodRegressor("gaussian_spread").fit(X, y)
    a, b, res = _direct_gaussian_mle(X.to_numpy(), y)
    assert np.max(np.abs(res.jac)) < 1e-8
    np.testing.assert_allclose(m.intercept_, [a[0], b[0]], rtol=1e-6, atol=1e-9)
    np.testing.assert_allclose(m.coef_[:, 0], [a[1], b[1]], rtol=1e-6, atol=1e-9)
    # the spread rises with income (the data set's known heteroscedasticity)
    assert m.coef_[1, 0] > 0.5
    assert list(m.feature_names_in_) == ["income"]


def test_gaussian_weighted_two_features_matches_direct_maximisation(rng):
    # simulated: sigma x10 across the range of x0; weights in [0.2, 3]
    n = 400
    X = rng.uniform(0.0, 1.0, size=(n, 2))
    y = 1.0 + 2.0 * X[:, 1] + np.exp(-1.5 + np.log(10.0) * X[:, 0]) * rng.normal(size=n)
    w = rng.uniform(0.2, 3.0, size=n)
    m = JointLikelihoodRegressor().fit(X, y, sample_weight=w)
    a, b, res = _direct_gaussian_mle(X, y, w)
    assert np.max(np.abs(res.jac)) < 1e-8
    np.testing.assert_allclose(m.intercept_, [a[0], b[0]], rtol=1e-6, atol=1e-9)
    np.testing.assert_allclose(m.coef_, [a[1:], b[1:]], rtol=1e-6, atol=1e-9)


def test_constant_scale_equals_the_one_score_fit(rng):
    # scale_features=[]: log sigma is an intercept only, so the mean is least squares and sigma the
    # maximum-likelihood standard deviation of its residuals (the one-score gaussian fit)
    n = 300
    X = rng.normal(size=(n, 3))
    y = X @ [1.0, -2.0, 0.5] + rng.normal(size=n)
    m = JointLikelihoodRegressor(scale_features=[]).fit(X, y)
    one = LikelihoodRegressor("gaussian").fit(X, y)
    np.testing.assert_allclose(m.coef_[0], one.coef_, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(m.intercept_[0], one.intercept_, rtol=1e-9)
    np.testing.assert_allclose(np.exp(m.intercept_[1]), one.family_.scale, rtol=1e-9)
    assert np.all(m.coef_[1] == 0.0) and not m.scale_features_.any()


def test_integer_weights_equal_repeated_rows(rng):
    n = 120
    X = rng.normal(size=(n, 2))
    y = X[:, 0] + np.exp(0.5 * X[:, 1]) * rng.normal(size=n)
    reps = rng.integers(1, 4, size=n)
    a = JointLikelihoodRegressor().fit(X, y, sample_weight=reps.astype(float))
    b = JointLikelihoodRegressor().fit(np.repeat(X, reps, axis=0), np.repeat(y, reps))
    np.testing.assert_allclose(a.coef_, b.coef_, rtol=1e-8, atol=1e-10)
    np.testing.assert_allclose(a.intercept_, b.intercept_, rtol=1e-8, atol=1e-10)


def test_outputs_pandas_names_offset_and_penalty(rng):
    n = 200
    frame = pd.DataFrame({"age": rng.uniform(0, 10, n), "load": rng.uniform(0, 1, n), "noise": rng.normal(size=n)})
    y = 2.0 + 0.3 * frame["load"].to_numpy() + np.exp(-1.0 + 0.2 * frame["age"].to_numpy()) * rng.normal(size=n)
    m = JointLikelihoodRegressor(scale_features=["age"]).fit(frame, y)
    assert m.scale_features_.tolist() == [True, False, False]
    assert m.coef_[1, 1] == 0.0 and m.coef_[1, 2] == 0.0 and m.coef_[1, 0] != 0.0
    raw = m.predict_raw(frame)
    assert raw.shape == (n, 2)
    np.testing.assert_allclose(m.predict(frame), raw[:, 0])
    np.testing.assert_allclose(m.predict_parameters(frame)[:, 1], np.exp(raw[:, 1]))
    law = m.predict_distribution(frame)
    np.testing.assert_allclose(law.std(), np.exp(raw[:, 1]))
    # a location offset moves the location raw score only; an (n, 2) offset both
    off = rng.normal(size=n)
    np.testing.assert_allclose(m.predict_raw(frame, offset=off) - raw, np.column_stack([off, np.zeros(n)]))
    # fitting with the offset absorbed in y is the same model
    mo = JointLikelihoodRegressor(scale_features=["age"]).fit(frame, y + off, offset=off)
    np.testing.assert_allclose(mo.coef_, m.coef_, rtol=1e-7, atol=1e-9)
    assert mo.fitted_with_offset_
    # a ridge penalty shrinks the coefficients
    mp = JointLikelihoodRegressor(scale_features=["age"], alpha=1.0).fit(frame, y)
    assert np.sum(mp.coef_ ** 2) < np.sum(m.coef_ ** 2)


def test_penalised_stationarity(rng):
    # with alpha > 0 the fit is where the penalised gradient vanishes (checked from the family's own
    # gradient, summed through the design by hand)
    n = 150
    X = rng.normal(size=(n, 2))
    y = X[:, 0] + np.exp(0.3 * X[:, 1]) * rng.normal(size=n)
    alpha = 0.3
    m = JointLikelihoodRegressor(alpha=alpha).fit(X, y)
    fam = lossfam.family("gaussian_spread")
    g = fam.gradient(y, m.predict_raw(X)) / n
    np.testing.assert_allclose(X.T @ g + alpha * m.coef_.T, 0.0, atol=1e-8)
    np.testing.assert_allclose(g.sum(axis=0), 0.0, atol=1e-8)


def test_bad_inputs_are_named(rng):
    X = rng.normal(size=(10, 2))
    y = rng.normal(size=10)
    with pytest.raises(ValueError, match="one raw score"):
        JointLikelihoodRegressor("gaussian").fit(X, y)
    with pytest.raises(ValueError, match="scale_features"):
        JointLikelihoodRegressor(scale_features=[5]).fit(X, y)
    with pytest.raises(ValueError, match="column names"):
        JointLikelihoodRegressor(scale_features=["age"]).fit(X, y)
    with pytest.raises(ValueError, match=r"offset has shape"):
        JointLikelihoodRegressor().fit(X, y, offset=np.zeros((10, 3)))
    Xb = X.copy()
    Xb[3, 1] = np.nan
    with pytest.raises(ValueError, match=r"row \[3\]"):
        JointLikelihoodRegressor().fit(Xb, y)


def test_unbounded_likelihood_warns():
    # one row alone at x = 1: the mean fits it exactly and its own sigma can shrink to 0
    X = np.array([[0.0], [0.0], [0.0], [0.0], [1.0]])
    y = np.array([0.1, -0.3, 0.4, 0.2, 5.0])
    with pytest.warns(ConvergenceWarning, match="finite maximiser"):
        JointLikelihoodRegressor(max_iter=30).fit(X, y)


def test_heteroscedastic_fit_beats_constant_scale_on_held_out_rows(rng):
    n = 4000
    X = rng.uniform(0.0, 1.0, size=(n, 1))
    y = 3.0 + X[:, 0] + np.exp(-1.0 + np.log(10.0) * X[:, 0]) * rng.normal(size=n)
    tr, te = slice(0, n // 2), slice(n // 2, None)
    fam = lossfam.family("gaussian_spread")
    spread = JointLikelihoodRegressor().fit(X[tr], y[tr])
    const = JointLikelihoodRegressor(scale_features=[]).fit(X[tr], y[tr])
    a = fam.nll(y[te], spread.predict_raw(X[te])).mean()
    b = fam.nll(y[te], const.predict_raw(X[te])).mean()
    assert a < b - 0.1
    np.testing.assert_allclose(spread.coef_[1, 0], np.log(10.0), atol=0.15)


# Several checks fit 10 features on 15 rows: the mean fits every row exactly and the likelihood has
# no finite maximiser, for which the estimator rightly warns (ConvergenceWarning); the checks'
# assertions (weights, shapes, determinism, ...) still hold.
@pytest.mark.filterwarnings("ignore::sklearn.exceptions.ConvergenceWarning")
@parametrize_with_checks([JointLikelihoodRegressor(), JointLikelihoodRegressor(alpha=0.5, scale_features=[0])])
def test_sklearn_estimator_checks(estimator, check):
    check(estimator)


def test_held_out_coverage_per_decile_of_predicted_scale(rng):
    # sigma x10 across the feature's range: the scale-varying fit covers 0.88-0.92 in every decile
    # of its predicted scale; the constant-scale fit, grouped by the same deciles, does not
    from lossfam.diagnostics import coverage_by_spread

    n = 100_000
    X = rng.uniform(0.0, 1.0, size=(n, 2))
    y = 1.0 + 2.0 * X[:, 1] + np.exp(np.log(10.0) * X[:, 0]) * rng.normal(size=n)
    tr, te = slice(0, n // 2), slice(n // 2, None)
    spread = JointLikelihoodRegressor().fit(X[tr], y[tr])
    const = JointLikelihoodRegressor(scale_features=[]).fit(X[tr], y[tr])
    scale = spread.predict_parameters(X[te])[:, 1]
    a = coverage_by_spread(spread.predict_distribution(X[te]), y[te], level=0.9, by=scale)
    b = coverage_by_spread(const.predict_distribution(X[te]), y[te], level=0.9, by=scale)
    assert a["group"].size == 10 and np.all((a["coverage"] >= 0.88) & (a["coverage"] <= 0.92))
    assert b["coverage"][0] > 0.99 and b["coverage"][-1] < 0.8


def _direct_gamma_mle(X, y):
    """Reference: maximise sum log Gamma(y; shape k, scale mu / k), log mu = a + X b, log k = c + X d,
    with scipy.optimize (BFGS); the log density from scipy.stats.gamma.logpdf, the gradient by hand:
    d/d log mu = k (y / mu - 1), d/d log k = k (log(k y / mu) - digamma(k) + 1 - y / mu)."""
    from scipy.special import digamma

    n, p = X.shape
    Z = np.column_stack([np.ones(n), X])

    def f(theta):
        lm, lk = Z @ theta[:p + 1], Z @ theta[p + 1:]
        mu, k = np.exp(lm), np.exp(lk)
        val = -np.mean(stats.gamma.logpdf(y, a=k, scale=mu / k))
        g_mu = k * (y / mu - 1.0)
        g_k = k * (np.log(k * y / mu) - digamma(k) + 1.0 - y / mu)
        return val, -np.concatenate([Z.T @ g_mu, Z.T @ g_k]) / n

    start = np.zeros(2 * (p + 1))
    start[0], start[p + 1] = np.log(y.mean()), np.log(y.mean() ** 2 / y.var())
    res = optimize.minimize(f, start, jac=True, method="BFGS", options={"gtol": 1e-12, "maxiter": 10_000})
    for _ in range(5):
        res = optimize.minimize(f, res.x, jac=True, method="BFGS", options={"gtol": 1e-12, "maxiter": 10_000})
    return res.x[:p + 1], res.x[p + 1:], res


def test_gamma_log_linear_shape_matches_direct_maximisation_engel():
    # Engel food expenditure (statsmodels.datasets.engel, as above): positive, so a gamma law with a
    # log-linear mean and a log-linear shape in income
    X, y = _engel()
    m = JointLikelihoodRegressor("gamma_spread").fit(X, y)
    a, b, res = _direct_gamma_mle(X.to_numpy(), y)
    assert np.max(np.abs(res.jac)) < 1e-8
    np.testing.assert_allclose(m.intercept_, [a[0], b[0]], rtol=1e-6, atol=1e-9)
    np.testing.assert_allclose(m.coef_[:, 0], [a[1], b[1]], rtol=1e-6, atol=1e-9)


@pytest.mark.parametrize("name,params", [("laplace_spread", {}),
                                         ("asymmetric_laplace_spread", {"quantile": 0.8})])
def test_kinked_location_fit_is_not_beaten_by_a_direct_search(name, params, rng):
    # the location has a kink, so the fit alternates an exact quantile regression and a Newton fit
    # of the scale; checked against scipy's derivative-free search (Nelder-Mead, then Powell) over
    # all four coefficients from the fitted point and from the baseline: none finds a lower nll
    n = 300
    X = rng.uniform(0.0, 1.0, size=(n, 1))
    y = 1.0 + 2.0 * X[:, 0] + np.exp(-1.0 + 1.5 * X[:, 0]) * rng.laplace(size=n)
    m = JointLikelihoodRegressor(name, family_params=params).fit(X, y)
    fam = lossfam.family(name, **params)
    Z = np.column_stack([np.ones(n), X])

    def F(theta):
        return float(fam.nll(y, np.column_stack([Z @ theta[:2], Z @ theta[2:]])).mean())

    ours = np.array([m.intercept_[0], m.coef_[0, 0], m.intercept_[1], m.coef_[1, 0]])
    f_ours = F(ours)
    base = fam.baseline(y)
    for x0 in (ours, np.array([base[0], 0.0, base[1], 0.0])):
        r = optimize.minimize(F, x0, method="Nelder-Mead", options={"xatol": 1e-10, "fatol": 1e-14, "maxiter": 20_000})
        r = optimize.minimize(F, r.x, method="Powell", options={"xtol": 1e-10, "ftol": 1e-14})
        assert f_ours <= r.fun + 1e-10
    # and no small step in any of 200 random directions lowers it
    for _ in range(200):
        d = rng.normal(size=4)
        assert F(ours + 1e-4 * d / np.linalg.norm(d)) >= f_ours - 1e-13
    # the location is the weighted quantile regression at the fitted scales: rows on each side
    # weigh (1 - tau) : tau (the LP's optimality, up to the interpolated rows)
    tau = params.get("quantile", 0.5)
    raw = m.predict_raw(X)
    wgt = np.exp(-raw[:, 1])
    below = np.sum(wgt[y < raw[:, 0] - 1e-9]) / wgt.sum()
    assert abs(below - tau) <= np.max(wgt) * 2 / wgt.sum() + 1e-12


def test_dispersion_drifting_to_the_poisson_limit_warns():
    # Poisson counts under a negative binomial with a log-linear dispersion: on these data (seed 3)
    # the likelihood keeps rising as the dispersion of some rows goes to 0 (the Poisson limit),
    # log alpha runs off to about -88 and the fit says so
    from lossfam.sklearn import UnboundedLikelihoodWarning

    rng = np.random.default_rng(3)
    X = rng.uniform(-1.0, 1.0, size=(2000, 3))
    y = rng.poisson(np.exp(1.0 + 0.5 * X[:, 0])).astype(float)
    with pytest.warns(UnboundedLikelihoodWarning, match="log_dispersion moved"):
        m = JointLikelihoodRegressor("negative_binomial_spread").fit(X, y)
    assert m.predict_raw(X)[:, 1].min() < -25
    # a ridge penalty keeps it finite, and no warning is given
    import warnings as _w

    with _w.catch_warnings():
        _w.simplefilter("error")
        mp = JointLikelihoodRegressor("negative_binomial_spread", alpha=0.01).fit(X, y)
    assert mp.predict_raw(X)[:, 1].min() > -25
