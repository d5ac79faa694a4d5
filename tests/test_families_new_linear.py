"""The five newer families in the linear estimator, against statsmodels and scipy.optimize.

Data sets that ship inside statsmodels (statsmodels.datasets):
* ``fair`` (time spent in extramarital affairs: 6366 rows, 68% exact zeros) for tweedie, the
  classic use of a compound Poisson-gamma GLM;
* ``randhie`` (RAND health insurance experiment, outpatient visits ``mdvis``: 20190 rows, mean 2.9,
  variance 20.3) for negative_binomial;
* ``star98`` (share of pupils above the national median, NABOVE / (NABOVE + NBELOW), 303 districts,
  all strictly inside (0, 1)) for beta;
* ``stackloss`` (Brownlee's stack loss data, 21 rows, a classic outlier set) for student_t.
"""
import numpy as np
import pytest
from scipy import optimize, stats

from lossfam.sklearn import LikelihoodRegressor

sm = pytest.importorskip("statsmodels.api")


def _standardised(X):
    return (X - X.mean(axis=0)) / X.std(axis=0)


@pytest.mark.parametrize("power", [1.2, 1.5, 1.8])
def test_tweedie_coefficients_match_statsmodels_glm(power):
    d = sm.datasets.fair.load_pandas().data
    X = d[["rate_marriage", "age", "yrs_married", "children", "religious", "educ"]].to_numpy(float)
    y = d["affairs"].to_numpy(float)
    # statsmodels GLM(Tweedie(var_power=p), log link) by IRLS: at fixed p the score equations
    # sum (y - mu) mu^(1-p) x = 0 do not involve the dispersion, as in our maximum likelihood fit
    ref = sm.GLM(y, sm.add_constant(X), family=sm.families.Tweedie(var_power=power, link=sm.families.links.Log())
                 ).fit(tol=1e-13, maxiter=200)
    est = LikelihoodRegressor(family="tweedie", family_params={"power": power}).fit(X, y)
    np.testing.assert_allclose(np.r_[est.intercept_, est.coef_], ref.params, rtol=0, atol=1e-6)
    assert est.family_.power == power and est.family_.dispersion > 0


def test_negative_binomial_coefficients_and_dispersion_match_statsmodels_nb2():
    r = sm.datasets.randhie.load_pandas().data
    X = r.drop(columns="mdvis").to_numpy(float)
    y = r["mdvis"].to_numpy(float)
    # statsmodels.discrete.discrete_model.NegativeBinomial, NB2: coefficients and alpha by joint ML
    ref = sm.NegativeBinomial(y, sm.add_constant(X), loglike_method="nb2").fit(
        method="newton", maxiter=200, tol=1e-14, disp=0)
    est = LikelihoodRegressor(family="negative_binomial").fit(X, y)
    np.testing.assert_allclose(np.r_[est.intercept_, est.coef_], ref.params[:-1], rtol=0, atol=1e-5)
    assert abs(est.family_.dispersion - ref.params[-1]) < 1e-5


def test_beta_coefficients_and_precision_match_statsmodels_betamodel():
    from statsmodels.othermod.betareg import BetaModel

    s = sm.datasets.star98.load_pandas()
    y = (s.endog["NABOVE"] / (s.endog["NABOVE"] + s.endog["NBELOW"])).to_numpy(float)
    X = _standardised(s.exog.iloc[:, :5].to_numpy(float))
    # statsmodels.othermod.betareg.BetaModel: logit mean link, log link for the precision
    ref = BetaModel(y, sm.add_constant(X)).fit(method="newton", maxiter=200, disp=0)
    est = LikelihoodRegressor(family="beta").fit(X, y)
    np.testing.assert_allclose(np.r_[est.intercept_, est.coef_], ref.params[:-1], rtol=0, atol=1e-5)
    assert abs(est.family_.precision / np.exp(ref.params[-1]) - 1) < 1e-5


@pytest.mark.parametrize("df", [2.0, 4.0])
def test_student_t_matches_a_direct_minimisation(df):
    st = sm.datasets.stackloss.load_pandas().data
    X = _standardised(st[["AIRFLOW", "WATERTEMP", "ACIDCONC"]].to_numpy(float))
    y = st["STACKLOSS"].to_numpy(float)
    A = np.column_stack([np.ones(len(y)), X])

    def nll(theta):  # scipy.stats.t log-likelihood in (intercept, coefficients, log scale)
        return -np.sum(stats.t.logpdf(y, df, loc=A @ theta[:4], scale=np.exp(theta[4])))

    start = np.r_[np.linalg.lstsq(A, y, rcond=None)[0], np.log(np.std(y))]
    ref = optimize.minimize(nll, start, method="BFGS", options={"gtol": 1e-10})
    est = LikelihoodRegressor(family="student_t", family_params={"df": df}, tol=1e-10, max_iter=1000).fit(X, y)
    ours = np.r_[est.intercept_, est.coef_, np.log(est.family_.scale)]
    assert nll(ours) <= ref.fun + 1e-9
    np.testing.assert_allclose(ours, ref.x, rtol=0, atol=1e-5)
    assert est.family_.df == df


@pytest.mark.parametrize("name,draw", [
    ("lognormal", lambda rng, eta: np.exp(eta + 0.8 * rng.normal(size=eta.size))),
    ("student_t", lambda rng, eta: eta + 0.5 * rng.standard_t(3, size=eta.size)),
])
def test_recovers_simulated_coefficients(rng, name, draw):
    # invented data: a known linear raw score; the fit lands within 5 standard errors
    X = rng.normal(size=(4000, 3))
    beta = np.array([0.5, -0.3, 0.0])
    y = draw(rng, 1.0 + X @ beta)
    est = LikelihoodRegressor(family=name).fit(X, y)
    assert np.all(np.abs(est.coef_ - beta) < 5 * 0.8 / np.sqrt(4000))
    if name == "lognormal":
        # sigma^ is the rms of the log residuals (its ML value), not changed by the coefficient fit
        res = np.log(y) - est.predict_raw(X)
        assert abs(est.family_.scale - np.sqrt(np.mean(res**2))) < 1e-12
