"""Scale-varying families, one by one: outside references for the baseline, far tails, bad input.

The generic checks (finite differences, scipy.stats log densities, Monte Carlo Fisher, engine
curvature, baseline stationarity) run for every several-score family in test_several_scores.py."""
import numpy as np
import pytest
from scipy import stats

import lossfam

#: each family and the words of its refusal of a constant target (no finite maximum-likelihood scale)
SPREAD_FAMILIES = {
    "laplace_spread": "scale is 0",
    "asymmetric_laplace_spread": "scale is 0",
    "student_t_spread": "too many residuals are exactly zero",
    "gamma_spread": "shape is infinite",
    "negative_binomial_spread": "not overdispersed",
}


def _engel_foodexp():
    # statsmodels.datasets.engel: Engel's (1857) Belgian household food expenditure, 235 rows,
    # shipped with statsmodels
    sm = pytest.importorskip("statsmodels.api")
    return sm.datasets.engel.load_pandas().data["foodexp"].to_numpy(dtype=float)


def _constant(fam, c, n):
    return np.tile(np.asarray(c, dtype=float), (n, 1))


# ---------------------------------------------------------------------- laplace_spread
def test_laplace_spread_baseline_is_the_scipy_laplace_fit():
    # outside reference: scipy.stats.laplace.fit, the Laplace maximum likelihood (the sample
    # median and the mean absolute deviation about it), on the Engel food expenditures
    y = _engel_foodexp()
    loc, scale = stats.laplace.fit(y)
    c = lossfam.family("laplace_spread").baseline(y)
    np.testing.assert_allclose(c, [loc, np.log(scale)], rtol=1e-12)


def test_laplace_spread_baseline_at_constant_scores_is_the_one_score_fit(rng):
    # the spread family at constant raw scores is the one-score family: (baseline, log of the
    # fitted scale), with weights and an offset on the location
    y = rng.laplace(2.0, 3.0, size=401)
    w = rng.uniform(0.5, 2.0, size=y.size)
    o = rng.normal(size=y.size)
    one = lossfam.family("laplace")
    c0 = one.baseline(y, w, offset=o)
    b = one.fit_nuisance(y, c0 + o, w).scale
    c = lossfam.family("laplace_spread").baseline(y, w, offset=o)
    np.testing.assert_allclose(c, [c0, np.log(b)], rtol=1e-12)
    assert lossfam.family("laplace_spread").constant_scale() == one


# ---------------------------------------------------------------------- asymmetric_laplace_spread
@pytest.mark.parametrize("tau", [0.1, 0.5, 0.8])
def test_asymmetric_laplace_spread_baseline_beats_the_scipy_fit(tau):
    # outside reference: scipy.stats.laplace_asymmetric.fit with kappa fixed at sqrt(tau/(1-tau))
    # (numerical maximum likelihood over loc and scale) on the Engel food expenditures: our
    # closed form reaches at least scipy's likelihood and agrees with its estimates
    y = _engel_foodexp()
    kappa = np.sqrt(tau / (1 - tau))
    _, loc, scale = stats.laplace_asymmetric.fit(y, fkappa=kappa)
    fam = lossfam.family("asymmetric_laplace_spread", quantile=tau)
    c = fam.baseline(y)
    b = scale * np.sqrt(tau * (1 - tau))
    ours = fam.nll(y, _constant(fam, c, y.size)).sum()
    theirs = -stats.laplace_asymmetric.logpdf(y, kappa, loc, scale).sum()
    assert ours <= theirs + 1e-9
    np.testing.assert_allclose(np.log(b), c[1], atol=1e-4)
    # where tau n is an integer the minimisers in the location form an interval (the midpoint rule
    # picks its middle, scipy any point): scipy's location is a minimiser too, at our scale
    at_theirs = fam.nll(y, _constant(fam, [loc, c[1]], y.size)).sum()
    np.testing.assert_allclose(at_theirs, ours, rtol=1e-7)


def test_asymmetric_laplace_spread_matches_the_one_score_family(rng):
    tau = 0.3
    y = rng.gumbel(1.0, 2.0, size=300)
    w = rng.uniform(0.5, 2.0, size=y.size)
    fam = lossfam.family("asymmetric_laplace_spread", quantile=tau)
    one = fam.constant_scale()
    assert one == lossfam.family("asymmetric_laplace", quantile=tau)
    c0 = one.baseline(y, w)
    b = one.fit_nuisance(y, np.full(y.size, c0), w).scale
    np.testing.assert_allclose(fam.baseline(y, w), [c0, np.log(b)], rtol=1e-12)
    # the same nll as the one-score family at that scale, row by row
    raw = _constant(fam, [0.4, np.log(b)], y.size)
    np.testing.assert_allclose(fam.nll(y, raw), one.with_params(scale=b).nll(y, raw[:, 0]), rtol=1e-13)


def test_asymmetric_laplace_spread_fisher_at_a_skewed_quantile(rng):
    # Monte Carlo variance of the score at tau = 0.15 (the generic test runs at tau = 1/2)
    fam = lossfam.family("asymmetric_laplace_spread", quantile=0.15)
    raw = np.array([[0.3, -0.4]])
    rep = np.repeat(raw, 200_000, axis=0)
    y = fam.distribution(rep).rvs(random_state=rng)
    g = fam.gradient(y, rep)
    f = fam.fisher(raw)[0]
    np.testing.assert_allclose(g.T @ g / y.size, f, rtol=0.03, atol=0.03 * f.max())
    assert np.mean(y < 0.3) == pytest.approx(0.15, abs=0.005)


def test_asymmetric_laplace_spread_quantile_is_checked():
    with pytest.raises(ValueError, match="quantile must be strictly between 0 and 1"):
        lossfam.family("asymmetric_laplace_spread", quantile=1.0)


# ---------------------------------------------------------------------- student_t_spread
def _quarterly_inflation():
    # statsmodels.datasets.macrodata: US quarterly macroeconomic series 1959-2009 (203 rows),
    # shipped with statsmodels; "infl" is the annualised inflation rate (heavy-tailed)
    sm = pytest.importorskip("statsmodels.api")
    return sm.datasets.macrodata.load_pandas().data["infl"].to_numpy(dtype=float)


@pytest.mark.parametrize("df", [1.5, 4.0, 30.0])
def test_student_t_spread_baseline_is_the_scipy_t_fit(df):
    # outside reference: scipy.stats.t.fit with the degrees of freedom fixed (numerical maximum
    # likelihood over loc and scale) on US quarterly inflation: ours reaches at least scipy's
    # likelihood, and the estimates agree to scipy's optimiser tolerance
    y = _quarterly_inflation()
    _, loc, scale = stats.t.fit(y, fdf=df)
    fam = lossfam.family("student_t_spread", df=df)
    c = fam.baseline(y)
    ours = fam.nll(y, _constant(fam, c, y.size)).sum()
    theirs = -stats.t.logpdf(y, df, loc, scale).sum()
    assert ours <= theirs + 1e-9
    np.testing.assert_allclose(c, [loc, np.log(scale)], rtol=1e-4, atol=1e-4)


def test_student_t_spread_at_constant_scale_is_the_one_score_family(rng):
    fam = lossfam.family("student_t_spread", df=3.0)
    assert fam.constant_scale() == lossfam.family("student_t", df=3.0)
    y = rng.standard_t(3.0, size=200) * 2.0 + 1.0
    c = fam.baseline(y)
    one = fam.constant_scale().with_params(scale=np.exp(c[1]))
    # at the joint maximum, the one-score family's location and scale fits return the same pair
    np.testing.assert_allclose(one.baseline(y), c[0], rtol=1e-8, atol=1e-8)
    np.testing.assert_allclose(one.fit_nuisance(y, np.full(y.size, c[0])).scale, np.exp(c[1]), rtol=1e-8)
    raw = _constant(fam, c, y.size)
    np.testing.assert_allclose(fam.nll(y, raw), one.nll(y, raw[:, 0]), rtol=1e-13)


@pytest.mark.parametrize("df", [0.5, 1.0, 4.0, 1e3])
def test_student_t_spread_fisher_at_several_df(df, rng):
    # Monte Carlo variance of the score against the closed form (the generic test runs at df = 4)
    fam = lossfam.family("student_t_spread", df=df)
    raw = np.array([[0.7, 0.3]])
    rep = np.repeat(raw, 200_000, axis=0)
    y = fam.distribution(rep).rvs(random_state=rng)
    g = fam.gradient(y, rep)
    f = fam.fisher(raw)[0]
    np.testing.assert_allclose(g.T @ g / y.size, f, rtol=0.03, atol=0.03 * f.max())


# ---------------------------------------------------------------------- gamma_spread
def test_gamma_spread_baseline_is_the_scipy_gamma_fit():
    # outside reference: scipy.stats.gamma.fit with loc fixed at 0 (maximum likelihood of the shape
    # and scale) on the Engel food expenditures; mean = shape * scale
    y = _engel_foodexp()
    a, _, scale = stats.gamma.fit(y, floc=0)
    c = lossfam.family("gamma_spread").baseline(y)
    np.testing.assert_allclose(c, [np.log(a * scale), np.log(a)], rtol=1e-7)


def test_gamma_spread_baseline_at_constant_scores_is_the_one_score_fit(rng):
    y = rng.gamma(3.0, 2.0, size=300)
    w = rng.uniform(0.5, 2.0, size=y.size)
    o = rng.normal(0.0, 0.3, size=y.size)
    fam = lossfam.family("gamma_spread")
    one = fam.constant_scale()
    assert one == lossfam.family("gamma")
    c0 = one.baseline(y, w, offset=o)
    k = one.fit_nuisance(y, c0 + o, w).shape
    c = fam.baseline(y, w, offset=o)
    np.testing.assert_allclose(c, [c0, np.log(k)], rtol=1e-12)
    raw = _constant(fam, [0.3, np.log(k)], y.size)
    np.testing.assert_allclose(fam.nll(y, raw), one.with_params(shape=k).nll(y, raw[:, 0]), rtol=1e-12)


@pytest.mark.parametrize("shape", [0.05, 1.0, 40.0, 1e4])
def test_gamma_spread_fisher_over_the_shape_range(shape, rng):
    # Monte Carlo variance of the score against k and k^2 trigamma(k) - k (the generic test runs
    # at shapes near 1); at k = 1e4 the series branch of f(k) is used
    fam = lossfam.family("gamma_spread")
    raw = np.array([[0.5, np.log(shape)]])
    rep = np.repeat(raw, 200_000, axis=0)
    y = fam.distribution(rep).rvs(random_state=rng)
    g = fam.gradient(y, rep)
    f = fam.fisher(raw)[0]
    np.testing.assert_allclose(g.T @ g / y.size, f, rtol=0.03, atol=0.03 * f.max())


def test_gamma_spread_special_functions_against_mpmath():
    # m(k) = k (log k - digamma k), f(k) = k (k trigamma k - 1), c(k) = k + lgamma k - k log k
    # against mpmath at 50 digits, across both sides of the branch points k = 1 and k = 16
    mp = pytest.importorskip("mpmath")
    from lossfam.families.gamma_spread import _c, _f, _m
    mp.mp.dps = 50
    k = np.array([1e-300, 1e-8, 0.3, 0.999999, 1.0, 3.0, 15.9999, 16.0, 100.0, 1e8, 1e15])
    r1 = np.log(k)
    exact = [[float(K * (mp.log(K) - mp.digamma(K))), float(K * (K * mp.psi(1, K) - 1)),
              float(K + mp.loggamma(K) - K * mp.log(K))] for K in map(mp.mpf, k.tolist())]
    np.testing.assert_allclose(np.column_stack([_m(k, r1), _f(k), _c(k, r1)]), exact, rtol=1e-13)


# ---------------------------------------------------------------------- every family here
@pytest.mark.parametrize("name", SPREAD_FAMILIES)
def test_far_tails_are_finite(name, rng):
    # legal but extreme input: large |raw| in both columns and targets far from the location
    fam = lossfam.family(name)
    n = 64
    # a location through the identity link may be far out; through a log link, e^{+-30} is already
    # far (beyond e^{+-709} the true values leave float64, and +-inf is then the honest answer)
    far = 1e6 if fam.links[0] is lossfam.links.IDENTITY else 30.0
    raw = np.column_stack([rng.choice([-far, 0.0, far], n), rng.choice([-30.0, 0.0, 30.0], n)])
    y = _extreme_targets(fam, rng, n)
    for curvature in ("newton", "fisher", "natural"):
        g, d = fam.grad_hess(y, raw, curvature=curvature)
        assert np.isfinite(g).all() and np.isfinite(d).all() and (d > 0).all(), curvature
    assert np.isfinite(fam.nll(y, raw)).all()
    assert np.isfinite(fam.hessian(y, raw)).all()
    assert np.isfinite(fam.fisher(raw)).all()


def _extreme_targets(fam, rng, n):
    if fam.discrete:
        return rng.choice([0.0, 1.0, 1e6, 1e12], n)
    if fam.target_domain is lossfam._checks.REAL:
        return rng.choice([-1e200, -1e12, -1.0, 0.0, 1e-9, 1e12, 1e200], n)
    return rng.choice([1e-12, 1.0, 1e12], n)


@pytest.mark.parametrize("name", SPREAD_FAMILIES)
def test_bad_targets_are_named_by_row(name):
    fam = lossfam.family(name)
    y = np.array([1.0, np.nan, 2.0, np.inf])
    with pytest.raises(ValueError, match=r"rows \[1, 3\]"):
        fam.nll(y, np.zeros((4, 2)))
    with pytest.raises(ValueError, match=r"rows \[1, 3\]"):
        fam.gradient(y, np.zeros((4, 2)))


@pytest.mark.parametrize("name", SPREAD_FAMILIES)
def test_baseline_refuses_a_zero_scale(name):
    fam = lossfam.family(name)
    with pytest.raises(ValueError, match=f"{name}: .*{SPREAD_FAMILIES[name]}"):
        fam.baseline(np.full(5, 3.0))


@pytest.mark.parametrize("name", SPREAD_FAMILIES)
def test_natural_gradient_divides_by_the_diagonal_fisher(name, rng):
    fam = lossfam.family(name)
    assert fam.fisher_diagonal
    raw = rng.normal(0.0, 0.5, size=(30, fam.n_scores))
    y = np.asarray(fam.distribution(raw).rvs(random_state=rng), dtype=float)
    f = fam.fisher(raw)
    off = f - np.einsum("nii->ni", f)[:, :, None] * np.eye(fam.n_scores)
    assert np.all(off == 0)
    g, d = fam.grad_hess(y, raw, curvature="natural")
    np.testing.assert_allclose(g, np.linalg.solve(f, fam.gradient(y, raw)[:, :, None])[:, :, 0], rtol=1e-13)


# ---------------------------------------------------------------------- negative_binomial_spread
def _doctor_visits():
    # statsmodels.datasets.randhie: RAND Health Insurance Experiment, "mdvis" = number of outpatient
    # visits to a physician (20190 rows), shipped with statsmodels; overdispersed counts
    sm = pytest.importorskip("statsmodels.api")
    return sm.datasets.randhie.load_pandas().data["mdvis"].to_numpy(dtype=float)


def test_negative_binomial_spread_baseline_is_the_statsmodels_nb2_fit():
    # outside reference: statsmodels NegativeBinomial (loglike_method="nb2", the same alpha:
    # Var = mu + alpha mu^2), intercept only, maximum likelihood by Newton's method
    sm = pytest.importorskip("statsmodels.api")
    y = _doctor_visits()
    res = sm.NegativeBinomial(y, np.ones((y.size, 1)), loglike_method="nb2").fit(
        method="newton", tol=1e-12, maxiter=200, disp=0)
    const, alpha = res.params
    c = lossfam.family("negative_binomial_spread").baseline(y)
    np.testing.assert_allclose(c, [const, np.log(alpha)], rtol=1e-7, atol=1e-8)


def test_negative_binomial_spread_baseline_at_constant_scores_is_the_one_score_fit(rng):
    fam = lossfam.family("negative_binomial_spread")
    one = fam.constant_scale()
    assert one == lossfam.family("negative_binomial")
    y = rng.negative_binomial(2.0, 0.2, size=400).astype(float)
    w = rng.uniform(0.5, 2.0, size=y.size)
    c0 = one.baseline(y, w)
    alpha = one.fit_nuisance(y, np.full(y.size, c0), w).dispersion
    np.testing.assert_allclose(fam.baseline(y, w), [c0, np.log(alpha)], rtol=1e-12)
    raw = _constant(fam, [1.2, np.log(alpha)], y.size)
    np.testing.assert_allclose(fam.nll(y, raw), one.with_params(dispersion=alpha).nll(y, raw[:, 0]), rtol=1e-12)


def _alpha_information_by_scipy(mu, alpha, terms):
    # the alpha-alpha information as sum_j P(Y > j) [(1 + alpha j)^-2 - (1 + alpha mu)^-1] with
    # the tail probabilities of scipy.stats.nbinom (an independent route: survival function
    # instead of the mass recursion)
    j = np.arange(terms, dtype=float)
    sf = stats.nbinom.sf(j, 1.0 / alpha, 1.0 / (1.0 + alpha * mu))
    return float(np.sum(sf * ((1.0 + alpha * j) ** -2 - 1.0 / (1.0 + alpha * mu))))


@pytest.mark.parametrize("mu, alpha, terms", [(3.0, 0.5, 400), (40.0, 2.0, 20_000), (0.2, 5.0, 2000),
                                              (200.0, 1.0, 40_000), (2000.0, 0.01, 6000)])
def test_negative_binomial_spread_alpha_information_against_scipy_tails(mu, alpha, terms):
    fam = lossfam.family("negative_binomial_spread")
    f = fam.fisher(np.array([[np.log(mu), np.log(alpha)]]))[0]
    np.testing.assert_allclose(f[0, 0], mu / (1 + alpha * mu), rtol=1e-14)
    np.testing.assert_allclose(f[1, 1], _alpha_information_by_scipy(mu, alpha, terms), rtol=1e-8)


def test_negative_binomial_spread_alpha_information_limits():
    # alpha -> 0: the Poisson limit alpha^2 mu^2 / 2 (to first order in alpha); mu -> inf: the gamma
    # law of the mixing mean, r (r trigamma(r) - 1), the gamma_spread shape information at k = r
    fam = lossfam.family("negative_binomial_spread")
    mu = 5.0
    for alpha in (1e-3, 1e-4):
        f11 = fam.fisher(np.array([[np.log(mu), np.log(alpha)]]))[0, 1, 1]
        np.testing.assert_allclose(f11 / alpha**2, mu**2 / 2, rtol=20 * alpha * mu)
    alpha = 0.5
    f11 = fam.fisher(np.array([[np.log(1e7), np.log(alpha)]]))[0, 1, 1]
    gamma_info = lossfam.family("gamma_spread").fisher(np.array([[0.0, np.log(1 / alpha)]]))[0, 1, 1]
    np.testing.assert_allclose(f11, gamma_info, rtol=1e-5)


@pytest.mark.slow
def test_negative_binomial_spread_wide_rows_match_the_exact_sum():
    # the documented approximation for wide windows against the exact sum over the whole window
    from lossfam.families import negative_binomial_spread as nbs
    fam = lossfam.family("negative_binomial_spread")
    raw = np.log([[200.0, 1.0], [50.0, 10.0], [1e4, 0.05], [500.0, 30.0], [2e3, 3.0], [5.0, 300.0]])
    t = raw[:, 0] + raw[:, 1]
    mu, alpha = np.exp(raw[:, 0]), np.exp(raw[:, 1])
    sd = np.sqrt(mu * (1 + alpha * mu))
    lo = np.floor(np.maximum(0.0, mu - 10 * sd))
    hi = np.ceil(mu + 10 * sd + 40 / np.logaddexp(0.0, -t))
    assert np.all(hi - lo + 1 > nbs._EXACT_TERMS)
    exact = nbs._exact_window(fam, raw, lo, (hi - lo + 1).astype(np.int64))[0]
    np.testing.assert_allclose(nbs._wide_window(fam, raw, lo, hi), exact, rtol=1e-6)


def test_negative_binomial_spread_digamma_differences_against_mpmath():
    mp = pytest.importorskip("mpmath")
    from lossfam.families.negative_binomial_spread import digamma_trigamma_differences
    mp.mp.dps = 40
    y = np.array([0.0, 1.0, 3.0, 50.0, 1e4, 1.0, 7.0, 1e6, 2.0])
    r = np.array([0.3, 5.0, 19.9, 20.0, 20.0, 1e6, 1e9, 1e3, 1e14])
    D, T = digamma_trigamma_differences(y, r)
    for i in range(y.size):
        Y, R = mp.mpf(y[i]), mp.mpf(r[i])
        ed, et = mp.digamma(Y + R) - mp.digamma(R), mp.psi(1, R) - mp.psi(1, Y + R)
        assert D[i] == pytest.approx(float(ed), rel=1e-13, abs=1e-300), (y[i], r[i])
        assert T[i] == pytest.approx(float(et), rel=1e-12, abs=1e-300), (y[i], r[i])


def test_negative_binomial_spread_refuses_counts_that_are_not_overdispersed(rng):
    fam = lossfam.family("negative_binomial_spread")
    with pytest.raises(ValueError, match="negative_binomial_spread: .*not overdispersed"):
        fam.baseline(rng.binomial(10, 0.5, size=500).astype(float))
    with pytest.raises(ValueError, match=r"non-negative integer; 1 row outside, e.g. row \[1\] = \[2.5\]"):
        fam.nll(np.array([1.0, 2.5]), np.zeros((2, 2)))


def test_negative_binomial_spread_near_normal_expansion_matches_the_exact_sum():
    # the expansion used for mu >= 3e4 and r >= 1e4 against the exact sum over the law's window
    # (windows of about 5e3 to 3e4 counts: the sum still holds its digits there)
    from lossfam.families import negative_binomial_spread as nbs
    fam = lossfam.family("negative_binomial_spread")
    mu = np.array([3e4, 1e5, 1e5])
    r = np.array([1e4, 3e4, 1e5])
    raw = np.column_stack([np.log(mu), -np.log(r)])
    t = raw[:, 0] + raw[:, 1]
    sd = np.sqrt(mu * (1 + mu / r))
    lo = np.floor(mu - 10 * sd)
    hi = np.ceil(mu + 10 * sd + 40 / np.logaddexp(0.0, -t))
    exact = nbs._exact_window(fam, raw, lo, (hi - lo + 1).astype(np.int64))[0]
    np.testing.assert_allclose(fam.fisher(raw)[:, 1, 1], exact, rtol=1e-7)


# ---------------------------------------------------------------------- far raw scores, exact limits
@pytest.mark.parametrize("log_alpha", [-40.0, -100.0, -700.0, -709.5, -710.0, -746.0, -800.0, -1e4])
def test_negative_binomial_spread_tends_to_the_poisson_law(log_alpha):
    # outside reference: scipy.stats.poisson (the alpha -> 0 limit of NB2; the two nlls differ by
    # alpha ((y - mu)^2 - y) / 2 to first order, below 1e-11 of the nll on these rows)
    fam = lossfam.family("negative_binomial_spread")
    mu = np.repeat([1e-3, 0.2, 5.0, 40.0, 1e3], 4)
    y = np.column_stack([np.zeros(5), np.round(mu[::4]), np.round(mu[::4]) + 7, np.round(3 * mu[::4] + 10)]).ravel()
    raw = np.column_stack([np.log(mu), np.full(mu.size, log_alpha)])
    np.testing.assert_allclose(fam.nll(y, raw), -stats.poisson.logpmf(y, mu), rtol=1e-10)
    g = fam.gradient(y, raw)
    # (mu - y) / (1 + alpha mu), formed from terms of size y + mu: within 1e-13 (y + mu)
    assert np.all(np.abs(g[:, 0] - (mu - y)) <= 1e-12 * np.abs(mu - y) + 1e-13 * (mu + y))
    # d nll / d log alpha -> -alpha ((y - mu)^2 - y) / 2 (0 once alpha underflows)
    lead = -np.exp(log_alpha) * ((y - mu) ** 2 - y) / 2
    np.testing.assert_allclose(g[:, 1], lead, rtol=1e-8, atol=1e-300)
    h = fam.hessian(y, raw)
    np.testing.assert_allclose(h[:, 0, 0], mu, rtol=1e-12)
    np.testing.assert_allclose(h[:, 1, 1], lead, rtol=1e-8, atol=1e-300)
    f = fam.fisher(raw)
    np.testing.assert_allclose(f[:, 0, 0], mu, rtol=1e-12)
    # alpha (1 + mu) <= 1e-8 here: the leading term (module docstring)
    np.testing.assert_allclose(f[:, 1, 1], np.exp(2 * log_alpha) * mu**2 / 2, rtol=1e-8, atol=1e-300)
    for curvature in ("newton", "fisher", "natural"):
        gc, d = fam.grad_hess(y, raw, curvature=curvature)
        assert not np.isnan(gc).any() and not np.isnan(d).any() and np.all(d >= 0), curvature
    nat, _ = fam.grad_hess(y, raw, curvature="natural")
    np.testing.assert_allclose(nat[:, 0], 1 - y / mu, rtol=1e-12, atol=1e-12)


@pytest.mark.parametrize("alpha", [0.5, 0.05, 0.0499, 1e-2, 1e-3])
def test_negative_binomial_spread_nll_is_scipy_nbinom_on_both_sides_of_the_small_dispersion_forms(alpha):
    # outside reference: scipy.stats.nbinom(n = 1/alpha, p = 1/(1 + alpha mu)) (accurate at these
    # sizes, r <= 1e3); the forms in alpha start at r = 20 (alpha = 0.05)
    fam = lossfam.family("negative_binomial_spread")
    mu = np.array([0.3, 4.0, 60.0, 900.0])
    for y in (np.zeros(4), np.round(mu), np.round(2.5 * mu + 6)):
        raw = np.column_stack([np.log(mu), np.full(4, np.log(alpha))])
        ref = -stats.nbinom.logpmf(y, 1 / alpha, 1 / (1 + alpha * mu))
        np.testing.assert_allclose(fam.nll(y, raw), ref, rtol=1e-10)


def _nb_nll_mp(mp, y, r0, r1):
    # the NB2 nll at 150 digits from its definition (mpmath loggamma), for the derivative checks
    r = mp.exp(-r1)
    mu = mp.exp(r0)
    return -(mp.loggamma(y + r) - mp.loggamma(r) - mp.loggamma(y + 1) + r * mp.log(r / (r + mu))
             + y * mp.log(mu / (r + mu)))


@pytest.mark.parametrize("r1", [-3.5, -10.0, -30.0, -100.0, 18.5, 25.0, 100.0, 800.0])
def test_negative_binomial_spread_far_dispersion_against_mpmath(r1):
    # outside reference: mpmath's loggamma and numerical differentiation at 150 digits; r1 < -3
    # exercises the forms in alpha, r1 > 18.4 (r < 1e-8) the forms in r
    mp = pytest.importorskip("mpmath")
    mp.mp.dps = 150  # derivatives of order alpha = e^{-100} under an nll of order 1
    fam = lossfam.family("negative_binomial_spread")
    rows = [(0.0, np.log(2.0)), (3.0, np.log(2.0)), (50.0, np.log(40.0)), (1.0, np.log(0.01)), (7.0, np.log(7.0))]
    y = np.array([a for a, _ in rows])
    raw = np.array([[b, r1] for _, b in rows])
    nll, g, h = fam.nll(y, raw), fam.gradient(y, raw), fam.hessian(y, raw)
    for i, (yy, r0) in enumerate(rows):
        f0 = lambda a, b: _nb_nll_mp(mp, mp.mpf(yy), a, b)  # noqa: E731
        a, b = mp.mpf(r0), mp.mpf(r1)
        want = [float(f0(a, b)), float(mp.diff(f0, (a, b), (1, 0))), float(mp.diff(f0, (a, b), (0, 1))),
                float(mp.diff(f0, (a, b), (0, 2))), float(mp.diff(f0, (a, b), (1, 1)))]
        got = [nll[i], g[i, 1], h[i, 1, 1]]
        np.testing.assert_allclose(got, [want[0], want[2], want[3]], rtol=1e-8, atol=1e-300,
                                   err_msg=f"y={yy}, r0={r0}, r1={r1}")
        # the r0 column (mu - y) / (1 + alpha mu) and its r1 derivative alpha mu (y - mu) / (1 + alpha mu)^2
        # carry the rounding of mu = e^{r0} in float64: within 1e-13 (y + mu) absolute
        tol = 1e-8 * np.abs([want[1], want[4]]) + 1e-13 * (yy + np.exp(r0))
        assert np.all(np.abs(np.array([g[i, 0], h[i, 0, 1]]) - [want[1], want[4]]) <= tol), (yy, r0, r1)


def test_gamma_spread_at_an_overflowing_shape_keeps_its_limits():
    # k = e^{r1} beyond float64: m(k) -> 1/2, f(k) -> 1/2, c(k) = (log(2 pi) - r1)/2 (Stirling)
    fam = lossfam.family("gamma_spread")
    y = np.array([1.0, 2.0, 0.5])
    raw = np.array([[0.0, 800.0], [0.0, 800.0], [np.log(0.5), 1e4]])
    g = fam.gradient(y, raw)
    assert g[0, 1] == -0.5 and g[2, 1] == -0.5 and g[1, 1] == np.inf
    assert g[0, 0] == 0.0 and g[1, 0] == -np.inf
    np.testing.assert_allclose(fam.nll(y[[0, 2]], raw[[0, 2]]),
                               [0.5 * (np.log(2 * np.pi) - 800.0), np.log(0.5) + 0.5 * (np.log(2 * np.pi) - 1e4)],
                               rtol=1e-14)
    nat, ones = fam.grad_hess(y, raw, curvature="natural")
    np.testing.assert_allclose(nat, [[0.0, -1.0], [-1.0, np.inf], [0.0, -1.0]], rtol=1e-14)
    # and at a shape that underflows: the natural step of the mean is 1 - y / mu whatever k
    nat, _ = fam.grad_hess(y, np.array([[0.0, -800.0], [0.0, -1e4], [1.0, -800.0]]), curvature="natural")
    np.testing.assert_allclose(nat[:, 0], 1 - y / np.exp([0.0, 0.0, 1.0]), rtol=1e-14)


@pytest.mark.parametrize("name", ["gaussian_spread", "laplace_spread", "asymmetric_laplace_spread", "student_t_spread"])
def test_location_scale_rows_at_scales_beyond_float64(name):
    # sigma = e^{r1} far below (or above) float64's range, and a difference y - mu that overflows:
    # each value is its exact limit (0, the sign, the scale column's constant) or +-inf beyond float64
    fam = lossfam.family(name)
    y = np.array([1.0, 0.0, 1.7e308, 1e-300, 5e-324])
    raw = np.array([[0.0, -1e4], [0.0, -1e4], [-1.7e308, 1e4], [0.0, -700.0], [0.0, 1.0]])
    g = fam.gradient(y, raw)
    nll = fam.nll(y, raw)
    assert not np.isnan(g).any() and not np.isnan(nll).any()
    assert nll[1] == pytest.approx(-1e4 + fam.nll(np.zeros(1), np.zeros((1, 2)))[0], rel=1e-12)  # y = mu
    assert g[1, 0] == 0.0 and np.isfinite(g[1, 1])
    # a difference of 3.4e308 over e^{1e4}: z = 0 (to float64), the scale column at its z = 0 value
    np.testing.assert_allclose(g[2], fam.gradient(np.zeros(1), np.zeros((1, 2)))[0], atol=1e-300)
    if fam.kinked_scores:  # a subnormal residual at an ordinary scale keeps its sign (its subgradient)
        assert g[4, 0] < 0
    if name == "student_t_spread":
        # |u| = e^{1e4}: d/dr0 = -(nu + 1) q / (y - mu) -> -(nu + 1) / (y - mu), not 0 * inf
        assert g[0, 0] == pytest.approx(-(fam.df + 1.0), rel=1e-12)
        h = fam.hessian(y, raw)
        assert h[0, 0, 0] == pytest.approx(-(fam.df + 1.0), rel=1e-12)
        # |u| = 1e-300 e^{700} ~ 1e4 (e^{700} itself finite): the same as the plain forms
        u = 1e-300 * np.exp(700.0)
        assert g[3, 0] == pytest.approx(-(fam.df + 1) * u / (fam.df + u * u) * np.exp(700.0), rel=1e-12)
