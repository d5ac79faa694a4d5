"""Inference tables of the linear estimators: standard errors, tests and fit statistics.

Outside references, named beside each check: statsmodels GLM (Newton fit, whose covariance is
the inverse observed information; cov_type="HC0" for the sandwich), scipy.stats log densities,
the asymptotic covariance of regression quantiles (Koenker and Bassett, 1978, Econometrica 46,
33-50, Theorem 4.1: tau (1 - tau) / f(F^-1(tau))^2 (X^T X)^-1 for iid errors).
"""
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy import sparse, stats

import lossfam
from lossfam.sklearn import LikelihoodClassifier, LikelihoodRegressor

SM_FAMILY = {
    "poisson": lambda: sm.families.Poisson(),
    "bernoulli": lambda: sm.families.Binomial(),
    "gaussian": lambda: sm.families.Gaussian(),
    "gamma": lambda: sm.families.Gamma(sm.families.links.Log()),
}


def data(family, n=500, seed=0):
    rng = np.random.default_rng(seed)
    X = rng.standard_normal((n, 3))
    eta = 0.3 + X @ [0.3, -0.2, 0.1]
    y = {"poisson": lambda: rng.poisson(np.exp(eta)).astype(float),
         "bernoulli": lambda: (rng.random(n) < 1 / (1 + np.exp(-eta))).astype(float),
         "gaussian": lambda: eta + rng.normal(size=n),
         "gamma": lambda: rng.gamma(2.0, np.exp(eta) / 2.0)}[family]()
    return X, y, rng.uniform(0.5, 2.0, n)


@pytest.mark.parametrize("family", list(SM_FAMILY))
def test_standard_errors_equal_statsmodels_glm(family):
    X, y, w = data(family)
    est = LikelihoodRegressor(family=family).fit(X, y, sample_weight=w)
    # statsmodels GLM fitted by Newton's method: bse from the inverse observed information
    # (var_weights multiply each row's log-likelihood, as sample_weight does here)
    ref = sm.GLM(y, sm.add_constant(X), family=SM_FAMILY[family](), var_weights=w).fit(
        method="newton", tol=1e-13, maxiter=100)
    if family == "gaussian":  # the same dispersion as statsmodels (Pearson chi^2 / (n - p))
        est.family_ = lossfam.family("gaussian", scale=np.sqrt(ref.scale))
    if family == "gamma":
        est.family_ = lossfam.family("gamma", shape=1.0 / ref.scale)
    table = est.inference(X, y, sample_weight=w)
    np.testing.assert_allclose(table.coef, ref.params, rtol=1e-8)
    np.testing.assert_allclose(table.se, ref.bse, rtol=1e-6)
    np.testing.assert_allclose(table.z, ref.tvalues, rtol=1e-6)
    np.testing.assert_allclose(table.p_value, ref.pvalues, rtol=1e-5, atol=1e-300)
    np.testing.assert_allclose(np.column_stack([table.ci_low, table.ci_high]), ref.conf_int(), rtol=1e-6)
    # scipy.stats log densities at the fitted means (weights count each row's log-density)
    mu, fam = est.predict(X), est.family_
    logpdf = {"poisson": lambda: stats.poisson.logpmf(y, mu),
              "bernoulli": lambda: stats.bernoulli.logpmf(y, mu),
              "gaussian": lambda: stats.norm.logpdf(y, mu, fam.params.get("scale", 1.0)),
              "gamma": lambda: stats.gamma.logpdf(y, fam.params.get("shape", 1.0),
                                                  scale=mu / fam.params.get("shape", 1.0))}[family]()
    np.testing.assert_allclose(table.log_likelihood, np.dot(w, logpdf), rtol=1e-10)
    k = 4 + (family in ("gaussian", "gamma"))
    np.testing.assert_allclose(table.aic, 2 * k - 2 * table.log_likelihood, rtol=1e-12)
    np.testing.assert_allclose(table.bic, k * np.log(500) - 2 * table.log_likelihood, rtol=1e-12)
    # statsmodels: deviance and null deviance (same weights); D^2 = 1 - D / D0
    if family in ("poisson", "bernoulli", "gaussian"):
        np.testing.assert_allclose(table.deviance, ref.deviance * (1.0 if family != "gaussian" else
                                                                   1.0), rtol=1e-8)
        np.testing.assert_allclose(table.null_deviance, ref.null_deviance, rtol=1e-8)
    np.testing.assert_allclose(table.d2, 1 - table.deviance / table.null_deviance, rtol=1e-12)


def test_sandwich_equals_statsmodels_hc0_and_classifier_matches_regressor():
    X, y, _ = data("poisson")
    est = LikelihoodRegressor(family="poisson").fit(X, y)
    # statsmodels GLM, cov_type="HC0": White's heteroskedasticity-consistent sandwich
    ref = sm.GLM(y, sm.add_constant(X), family=sm.families.Poisson()).fit(cov_type="HC0", tol=1e-13)
    np.testing.assert_allclose(est.inference(X, y, method="sandwich").se, ref.bse, rtol=1e-6)
    Xb, yb, _ = data("bernoulli")
    labels = np.where(yb == 1, "yes", "no")
    clf = LikelihoodClassifier(alpha=0.0).fit(Xb, labels)
    reg = LikelihoodRegressor(family="bernoulli").fit(Xb, yb)
    np.testing.assert_allclose(clf.inference(Xb, labels).se, reg.inference(Xb, yb).se, rtol=1e-8)


@pytest.mark.parametrize("family, tau", [("laplace", 0.5), ("asymmetric_laplace", 0.8)])
def test_quantile_kernel_sandwich_agrees_with_the_asymptotic_covariance(family, tau):
    # Koenker and Bassett (1978), Theorem 4.1: with iid errors of density f the covariance of a
    # regression quantile is tau (1 - tau) / f(F^-1(tau))^2 (X^T X)^-1.  The Powell kernel
    # sandwich estimates it without knowing f; with 20000 standard normal errors it should be
    # within a few percent (the bandwidth's sampling error is O(n^-1/3)).
    rng = np.random.default_rng(3)
    n = 20000
    X = rng.standard_normal((n, 2))
    y = 1 + X @ [0.5, -1.0] + rng.standard_normal(n)
    params = {"quantile": tau} if family == "asymmetric_laplace" else None
    est = LikelihoodRegressor(family=family, family_params=params).fit(X, y)
    table = est.inference(X, y)
    assert table.method == "kernel-sandwich"
    A = np.column_stack([np.ones(n), X])
    f = stats.norm.pdf(stats.norm.ppf(tau))
    se_theory = np.sqrt(tau * (1 - tau) / f**2 * np.diag(np.linalg.inv(A.T @ A)))
    np.testing.assert_allclose(table.se, se_theory, rtol=0.08)
    assert "Powell kernel sandwich" in str(table)
    with pytest.raises(ValueError, match="'information' standard errors are not available for"):
        est.inference(X, y, method="information")


def test_table_as_text_dict_and_frame_and_sparse_input():
    X, y, _ = data("poisson", n=300)
    frame = pd.DataFrame(X, columns=["age", "income", "visits"])
    est = LikelihoodRegressor(family="poisson").fit(frame, y)
    table = est.inference(frame, y, level=0.9)
    text = str(table)
    for piece in ("family: poisson", "log-likelihood", "AIC", "BIC", "D^2", "iterations",
                  "intercept", "income", "90% low", "p>|z|", "inverse observed information"):
        assert piece in text, piece
    d = table.as_dict()
    assert set(d["coefficients"]) == {"intercept", "age", "income", "visits"}
    assert d["n_iter"] == est.n_iter_ and d["n_rows"] == 300
    df = table.as_frame()
    assert list(df.index) == ["intercept", "age", "income", "visits"]
    np.testing.assert_allclose(df["se"].to_numpy(), table.se)
    # reference: the dense table (a 90% interval is coef -/+ 1.6449 se, standard normal quantile)
    np.testing.assert_allclose(table.ci_high - table.coef, stats.norm.ppf(0.95) * table.se, rtol=1e-12)
    sp = LikelihoodRegressor(family="poisson").fit(sparse.csr_matrix(X), y)
    np.testing.assert_allclose(sp.inference(sparse.csr_matrix(X), y).se,
                               LikelihoodRegressor(family="poisson").fit(X, y).inference(X, y).se, rtol=1e-8)


def test_inference_refuses_penalised_fits_and_bad_levels():
    X, y, _ = data("gaussian", n=100)
    with pytest.raises(ValueError, match="ridge-penalised"):
        LikelihoodRegressor(alpha=0.1).fit(X, y).inference(X, y)
    est = LikelihoodRegressor().fit(X, y)
    with pytest.raises(ValueError, match="level must be a number strictly between 0 and 1"):
        est.inference(X, y, level=1.5)
    with pytest.raises(ValueError, match="method must be one of"):
        est.inference(X, y, method="bootstrap")
