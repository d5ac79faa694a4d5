"""The family math against outside references: scipy.stats densities, scipy.special, quadrature,
scikit-learn's deviance metrics, and closed-form estimators.

Every nll is checked against minus the log density or mass of scipy.stats' own implementation of
the law (scipy.stats.norm, laplace, laplace_asymmetric, bernoulli, poisson, gamma), to 1e-10
relative (relative to max(1, |nll|) so values that cross zero are held to 1e-10 absolute).
"""

import numpy as np
import pytest
from scipy import integrate, optimize, special, stats

import lossfam
from lossfam.families import HuberLaw

pytestmark = pytest.mark.filterwarnings("error")  # no overflow / invalid-value warnings anywhere

RTOL = 1e-10


def assert_rel(actual, expected, rtol=RTOL):
    actual, expected = np.asarray(actual), np.asarray(expected)
    scale = np.maximum(1.0, np.abs(expected))
    err = np.abs(actual - expected) / scale
    assert np.all(np.isfinite(actual)), "non-finite values"
    assert err.max() <= rtol, f"max relative error {err.max():.3e} at row {err.argmax()}"


# ---------------------------------------------------------------------------- nll vs scipy.stats
def _raw_grid(rng, lo, hi, n=2000):
    """Random raw scores including the extremes of the range."""
    return np.concatenate([rng.uniform(lo, hi, n - 4), [lo, hi, 0.5 * lo, 0.5 * hi]])


@pytest.mark.parametrize("scale", [0.01, 1.0, 37.5])
def test_gaussian_nll_is_scipy_norm(rng, scale):
    raw = _raw_grid(rng, -1e6, 1e6)
    y = raw + rng.normal(scale=scale * 3, size=raw.size)
    f = lossfam.family("gaussian", scale=scale)
    # scipy.stats.norm.logpdf: the reference normal density
    assert_rel(f.nll(y, raw), -stats.norm.logpdf(y, loc=raw, scale=scale))


@pytest.mark.parametrize("scale", [0.01, 1.0, 37.5])
def test_laplace_nll_is_scipy_laplace(rng, scale):
    raw = _raw_grid(rng, -1e6, 1e6)
    y = raw + rng.laplace(scale=scale * 3, size=raw.size)
    f = lossfam.family("laplace", scale=scale)
    assert_rel(f.nll(y, raw), -stats.laplace.logpdf(y, loc=raw, scale=scale))


@pytest.mark.parametrize("tau", [0.05, 0.1, 0.5, 0.9, 0.97])
@pytest.mark.parametrize("scale", [0.2, 3.0])
def test_asymmetric_laplace_nll_is_scipy_laplace_asymmetric(rng, tau, scale):
    raw = _raw_grid(rng, -1e5, 1e5)
    y = raw + rng.normal(scale=5 * scale, size=raw.size)
    f = lossfam.family("asymmetric_laplace", quantile=tau, scale=scale)
    # scipy.stats.laplace_asymmetric(kappa): density 1/(kappa + 1/kappa) e^{-x kappa} (x >= 0),
    # e^{x / kappa} (x < 0); same law with kappa = sqrt(tau/(1-tau)), scale b / sqrt(tau(1-tau)).
    kappa = np.sqrt(tau / (1 - tau))
    ref = stats.laplace_asymmetric.logpdf(y, kappa, loc=raw, scale=scale / np.sqrt(tau * (1 - tau)))
    assert_rel(f.nll(y, raw), -ref)
    # and the location is the tau-quantile of that law
    assert_rel(stats.laplace_asymmetric.cdf(0.0, kappa, scale=scale / np.sqrt(tau * (1 - tau))), tau)


def test_bernoulli_nll_is_scipy_bernoulli(rng):
    raw = _raw_grid(rng, -30, 30)
    y = (rng.uniform(size=raw.size) < special.expit(raw)).astype(float)
    f = lossfam.family("bernoulli")
    # scipy.stats.bernoulli.logpmf where p = expit(raw) is representable away from 0 and 1
    assert_rel(f.nll(y, raw), -stats.bernoulli.logpmf(y, special.expit(raw)))


def test_bernoulli_nll_extreme_raw_matches_logsumexp(rng):
    # For |raw| up to 1e4, p rounds to 0 or 1 and scipy.stats.bernoulli's logpmf is -inf, so the
    # reference is the identity nll = log(1 + e^raw) - y raw with scipy.special.logsumexp([0, raw]).
    raw = _raw_grid(rng, -1e4, 1e4)
    y = rng.integers(0, 2, raw.size).astype(float)
    ref = special.logsumexp(np.stack([np.zeros_like(raw), raw]), axis=0) - y * raw
    f = lossfam.family("bernoulli")
    assert_rel(f.nll(y, raw), ref)
    g, h = f.grad_hess(y, raw)
    assert np.all(np.isfinite(g)) and np.all(np.isfinite(h)) and np.all(h >= 0)
    assert_rel(g, special.expit(raw) - y, rtol=1e-15)


def test_poisson_nll_is_scipy_poisson(rng):
    raw = _raw_grid(rng, -699.0, 699.0)
    # Counts stay below ~1e3: for counts in the millions with mu near y, nll is a small difference
    # of terms ~1e9 and both scipy's xlogy - gammaln - mu and lossfam lose digits to cancellation.
    mu = np.exp(np.clip(raw, -20, 7))
    y = rng.poisson(mu).astype(float)
    f = lossfam.family("poisson")
    # scipy.stats.poisson.logpmf(k, mu) = xlogy(k, mu) - gammaln(k + 1) - mu
    assert_rel(f.nll(y, raw), -stats.poisson.logpmf(y, np.exp(raw)))


@pytest.mark.parametrize("shape", [0.3, 1.0, 4.0, 250.0])
def test_gamma_nll_is_scipy_gamma(rng, shape):
    raw = _raw_grid(rng, -699.0, 699.0)
    y = rng.gamma(shape, 1.0 / shape, size=raw.size) * np.exp(np.clip(raw, -300, 300))
    y = np.maximum(y, np.finfo(float).tiny)
    f = lossfam.family("gamma", shape=shape)
    # scipy.stats.gamma(a=k, scale=mu/k): mean mu, shape k
    ref = -stats.gamma.logpdf(y, a=shape, scale=np.exp(raw) / shape)
    assert_rel(f.nll(y, raw), ref)


# ---------------------------------------------------------------------------- huber law
@pytest.mark.parametrize("delta", [0.1, 0.5, 1.345, 3.0])
@pytest.mark.parametrize("scale", [0.3, 1.0, 12.0])
def test_huber_density_integrates_to_one(delta, scale):
    f = lossfam.family("huber", delta=delta, scale=scale)

    def pdf(y):
        return float(np.exp(-f.nll(np.array([y]), np.array([0.0]))[0]))

    # scipy.integrate.quad over the real line, split at the two kinks
    k = delta * scale
    total = sum(integrate.quad(pdf, a, b, epsabs=1e-13, epsrel=1e-12)[0]
                for a, b in ((-np.inf, -k), (-k, k), (k, np.inf)))
    assert abs(total - 1.0) < 1e-9


@pytest.mark.parametrize("delta", [0.2, 1.345, 2.5])
def test_huber_law_cdf_ppf_var_against_quadrature(delta):
    law = HuberLaw(np.array([1.5]), 2.0, delta)
    pdf = lambda t: float(law.pdf(np.array([t]))[0])  # noqa: E731
    k = 1.5 + 2.0 * delta
    for y in (-9.0, 1.5 - 2.0 * delta - 0.1, 0.7, 1.5, 2.9, k + 0.2, 15.0):
        # cdf against scipy.integrate.quad of the density
        ref = integrate.quad(pdf, -np.inf, y, epsabs=1e-13, points=None)[0] if y < 1.5 - 2 * delta else (
            integrate.quad(pdf, -np.inf, 1.5 - 2 * delta)[0] + integrate.quad(pdf, 1.5 - 2 * delta, y)[0])
        assert abs(law.cdf(np.array([y]))[0] - ref) < 1e-9
        assert abs(law.sf(np.array([y]))[0] - (1 - ref)) < 1e-9
    q = np.array([1e-9, 0.01, 0.2, 0.5, 0.77, 0.999])
    assert np.allclose(law.cdf(law.ppf(q)), q, rtol=1e-9, atol=1e-15)
    var = integrate.quad(lambda t: (t - 1.5) ** 2 * pdf(t), -np.inf, np.inf, epsabs=1e-12)[0]
    assert abs(law.var()[0] - var) < 1e-7 * var
    lo, hi = law.interval(0.9)
    assert np.allclose(law.cdf(hi) - law.cdf(lo), 0.9)


# ---------------------------------------------------------------------------- deviance
def test_deviance_against_scikit_learn_metrics(rng):
    # scikit-learn's mean_poisson_deviance / mean_gamma_deviance (sklearn.metrics, Tweedie power 1 and 2)
    metrics = pytest.importorskip("sklearn.metrics")
    raw = rng.normal(size=500)
    y = rng.poisson(np.exp(raw)).astype(float)
    assert_rel(lossfam.family("poisson").deviance(y, raw).mean(),
               metrics.mean_poisson_deviance(y, np.exp(raw)), rtol=1e-12)
    yg = rng.gamma(2.0, np.exp(raw) / 2.0)
    assert_rel(lossfam.family("gamma").deviance(yg, raw).mean(),
               metrics.mean_gamma_deviance(yg, np.exp(raw)), rtol=1e-12)
    assert_rel(lossfam.family("gaussian").deviance(yg, raw).mean(),
               metrics.mean_squared_error(yg, raw), rtol=1e-12)
    assert_rel(lossfam.family("bernoulli").deviance((yg > 1).astype(float), raw).mean(),
               2 * metrics.log_loss((yg > 1).astype(float), special.expit(raw)), rtol=1e-12)
    for tau in (0.1, 0.5, 0.8):
        assert_rel(lossfam.family("asymmetric_laplace", quantile=tau).deviance(yg, raw).mean(),
                   2 * metrics.mean_pinball_loss(yg, raw, alpha=tau), rtol=1e-12)


@pytest.mark.parametrize("name", ["gaussian", "poisson", "bernoulli"])
def test_deviance_is_twice_nll_excess_over_saturated(rng, name):
    f = lossfam.family(name)
    raw = rng.normal(scale=2, size=400)
    y = {"gaussian": raw + rng.normal(size=400),
         "poisson": rng.poisson(np.exp(raw)).astype(float),
         "bernoulli": rng.integers(0, 2, 400).astype(float)}[name]
    if name == "bernoulli":
        saturated_nll = np.zeros_like(y)  # P(y) = 1 when p = y
    elif name == "poisson":
        saturated_nll = -stats.poisson.logpmf(y, y)  # scipy: mu = y (mass 1 at 0 when y = 0)
    else:
        saturated_nll = f.nll(y, y)
    assert_rel(f.deviance(y, raw), 2 * (f.nll(y, raw) - saturated_nll), rtol=1e-9)


@pytest.mark.parametrize("name", ["gaussian", "laplace", "asymmetric_laplace", "huber", "poisson", "gamma"])
def test_deviance_zero_at_saturated_prediction(rng, name):
    f = lossfam.family(name)
    y = rng.gamma(2.0, 3.0, size=300) + 0.5
    if name == "poisson":
        y = np.round(y)
    dev = f.deviance(y, f.link(y))
    assert np.all(dev >= 0) and np.max(dev) < 1e-12 * np.max(y) ** 2
    assert np.all(f.deviance(y, f.link(y) + 0.1) > 0)


def test_bernoulli_deviance_tends_to_zero():
    f = lossfam.family("bernoulli")
    y = np.array([0.0, 1.0])
    assert np.all(f.deviance(y, np.array([-800.0, 800.0])) == 0.0)


# ---------------------------------------------------------------------------- baseline
def _weighted_quantile_by_sorting(values, weights, q):
    """Independent reference: the smallest value whose cumulative weight reaches q * total."""
    order = np.argsort(values, kind="stable")
    cum = np.cumsum(weights[order])
    return values[order][np.searchsorted(cum, q * cum[-1] * (1 - 1e-15))]


def test_baseline_closed_forms(rng):
    n = 1001
    w = rng.uniform(0.1, 3.0, n)
    y = rng.normal(4.0, 2.0, n)
    yc = rng.poisson(3.0, n).astype(float)
    yp = rng.gamma(2.0, 2.0, n)
    yb = rng.integers(0, 2, n).astype(float)
    assert_rel(lossfam.family("gaussian").baseline(y, w), np.sum(w * y) / np.sum(w), 1e-13)
    assert_rel(lossfam.family("laplace").baseline(y, w), _weighted_quantile_by_sorting(y, w, 0.5), 0)
    for tau in (0.1, 0.5, 0.9):
        assert_rel(lossfam.family("asymmetric_laplace", quantile=tau).baseline(y, w),
                   _weighted_quantile_by_sorting(y, w, tau), 0)
    assert_rel(lossfam.family("poisson").baseline(yc, w), np.log(np.sum(w * yc) / np.sum(w)), 1e-13)
    assert_rel(lossfam.family("gamma", shape=3.0).baseline(yp, w), np.log(np.sum(w * yp) / np.sum(w)), 1e-13)
    p = np.sum(w * yb) / np.sum(w)
    assert_rel(lossfam.family("bernoulli").baseline(yb, w), np.log(p / (1 - p)), 1e-13)
    # huber: the M-estimate of location solves sum w psi((y - c)/s) = 0 (Huber 1964)
    f = lossfam.family("huber", delta=1.0, scale=2.0)
    c = f.baseline(y, w)
    assert abs(np.sum(w * np.clip((y - c) / 2.0, -1.0, 1.0))) < 1e-9 * np.sum(w)


@pytest.mark.parametrize("name", lossfam.available(scores="one"))
@pytest.mark.parametrize("with_offset", [False, True])
def test_baseline_is_the_minimiser(rng, name, with_offset):
    f = lossfam.family(name)
    n = 501
    offset = rng.normal(scale=0.3, size=n) if with_offset else np.zeros(n)
    eta = 0.7 + offset
    # targets from the family's own predictive law (location families: heavier Student t noise)
    if f.link_function.name == "identity":
        y = eta + rng.standard_t(3, size=n)
    else:
        y = np.asarray(f.distribution(eta).rvs(random_state=rng), dtype=float)
    w = rng.uniform(0.2, 2.0, n)
    c = f.baseline(y, w, offset=offset if with_offset else None)

    def mean_nll(v):
        return np.sum(w * f.nll(y, v + offset)) / np.sum(w)

    # outside reference: scipy.optimize.minimize_scalar on the same objective
    ref = optimize.minimize_scalar(mean_nll, bracket=(c - 1, c + 1), tol=1e-12).x
    assert mean_nll(c) <= mean_nll(ref) + 1e-12
    for d in (1e-3, 1e-1):
        assert mean_nll(c - d) > mean_nll(c) and mean_nll(c + d) > mean_nll(c)


def test_baseline_without_finite_minimiser_raises():
    with pytest.raises(ValueError, match="bernoulli: every row with positive weight has label 0"):
        lossfam.family("bernoulli").baseline(np.zeros(5))
    with pytest.raises(ValueError, match="poisson: every row with positive weight has count 0"):
        lossfam.family("poisson").baseline(np.zeros(5))
    with pytest.raises(ValueError, match="weights sum to zero"):
        lossfam.family("gaussian").baseline(np.ones(3), np.zeros(3))
    with pytest.raises(ValueError, match="y is empty"):
        lossfam.family("gaussian").baseline(np.array([]))


# ---------------------------------------------------------------------------- fit_nuisance
def test_fit_params_closed_forms(rng):
    n = 2000
    w = rng.uniform(0.5, 2.0, n)
    raw = rng.normal(size=n)
    y = raw + rng.normal(scale=1.7, size=n)
    s = lossfam.family("gaussian").fit_nuisance(y, raw, w).scale
    assert_rel(s, np.sqrt(np.sum(w * (y - raw) ** 2) / np.sum(w)), 1e-13)
    b = lossfam.family("laplace").fit_nuisance(y, raw, w).scale
    assert_rel(b, np.sum(w * np.abs(y - raw)) / np.sum(w), 1e-13)
    f = lossfam.family("asymmetric_laplace", quantile=0.2).fit_nuisance(y, raw, w)
    r = y - raw
    assert_rel(f.scale, np.sum(w * np.maximum(0.2 * r, -0.8 * r)) / np.sum(w), 1e-13)
    assert f.quantile == 0.2


def test_fit_params_match_scipy_fit(rng):
    # scipy.stats.*.fit with the location fixed: maximum-likelihood scale / shape
    y = rng.gamma(3.3, 2.0, size=3000)
    raw = np.full_like(y, np.log(y.mean()))
    k = lossfam.family("gamma").fit_nuisance(y, raw).shape
    a, _, _ = stats.gamma.fit(y, floc=0)
    assert abs(k - a) < 1e-6 * a
    yn = rng.normal(2.0, 0.5, 3000)
    assert_rel(lossfam.family("gaussian").fit_nuisance(yn, np.full_like(yn, 2.0)).scale,
               stats.norm.fit(yn, floc=2.0)[1], 1e-10)
    yl = rng.laplace(1.0, 0.4, 3000)
    assert_rel(lossfam.family("laplace").fit_nuisance(yl, np.full_like(yl, 1.0)).scale,
               stats.laplace.fit(yl, floc=1.0)[1], 1e-8)


def test_huber_scale_is_the_mle(rng):
    y = rng.standard_t(3, size=2000) * 2.0
    raw = np.zeros_like(y)
    w = rng.uniform(0.5, 1.5, y.size)
    f = lossfam.family("huber", delta=1.2).fit_nuisance(y, raw, w)

    def mean_nll(log_s):
        return np.sum(w * lossfam.family("huber", delta=1.2, scale=np.exp(log_s)).nll(y, raw)) / w.sum()

    # outside reference: scipy.optimize.minimize_scalar on the weighted nll in log s
    ref = np.exp(optimize.minimize_scalar(mean_nll, bracket=(-1, 2), tol=1e-12).x)
    assert abs(f.scale - ref) < 1e-6 * ref
    assert f.delta == 1.2


@pytest.mark.parametrize("weighted", [False, True])
@pytest.mark.parametrize("delta", [0.5, 1.345, 3.0])
def test_huber_location_and_scale_are_scipy_roots_on_diabetes_data(weighted, delta):
    """The Huber location (fixed scale) and the scale (fixed raw scores) against scipy.optimize.brentq
    on their score equations, to 1e-12: the Newton iterations stop where brentq does."""
    from sklearn.datasets import load_diabetes

    # data: scikit-learn's diabetes data (sklearn.datasets.load_diabetes; Efron, Hastie, Johnstone and
    # Tibshirani, "Least angle regression", Ann. Statist. 32 (2004)), shipped with scikit-learn
    X, y = load_diabetes(return_X_y=True)
    w = 1.0 + (X[:, 0] - X[:, 0].min()) / np.ptp(X[:, 0]) if weighted else None  # weights from the age column
    ww = np.ones_like(y) if w is None else w
    s = 40.0
    fam = lossfam.family("huber", delta=delta, scale=s)

    def location_score(c):
        return np.dot(ww, np.clip((y - c) / s, -delta, delta))

    # outside reference: scipy.optimize.brentq on the location's score sum w psi((y - c) / s)
    ref = optimize.brentq(location_score, y.min(), y.max(), xtol=1e-14 * s, rtol=4 * np.finfo(float).eps)
    assert abs(fam.baseline(y, w) - ref) <= 1e-12 * s

    A = np.column_stack([np.ones(y.size), X])
    raw = A @ np.linalg.lstsq(A, y, rcond=None)[0]  # a linear fit: residuals of real data
    r = y - raw

    def scale_score(log_s):
        u = r / np.exp(log_s)
        return np.dot(ww, np.clip(u, -delta, delta) * u) / ww.sum() - 1.0

    # outside reference: scipy.optimize.brentq on the scale's score mean_w psi(u) u = 1 in log s
    ref_s = np.exp(optimize.brentq(scale_score, -5.0, 10.0, xtol=1e-14))
    assert abs(fam.fit_nuisance(y, raw, w).scale - ref_s) <= 1e-12 * ref_s


def test_huber_location_in_a_gap_between_rows_is_the_gap_midpoint():
    # with no row inside the core, every c of the gap solves the score equation: the midpoint is returned
    f = lossfam.family("huber", delta=1.0, scale=1.0)
    assert f.baseline([0.0, 1.0, 100.0, 101.0]) == 50.5
    assert f.baseline([-101.0, -100.0, -1.0, 0.0]) == -50.5
    assert f.baseline([0.0, 1.0, 100.0, 101.0], [1.0, 3.0, 2.0, 2.0]) == 50.5


def test_families_without_parameters_return_themselves(rng):
    f = lossfam.family("poisson")
    assert f.fit_nuisance(np.array([1.0, 2.0]), np.zeros(2)) is f
    assert lossfam.family("bernoulli").params == {}


# ---------------------------------------------------------------------------- distribution
@pytest.mark.parametrize("name", lossfam.available(scores="one"))
def test_distribution_matches_nll_and_has_interval(rng, name):
    f = lossfam.family(name)
    raw = rng.normal(scale=0.5, size=50)
    law = f.distribution(raw)
    y = np.asarray(law.ppf(rng.uniform(0.05, 0.95, size=50)), dtype=float)
    if name == "gamma":
        y = np.maximum(y, 1e-12)
    logp = law.logpmf(y) if f.discrete else law.logpdf(y)
    assert_rel(-logp, f.nll(y, raw), 1e-10)
    lo, hi = law.interval(0.9)
    assert np.all(lo <= hi)
    assert np.all(np.isfinite(law.mean()))
    assert np.all((law.cdf(y) >= 0) & (law.cdf(y) <= 1))
    pred = f.inverse_link(raw)
    if f.prediction_kind == "mean":
        assert_rel(law.mean(), pred, 1e-12)
    else:
        assert_rel(law.cdf(pred), np.full(50, f.prediction_level), 1e-10)
