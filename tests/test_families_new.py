"""tweedie, negative_binomial, student_t, lognormal and beta against outside references.

* nll against scipy.stats (nbinom, t, lognorm, beta logpmf / logpdf) to 1e-10 relative
  (relative to max(1, |nll|), as in test_families_reference.py);
* tweedie against numerical integration (scipy.integrate.quad): P(Y = 0) + integral of the
  density over y > 0 equals 1 to 1e-8, the mean is mu and the variance phi mu^p, on a grid of
  (mu, phi, p); P(Y = 0) = exp(-mu^(2-p) / (phi (2-p))) exactly; the series against a brute-force
  sum of every term, and against statsmodels' Tweedie log-likelihood (which evaluates the same
  normalising term with scipy.special.wright_bessel);
* gradients and Hessians by the public checker lossfam.testing.verify_family on
  hypothesis-drawn rows (fourth-order central differences; surrogate Hessians positive);
* deviances, baselines, nuisance fits and the predictive laws against scipy and scikit-learn.
"""
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp
from scipy import integrate, optimize, special, stats

import lossfam
from lossfam.families import TweedieLaw, tweedie_power_profile
from lossfam.families import tweedie as tweedie_module
from lossfam.testing import verify_family

pytestmark = pytest.mark.filterwarnings("error")

NEW = ("tweedie", "negative_binomial", "student_t", "lognormal", "beta")


def assert_rel(actual, expected, rtol=1e-10):
    actual, expected = np.asarray(actual, dtype=float), np.asarray(expected, dtype=float)
    assert np.all(np.isfinite(actual)), "non-finite values"
    err = np.abs(actual - expected) / np.maximum(1.0, np.abs(expected))
    assert err.max() <= rtol, f"max relative error {err.max():.3e} at row {err.argmax()}"


# ---------------------------------------------------------------------------- nll vs scipy.stats
@pytest.mark.parametrize("alpha", [1e-4, 0.05, 1.0, 30.0])
def test_negative_binomial_nll_is_scipy_nbinom(rng, alpha):
    raw = rng.uniform(-8.0, 8.0, 3000)
    mu = np.exp(raw)
    y = rng.negative_binomial(1.0 / alpha, 1.0 / (1.0 + alpha * mu)).astype(float)
    f = lossfam.family("negative_binomial", dispersion=alpha)
    # scipy.stats.nbinom(n, p): P(k) = C(k+n-1, k) p^n (1-p)^k; NB2 with n = 1/alpha, p = 1/(1+alpha mu)
    ref = -stats.nbinom.logpmf(y, 1.0 / alpha, 1.0 / (1.0 + alpha * mu))
    assert_rel(f.nll(y, raw), ref)
    # the law's moments; scipy forms 1 - p = alpha mu / (1 + alpha mu) by a subtraction, which
    # costs it digits when alpha mu is small, so they are compared where alpha mu > 1e-3
    big = alpha * mu > 1e-3
    law = f.distribution(raw[big])
    assert_rel(law.mean() / mu[big], np.ones(big.sum()), 1e-10)
    assert_rel(law.var() / (mu + alpha * mu**2)[big], np.ones(big.sum()), 1e-10)


def test_negative_binomial_tends_to_poisson():
    # alpha -> 0: the Poisson law (the gamma frailty degenerates); scipy.stats.poisson as reference
    y = np.arange(0.0, 40.0)
    raw = np.full_like(y, np.log(7.5))
    f = lossfam.family("negative_binomial", dispersion=1e-9)
    assert_rel(f.nll(y, raw), -stats.poisson.logpmf(y, 7.5), 1e-7)


@pytest.mark.parametrize("df,scale", [(0.7, 1.0), (4.0, 0.01), (4.0, 3.0), (60.0, 25.0)])
def test_student_t_nll_is_scipy_t(rng, df, scale):
    raw = rng.uniform(-1e5, 1e5, 3000)
    y = raw + scale * rng.standard_t(df, size=raw.size)
    f = lossfam.family("student_t", df=df, scale=scale)
    assert_rel(f.nll(y, raw), -stats.t.logpdf(y, df, loc=raw, scale=scale))


@pytest.mark.parametrize("sigma", [0.05, 1.0, 4.0])
def test_lognormal_nll_is_scipy_lognorm(rng, sigma):
    raw = rng.uniform(-200.0, 200.0, 3000)
    y = np.exp(raw + sigma * rng.normal(size=raw.size))
    f = lossfam.family("lognormal", scale=sigma)
    # scipy.stats.lognorm(s=sigma, scale=e^raw): log y ~ N(raw, sigma^2), density in y (Jacobian 1/y)
    assert_rel(f.nll(y, raw), -stats.lognorm.logpdf(y, sigma, scale=np.exp(raw)))
    assert_rel(f.inverse_link(raw[:50]), stats.lognorm.median(sigma, scale=np.exp(raw[:50])), 1e-13)


@pytest.mark.parametrize("phi", [0.3, 2.0, 50.0, 4000.0])
def test_beta_nll_is_scipy_beta(rng, phi):
    raw = rng.uniform(-6.0, 6.0, 3000)
    mu = special.expit(raw)
    y = rng.beta(mu * phi, (1 - mu) * phi)
    y = np.clip(y, 1e-300, 1 - 1e-16)  # draws can round to 0 or 1
    f = lossfam.family("beta", precision=phi)
    # scipy.stats.beta(a, b) with a = mu phi, b = (1 - mu) phi (Ferrari and Cribari-Neto 2004, eq. 2)
    assert_rel(f.nll(y, raw), -stats.beta.logpdf(y, mu * phi, (1 - mu) * phi))
    assert_rel(f.distribution(raw).var(), mu * (1 - mu) / (1 + phi), 1e-11)


def test_beta_nll_finite_for_extreme_raw():
    f = lossfam.family("beta", precision=3.0)
    y = np.array([0.3, 0.3, 1e-12, 1 - 1e-9])
    raw = np.array([-1e4, 1e4, -800.0, 800.0])
    nll = f.nll(y, raw)
    g, h = f.grad_hess(y, raw)
    assert np.all(np.isfinite(nll)) and np.all(np.isfinite(g)) and np.all(h > 0)
    # far out, lgamma(a) ~ -log a = -log(phi) - raw for raw -> -inf, and b -> phi
    assert abs(nll[0] - (1e4 - np.log(3.0) + np.log(0.3) - 2.0 * np.log(0.7))) < 1e-10 * 1e4


# ---------------------------------------------------------------------------- tweedie density
_LOG_TINY = float(np.log(np.finfo(float).tiny))


def _tweedie_integrals(p, phi, mu):
    """(P0 + int f, int y f, int (y - mu)^2 f) over y > 0 by scipy.integrate.quad in t = log y."""
    f = lossfam.family("tweedie", power=p, dispersion=phi)
    raw = np.array([np.log(mu)])

    def density_in_log_y(t, k):
        if t > 700.0:
            return 0.0  # e^t would overflow; the density is far below 1e-300 there
        y = np.exp(t)
        d = float(np.exp(-f.nll(np.array([y]), raw)[0] + t))  # dy = y dt
        if d == 0.0:
            return 0.0
        return d * (1.0 if k == 0 else (y if k == 1 else (y - mu) ** 2))

    sd = np.sqrt(phi * mu**p)
    cuts = sorted({_LOG_TINY, np.log(mu) - 3.0, np.log(mu), np.log(mu + sd), np.log(mu + 60 * sd + 50)})
    out = []
    for k in range(3):
        total = sum(integrate.quad(density_in_log_y, a, b, args=(k,), limit=500, epsabs=1e-14, epsrel=1e-13)[0]
                    for a, b in zip(cuts[:-1], cuts[1:]))
        total += integrate.quad(density_in_log_y, cuts[-1], np.inf, args=(k,), epsabs=1e-14)[0]
        out.append(total)
    p0 = np.exp(-mu ** (2 - p) / (phi * (2 - p)))
    return p0 + out[0], out[1], out[2] + p0 * mu**2


@pytest.mark.parametrize("p", [1.1, 1.5, 1.9])
@pytest.mark.parametrize("phi", [0.05, 1.0, 20.0])
@pytest.mark.parametrize("mu", [0.01, 1.0, 50.0])
def test_tweedie_density_integrates_to_one_with_mean_mu_and_variance_phi_mu_p(p, phi, mu):
    # Quadrature over y > 0 (in log y, from the smallest normal float: the density has an
    # integrable y^(a-1) singularity at 0, whose mass below e^-708 is < 1e-30 here) plus the atom.
    total, mean, var = _tweedie_integrals(p, phi, mu)
    assert abs(total - 1.0) < 1e-8
    assert abs(mean - mu) < 1e-8 * mu
    assert abs(var - phi * mu**p) < 1e-7 * phi * mu**p


def test_tweedie_zero_mass_is_exact(rng):
    # P(Y = 0) = P(N = 0) = exp(-lam), lam = mu^(2-p) / (phi (2-p)) (Poisson number of gamma amounts)
    for p in (1.01, 1.3, 1.7, 1.99):
        for phi in (0.01, 1.0, 100.0):
            raw = rng.uniform(-10, 10, 200)
            f = lossfam.family("tweedie", power=p, dispersion=phi)
            lam = np.exp((2 - p) * raw) / (phi * (2 - p))
            assert_rel(f.nll(np.zeros(200), raw) / lam, np.ones(200), 4e-16)  # equal to rounding
            assert_rel(f.distribution(raw).zero_mass(), np.exp(-lam), 1e-15)


def _brute_force_log_series(y, p, phi):
    """log sum_j W_j over every j in a window 60 sd wide (Dunn and Smyth 2005, eq. 4)."""
    z, a = tweedie_module._series_z(np.asarray(y, dtype=float), p, phi)
    out = []
    for zz in np.atleast_1d(z):
        js = np.exp((zz - a * np.log(a)) / (1 + a))
        sd = np.sqrt(js / (1 + a))
        j = np.arange(max(1, int(js - 60 * sd - 60)), int(js + 80 * sd + 200) + 1, dtype=float)
        out.append(special.logsumexp(j * zz - special.gammaln(j + 1) - special.gammaln(a * j)))
    return np.array(out)


@pytest.mark.parametrize("p", [1.01, 1.1, 1.5, 1.9, 1.995])
@pytest.mark.parametrize("phi", [1e-3, 0.1, 1.0, 50.0])
def test_tweedie_series_against_every_term(p, phi):
    # rows from j* < 1 to j* ~ 1e6 exercise both the windowed sum and the integral form
    y = np.array([1e-8, 1e-3, 0.1, 1.0, 7.0, 300.0, 1e4, 2e5])
    assert_rel(tweedie_module.log_series(y, p, phi), _brute_force_log_series(y, p, phi), 1e-13)


@pytest.mark.parametrize("p", [1.5, 1.8])
@pytest.mark.parametrize("phi", [0.3, 1.0, 4.0])
def test_tweedie_nll_matches_statsmodels(p, phi):
    # statsmodels.genmod.families.Tweedie(eql=False).loglike_obs: the exact log-likelihood, with the
    # series written as scipy.special.wright_bessel (an independent implementation)
    sm = pytest.importorskip("statsmodels.api")
    y = np.array([0.0, 1e-3, 0.1, 1.0, 3.0, 20.0, 100.0, 0.0])
    mu = np.array([0.5, 1.0, 2.0, 1.0, 3.0, 10.0, 80.0, 30.0])
    ref = -sm.families.Tweedie(var_power=p, eql=False).loglike_obs(y, mu, scale=phi)
    assert_rel(lossfam.family("tweedie", power=p, dispersion=phi).nll(y, np.log(mu)), ref)


def test_tweedie_nll_is_finite_for_extreme_legal_inputs():
    for p in (1.001, 1.5, 1.999):
        for phi in (1e-6, 1.0, 1e6):
            f = lossfam.family("tweedie", power=p, dispersion=phi)
            y = np.array([0.0, 1e-300, 1e-30, 1e-5, 1.0, 1e5, 1e30, 1e200])
            for raw_value in (-300.0, -20.0, 0.0, 20.0, 300.0):
                raw = np.full(y.shape, raw_value)
                nll = f.nll(y, raw)
                assert not np.any(np.isnan(nll)), (p, phi, raw_value, nll)
                g, h = f.grad_hess(y, raw)
                assert not np.any(np.isnan(g)) and not np.any(np.isnan(h)) and np.all(h >= 0)
            # at the mean the nll is finite for every target
            assert np.all(np.isfinite(f.nll(y[1:], np.log(y[1:]))))


def test_tweedie_deviance_is_scikit_learn_mean_tweedie_deviance(rng):
    metrics = pytest.importorskip("sklearn.metrics")
    raw = rng.normal(size=600)
    for p in (1.2, 1.5, 1.8):
        f = lossfam.family("tweedie", power=p)
        y = f.distribution(raw).rvs(random_state=rng)
        # sklearn.metrics.mean_tweedie_deviance(power=p): the unit deviance of the Tweedie family
        assert_rel(f.deviance(y, raw).mean(), metrics.mean_tweedie_deviance(y, np.exp(raw), power=p), 1e-11)


# ---------------------------------------------------------------------------- tweedie law
@pytest.mark.parametrize("p,phi,mu", [(1.2, 0.5, 3.0), (1.5, 2.0, 0.4), (1.8, 1.0, 20.0)])
def test_tweedie_law_cdf_ppf_against_quadrature(p, phi, mu):
    law = TweedieLaw(np.array([mu]), p, phi)
    f = lossfam.family("tweedie", power=p, dispersion=phi)
    raw = np.array([np.log(mu)])

    def dens_log(t):
        y = np.exp(t)
        return float(np.exp(-f.nll(np.array([y]), raw)[0] + t))

    p0 = float(law.zero_mass()[0])
    for y in (0.3 * mu, mu, 3.0 * mu):
        ref = p0 + integrate.quad(dens_log, _LOG_TINY, np.log(min(y, mu)), limit=500, epsabs=1e-14)[0]
        if y > mu:
            ref += integrate.quad(dens_log, np.log(mu), np.log(y), limit=500, epsabs=1e-14)[0]
        assert abs(law.cdf(y)[0] - ref) < 1e-9
        assert abs(law.sf(y)[0] - (1.0 - ref)) < 1e-9
    q = np.array([0.5 * p0, p0, p0 + 1e-6, 0.5 * (1 + p0), 0.99, 0.999999])
    x = np.array([law.ppf(qq)[0] for qq in q])
    assert np.all(x[:2] == 0.0)  # inside the atom: the smallest y with F(y) >= q is 0
    assert_rel(law.cdf(x[2:]), q[2:], 1e-10)
    lo, hi = law.interval(0.8)
    assert lo[0] <= hi[0]
    assert law.cdf(hi)[0] - (law.cdf(lo)[0] if lo[0] > 0 else 0.0) >= 0.8 - 1e-9


def test_tweedie_law_draws_match_moments_and_zero_mass():
    mu, p, phi, n = 2.0, 1.4, 2.0, 400_000
    law = TweedieLaw(np.full(n, mu), p, phi)
    y = law.rvs(random_state=5)
    p0 = float(law.zero_mass()[0])
    var = phi * mu**p
    # five standard errors of each sample statistic (the central limit theorem)
    assert abs(y.mean() - mu) < 5 * np.sqrt(var / n)
    assert abs(np.mean(y == 0) - p0) < 5 * np.sqrt(p0 * (1 - p0) / n)
    assert abs(y.var() / var - 1) < 0.03
    u = TweedieLaw(np.full(20000, mu), p, phi).cdf(y[:20000])
    # among positive draws, F(Y) is uniform on (P0, 1): Kolmogorov-Smirnov against that uniform
    pos = u[y[:20000] > 0]
    assert stats.kstest((pos - p0) / (1 - p0), "uniform").pvalue > 1e-3


def test_tweedie_power_profile_recovers_the_power(rng):
    n = 6000
    raw = 0.5 + 0.8 * rng.normal(size=n)
    y = TweedieLaw(np.exp(raw), 1.35, 1.5).rvs(random_state=rng)
    fam, table = tweedie_power_profile(y, raw)
    assert abs(fam.power - 1.35) < 0.05 and abs(fam.dispersion / 1.5 - 1) < 0.1
    # the chosen p is at least as good as every grid point
    best = np.mean(fam.nll(y, raw))
    assert best <= table["nll"].min() + 1e-12


# ---------------------------------------------------------------------------- derivatives
floats = dict(allow_nan=False, allow_infinity=False)
SETTINGS = settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])


@st.composite
def rows(draw, name):
    n = draw(st.integers(2, 40))
    arr = lambda el: draw(hnp.arrays(np.float64, n, elements=el))  # noqa: E731
    if name == "tweedie":
        raw = arr(st.floats(-15.0, 15.0, **floats))
        y = arr(st.one_of(st.just(0.0), st.floats(1e-6, 1e6, **floats)))
        y[0] = max(y[0], 1.0)  # the baseline needs one positive amount
    elif name == "negative_binomial":
        # from raw = -5 up: below, scipy.stats.nbinom (the checker's law) forms 1 - p with p ~ 1
        # and loses the digits the checker needs (our nll is checked there against the Poisson limit)
        raw = arr(st.floats(-5.0, 15.0, **floats))
        y = arr(st.integers(0, 10**5).map(float))
        y[0] = max(y[0], 1.0)
    elif name == "lognormal":
        raw = arr(st.floats(-30.0, 30.0, **floats))
        y = arr(st.floats(1e-8, 1e8, **floats))
    elif name == "beta":
        raw = arr(st.floats(-30.0, 30.0, **floats))
        y = arr(st.floats(1e-9, 1 - 1e-9, **floats))
    else:  # student_t: targets around a common location, so the constant fit has one clear minimum
        # (the checker's difference step grows with |raw|; large locations are checked against scipy)
        centre = draw(st.floats(-1.0, 1.0, **floats))
        raw = centre + arr(st.floats(-5.0, 5.0, **floats))
        y = centre + arr(st.floats(-3.0, 3.0, **floats))
    return y, raw


PARAMS = [
    ("tweedie", {}), ("tweedie", {"power": 1.05, "dispersion": 0.2}), ("tweedie", {"power": 1.9, "dispersion": 7.0}),
    ("negative_binomial", {}), ("negative_binomial", {"dispersion": 0.01}), ("negative_binomial", {"dispersion": 40.0}),
    ("student_t", {}), ("student_t", {"df": 1.0, "scale": 0.5}), ("student_t", {"df": 30.0, "scale": 3.0}),
    ("lognormal", {}), ("lognormal", {"scale": 0.2}), ("lognormal", {"scale": 3.0}),
    ("beta", {}), ("beta", {"precision": 0.5}), ("beta", {"precision": 200.0}),
]


@pytest.mark.parametrize("name,params", PARAMS)
def test_public_checker_passes_on_drawn_rows(name, params):
    fam = lossfam.family(name, **params)

    @SETTINGS
    @given(rows(name))
    def check(case):
        y, raw = case
        verify_family(fam, y, raw)  # finite differences, baseline, deviance, law (lossfam.testing)

    check()


def test_beta_fisher_hessian_is_the_expected_observed_hessian(rng):
    # The surrogate is E[exact Hessian] under the model; the exact one is the derivative of the
    # gradient (central differences), averaged over many draws from the law at fixed raw.
    f = lossfam.family("beta", precision=6.0)
    raw = np.full(200_000, 0.7)
    y = f.distribution(raw).rvs(random_state=rng)
    exact = (f.grad_hess(y, raw + 1e-5)[0] - f.grad_hess(y, raw - 1e-5)[0]) / 2e-5
    h = f.grad_hess(y[:1], raw[:1])[1][0]
    assert abs(exact.mean() / h - 1) < 0.02


def test_student_t_surrogate_majorises_and_is_scale_aware():
    f = lossfam.family("student_t", df=3.0, scale=2.0)
    y = np.array([0.0, 0.5, 4.0, -30.0])
    raw0 = np.array([0.3, -1.0, 0.0, 2.0])
    g, h = f.grad_hess(y, raw0)
    # the quadratic with the surrogate curvature lies above the nll (Lange, Little and Taylor 1989)
    for d in np.linspace(-50, 50, 201):
        quad = f.nll(y, raw0) + g * d + 0.5 * h * d * d
        assert np.all(quad >= f.nll(y, raw0 + d) - 1e-12)
    # at r = 0 it is the exact Hessian (nu + 1) / (nu s^2)
    assert_rel(f.grad_hess(np.zeros(1), np.zeros(1))[1], [4.0 / 12.0], 1e-15)
    # scaling y, raw and s by 1000 scales the Newton step by 1000
    big = f.with_params(scale=2000.0)
    g2, h2 = big.grad_hess(1000 * y, 1000 * raw0)
    assert_rel(g2.sum() / h2.sum(), 1000 * g.sum() / h.sum(), 1e-12)


# ---------------------------------------------------------------------------- deviance, baseline, nuisance
@pytest.mark.parametrize("name", NEW)
def test_deviance_zero_at_the_saturated_prediction(rng, name):
    f = lossfam.family(name)
    raw = rng.normal(scale=0.5, size=300)
    y = np.asarray(f.distribution(raw).rvs(random_state=rng), dtype=float)
    if name == "beta":
        y = np.clip(y, 1e-6, 1 - 1e-6)
    if name in ("tweedie", "negative_binomial"):
        y = y[y > 0]
    if name == "beta":  # the beta likelihood of one row peaks where digamma(a) - digamma(b) = logit y
        sat = np.array([optimize.brentq(lambda c: special.digamma(special.expit(c)) - special.digamma(special.expit(-c))
                                        - special.logit(v), -60, 60, xtol=1e-14) for v in y])
    else:
        sat = f.link(y)
    assert np.all(f.deviance(y, sat) <= 1e-10 * np.maximum(1, y**2))
    assert np.all(f.deviance(y, sat + 0.2) > 0)


def test_negative_binomial_deviance_is_twice_the_nll_excess(rng):
    f = lossfam.family("negative_binomial", dispersion=0.7)
    raw = rng.normal(size=500)
    y = f.distribution(raw).rvs(random_state=rng).astype(float)
    # saturated model mu = y: scipy.stats.nbinom at mean y (a mass 1 at 0 when y = 0)
    sat = -stats.nbinom.logpmf(y, 1 / 0.7, 1 / (1 + 0.7 * y))
    assert_rel(f.deviance(y, raw), 2 * (f.nll(y, raw) - sat), 1e-9)


@pytest.mark.parametrize("name", NEW)
def test_baseline_with_offset_is_the_minimiser(rng, name):
    f = lossfam.family(name)
    n = 800
    offset = rng.normal(scale=0.3, size=n)
    eta = 0.4 + offset
    y = np.asarray(f.distribution(eta).rvs(random_state=rng), dtype=float)
    if name == "beta":
        y = np.clip(y, 1e-9, 1 - 1e-9)
    w = rng.uniform(0.2, 2.0, n)
    c = f.baseline(y, w, offset=offset)

    def mean_nll(v):
        return np.sum(w * f.nll(y, v + offset)) / np.sum(w)

    # scipy.optimize.minimize_scalar on the same objective
    ref = optimize.minimize_scalar(mean_nll, bracket=(c - 1, c + 1), tol=1e-12).x
    assert mean_nll(c) <= mean_nll(ref) + 1e-12
    assert abs(c - ref) < 1e-5


def test_nuisance_fits_against_scipy(rng):
    n = 4000
    raw = rng.normal(size=n)
    # lognormal: scipy.stats.lognorm.fit with the median fixed (floc=0, fscale=e^raw on log-shifted data)
    ylog = np.exp(raw + 0.7 * rng.normal(size=n))
    s = lossfam.family("lognormal").fit_nuisance(ylog, raw).scale
    assert_rel(s, stats.norm.fit(np.log(ylog) - raw, floc=0.0)[1], 1e-12)
    # student_t: scipy.optimize on scipy.stats.t's log-likelihood (df fixed, then df free)
    yt = raw + 2.5 * rng.standard_t(5, size=n)
    f = lossfam.family("student_t", df=5.0).fit_nuisance(yt, raw)
    ref_scale = np.exp(optimize.minimize_scalar(
        lambda ls: -np.sum(stats.t.logpdf(yt, 5.0, loc=raw, scale=np.exp(ls))), bracket=(0, 2), tol=1e-12).x)
    assert abs(f.scale / ref_scale - 1) < 1e-7
    g = lossfam.family("student_t", estimate_df=True).fit_nuisance(yt, raw)
    ref = optimize.minimize(lambda v: -np.sum(stats.t.logpdf(yt, np.exp(v[0]), loc=raw, scale=np.exp(v[1]))),
                            [np.log(4.0), np.log(2.0)], method="Nelder-Mead",
                            options={"xatol": 1e-10, "fatol": 1e-12, "maxiter": 4000})
    assert abs(g.df / np.exp(ref.x[0]) - 1) < 1e-5 and abs(g.scale / np.exp(ref.x[1]) - 1) < 1e-5
    # beta: scipy.stats.beta.fit cannot fix the mean, so the reference is scipy.optimize on the nll
    mu = special.expit(raw)
    yb = rng.beta(mu * 8.0, (1 - mu) * 8.0)
    phi = lossfam.family("beta").fit_nuisance(yb, raw).precision
    ref = np.exp(optimize.minimize_scalar(
        lambda lp: -np.sum(stats.beta.logpdf(yb, mu * np.exp(lp), (1 - mu) * np.exp(lp))),
        bracket=(0, 3), tol=1e-12).x)
    assert abs(phi / ref - 1) < 1e-6
    # negative_binomial: scipy.optimize on scipy.stats.nbinom's log-likelihood
    yc = rng.negative_binomial(1 / 0.4, 1 / (1 + 0.4 * np.exp(raw))).astype(float)
    a = lossfam.family("negative_binomial").fit_nuisance(yc, raw).dispersion
    ref = np.exp(optimize.minimize_scalar(
        lambda la: -np.sum(stats.nbinom.logpmf(yc, np.exp(-la), 1 / (1 + np.exp(la + raw)))),
        bracket=(-2, 0), tol=1e-12).x)
    assert abs(a / ref - 1) < 1e-6
    # tweedie: scipy.optimize on statsmodels' exact Tweedie log-likelihood (scipy.special.wright_bessel)
    sm = pytest.importorskip("statsmodels.api")
    yw = TweedieLaw(np.exp(raw), 1.6, 2.5).rvs(random_state=rng)
    d = lossfam.family("tweedie", power=1.6).fit_nuisance(yw, raw).dispersion
    fam_sm = sm.families.Tweedie(var_power=1.6, eql=False)
    ref = np.exp(optimize.minimize_scalar(
        lambda lp: -np.sum(fam_sm.loglike_obs(yw, np.exp(raw), scale=np.exp(lp))), bracket=(0, 2), tol=1e-12).x)
    assert abs(d / ref - 1) < 1e-6


def test_negative_binomial_without_overdispersion_has_no_dispersion(rng):
    raw = rng.normal(size=3000)
    y = np.round(np.exp(raw))  # counts closer to their means than Poisson counts: underdispersed
    with pytest.raises(ValueError, match="not overdispersed"):
        lossfam.family("negative_binomial").fit_nuisance(y, raw)


# ---------------------------------------------------------------------------- support and parameters
@pytest.mark.parametrize("name,y,pattern", [
    ("tweedie", [1.0, -0.5, 2.0], r"tweedie: y must be finite and >= 0; 1 row outside, e\.g\. row \[1\] = \[-0\.5\]"),
    ("negative_binomial", [1.0, 2.5, 3.0], r"negative_binomial: y must be a non-negative integer; 1 row outside, e\.g\. row \[1\] = \[2\.5\]"),
    ("negative_binomial", [-1.0, 2.0], r"negative_binomial: y must be a non-negative integer.*row \[0\] = \[-1\.0\]"),
    ("student_t", [0.0, np.nan], r"student_t: y must be a finite real number; 1 row outside, e\.g\. row \[1\] = \[nan\]"),
    ("lognormal", [1.0, 0.0, -2.0], r"lognormal: y must be finite and > 0; 2 rows outside, e\.g\. rows \[1, 2\] = \[0\.0, -2\.0\]"),
    ("beta", [0.5, 0.0, 1.0, 0.2], r"beta: y must be strictly between 0 and 1; 2 rows outside, e\.g\. rows \[1, 2\] = \[0\.0, 1\.0\]"),
])
def test_targets_outside_the_support_are_refused(name, y, pattern):
    f = lossfam.family(name)
    y = np.asarray(y)
    with pytest.raises(ValueError, match=pattern):
        f.nll(y, np.zeros(y.shape))
    if "integer" not in pattern or "-1.0" in pattern:
        with pytest.raises(ValueError, match=pattern.replace("a non-negative integer", "finite and >= 0")):
            f.grad_hess(y, np.zeros(y.shape))


@pytest.mark.parametrize("name,params,pattern", [
    ("tweedie", {"power": 2.0}, r"tweedie: parameter power must be strictly between 1 and 2, got 2\.0"),
    ("tweedie", {"power": 1.0}, r"parameter power must be strictly between 1 and 2, got 1\.0"),
    ("tweedie", {"dispersion": -1.0}, r"tweedie: parameter dispersion must be finite and > 0"),
    ("negative_binomial", {"dispersion": 0.0}, r"negative_binomial: parameter dispersion must be finite and > 0, got 0\.0"),
    ("student_t", {"df": np.inf}, r"student_t: parameter df must be finite and > 0, got inf"),
    ("student_t", {"estimate_df": "yes"}, r"student_t: parameter estimate_df must be True or False"),
    ("beta", {"precision": np.nan}, r"beta: parameter precision must be finite and > 0, got nan"),
    ("lognormal", {"sigma": 1.0}, r"lognormal: unknown parameter\(s\) \['sigma'\]; valid parameters: scale"),
])
def test_bad_parameters(name, params, pattern):
    with pytest.raises(ValueError, match=pattern):
        lossfam.family(name, **params)


def test_negative_binomial_rates_are_accepted_by_the_derivatives():
    f = lossfam.family("negative_binomial", dispersion=0.5)
    y = np.array([0.5, 2.25])
    g, h = f.grad_hess(y, np.zeros(2))
    assert np.allclose(g, (1.0 - y) / 1.5) and np.allclose(h, (1 + 0.5 * y) / 1.5**2)


# ---------------------------------------------------------------------------- diagnostics
def test_randomized_quantile_residuals_for_tweedie_zeros(rng):
    from lossfam import diagnostics

    # Dunn and Smyth (1996), randomized quantile residuals: at an atom u = F(y-) + V P(Y = y), so
    # under the true model u is Uniform(0, 1) and z = Phi^-1(u) is standard normal
    n = 6000
    raw = rng.normal(scale=0.6, size=n)
    f = lossfam.family("tweedie", power=1.6, dispersion=1.5)
    y = f.distribution(raw).rvs(random_state=rng)
    assert 0.1 < np.mean(y == 0) < 0.6
    u = diagnostics.pit(f, y, raw, seed=1)
    z = diagnostics.quantile_residuals(f, y, raw, seed=1)
    assert stats.kstest(u, "uniform").pvalue > 1e-3
    assert stats.kstest(z, "norm").pvalue > 1e-3
    # the zeros are spread over (0, P(Y = 0)) instead of piling up at P(Y = 0)
    p0 = f.distribution(raw).zero_mass()
    zero = y == 0
    assert np.all(u[zero] <= p0[zero]) and np.all(u[zero] > 0)
    assert stats.kstest(u[zero] / p0[zero], "uniform").pvalue > 1e-3
    # positive amounts: u = F(y), no randomisation
    assert_rel(u[~zero], f.distribution(raw[~zero]).cdf(y[~zero]), 1e-12)
    # a wrong model is detected: the same data scored as Poisson-like low dispersion
    z_wrong = diagnostics.quantile_residuals(f.with_params(dispersion=0.3), y, raw, seed=1)
    assert stats.kstest(z_wrong, "norm").pvalue < 1e-6


def test_randomized_quantile_residuals_for_negative_binomial(rng):
    from lossfam import diagnostics

    n = 6000
    raw = 1.0 + rng.normal(scale=0.5, size=n)
    f = lossfam.family("negative_binomial", dispersion=0.8)
    y = f.distribution(raw).rvs(random_state=rng).astype(float)
    z = diagnostics.quantile_residuals(f, y, raw, seed=2)
    assert np.all(np.isfinite(z))
    assert stats.kstest(z, "norm").pvalue > 1e-3
    # overdispersed counts scored as Poisson give residuals far from N(0, 1)
    z_pois = diagnostics.quantile_residuals("poisson", y, raw, seed=2)
    assert stats.kstest(z_pois, "norm").pvalue < 1e-6 and np.std(z_pois) > 1.3
