"""Tail probabilities and quantiles of the count laws at every legal mean, huge ones included.

negative_binomial's law computes its own tails and quantiles (scipy.stats.nbinom.ppf can run
without end, and its cdf returns NaN, for means from about 1e150); these tests check it against
scipy.stats.nbinom where scipy returns, against the gamma limit of the incomplete beta function
where it does not, and that every tail and quantile path of the count laws returns promptly
(each law in a subprocess with a timeout, since a hang inside scipy's C code cannot be interrupted).
"""
from __future__ import annotations

import subprocess
import sys
import textwrap

import numpy as np
import pytest
from scipy import special, stats

import lossfam
from lossfam.families.negative_binomial import NegativeBinomialLaw, _tails

ALPHAS = [1e-6, 1e-3, 0.25, 1.0, 30.0, 1e3]


def _scipy_nbinom(raw, alpha):
    # scipy.stats.nbinom(n, p): P(k) = C(k+n-1, k) p^n (1-p)^k; NB2 with n = 1/alpha, p = 1/(1 + alpha mu)
    return stats.nbinom(1.0 / alpha, 1.0 / (1.0 + alpha * np.exp(raw)))


@pytest.mark.parametrize("alpha", [1e-3, 0.25, 1.0, 30.0])
def test_negative_binomial_law_equals_scipy_nbinom_at_ordinary_means(alpha):
    rng = np.random.default_rng(5)
    raw = rng.normal(1.0, 2.0, 300)
    law, ref = lossfam.family("negative_binomial", dispersion=alpha).distribution(raw), _scipy_nbinom(raw, alpha)
    q = np.concatenate([rng.random(294), [0.0, 1.0, 1e-12, 1 - 1e-12, 0.5, 0.05]])
    np.testing.assert_array_equal(law.ppf(q), ref.ppf(q))
    np.testing.assert_array_equal(law.isf(q), ref.isf(q))
    for got, want in zip(law.interval(0.9), ref.interval(0.9)):
        np.testing.assert_array_equal(got, want)
    k = rng.integers(-1, 60, raw.size).astype(float) + 0.5 * (rng.random(raw.size) < 0.2)
    np.testing.assert_allclose(law.cdf(k), ref.cdf(k), rtol=1e-11, atol=1e-300)
    # scipy forms sf from 1 - p (betainc(k+1, n, 1-p)): 3e-10 relative apart from ours in tails
    # near 1e-120; ours is checked against mpmath below
    np.testing.assert_allclose(law.sf(k), ref.sf(k), rtol=1e-9, atol=1e-300)
    # scipy's pmf also forms 1 - p; ours is exp(-nll), the family's cancellation-free form
    np.testing.assert_allclose(law.pmf(k), ref.pmf(k), rtol=1e-9)
    whole = (k == np.floor(k)) & (k >= 0)
    nll = lossfam.family("negative_binomial", dispersion=alpha).nll(k[whole], raw[whole])
    np.testing.assert_array_equal(law.logpmf(k)[whole], -nll)
    assert np.all(law.pmf(k)[~whole] == 0)
    # scipy's moments n (1 - p) / p round 1 - p: 5e-12 relative apart
    np.testing.assert_allclose(law.mean(), ref.mean(), rtol=1e-10)
    np.testing.assert_allclose(law.var(), ref.var(), rtol=1e-10)


def test_negative_binomial_tails_match_mpmath_deep_in_both_tails():
    mpmath = pytest.importorskip("mpmath")
    mpmath.mp.dps = 50
    # P(Y <= k) = I_p(r, k+1) and P(Y > k) = I_{1-p}(k+1, r) at 50 digits (mpmath.betainc,
    # regularized); p = 1 / (1 + alpha mu) from the same float raw score
    for alpha, raw, k in [(1e-3, 2.5, 58.0), (0.25, -1.0, 40.0), (30.0, 3.0, 0.0), (1.0, 20.0, 5.0),
                          (0.5, 100.0, 1e40)]:
        law = NegativeBinomialLaw(np.array([raw]), alpha)
        r = mpmath.mpf(1) / mpmath.mpf(alpha)
        p = 1 / (1 + mpmath.mpf(alpha) * mpmath.exp(mpmath.mpf(raw)))
        lower = mpmath.betainc(r, k + 1, 0, p, regularized=True)
        upper = mpmath.betainc(k + 1, r, 0, 1 - p, regularized=True)
        assert law.cdf(k)[0] == pytest.approx(float(lower), rel=1e-11, abs=0), (alpha, raw, k)
        assert law.sf(k)[0] == pytest.approx(float(upper), rel=1e-11, abs=0), (alpha, raw, k)


def test_tails_are_finite_and_complementary_for_every_fitted_size():
    # sizes r = 1 / dispersion up to 1e15 (every fitted dispersion is >= 1e-6), counts up to the
    # largest float, log(alpha mu) over the whole float64 range of means
    for r in np.exp(np.linspace(np.log(1e-300), np.log(1e15), 31)):
        b = np.exp(np.linspace(0.0, np.log(1.7e308), 40))[:, None]
        t = np.linspace(-745.0, 745.0, 41)[None, :]
        lower, upper = _tails(b, r, t)
        assert np.all(np.isfinite(lower) & np.isfinite(upper)), r
        assert np.all((lower >= 0) & (upper >= 0))
        np.testing.assert_allclose(lower + upper, 1.0, atol=1e-12, err_msg=str(r))


def test_tails_when_p_underflows_match_mpmath():
    mpmath = pytest.importorskip("mpmath")
    mpmath.mp.dps = 50
    # size 1e-3 at alpha mu = e^800: P(Y = 0) = p^r ~ e^-0.8 although p underflows to 0
    for r, t, b in [(1e-3, 800.0, 1.0), (1e-3, 800.0, 1e5), (1e-3, 720.0, 40.0), (2.0, 740.0, 1e3)]:
        p = 1 / (1 + mpmath.exp(mpmath.mpf(t)))
        want = mpmath.betainc(r, b, 0, p, regularized=True)
        lower, upper = _tails(np.array([b]), r, np.array([t]))
        assert lower[0] == pytest.approx(float(want), rel=1e-12, abs=0), (r, t, b)
        assert upper[0] == pytest.approx(float(1 - want), rel=1e-12, abs=1e-300), (r, t, b)


@pytest.mark.parametrize("size", [1.0, 4.0, 1e3])
@pytest.mark.parametrize("middle", [1e-6, 0.3, 0.5, 0.9, 1 - 1e-9])
@pytest.mark.parametrize("b", [1e25, 1e60, 1e100])
def test_gamma_limit_of_the_tails_matches_the_incomplete_beta(size, middle, b):
    # where both return, I_p(r, b) from scipy's betainc and the limit gammainc(r, b / (alpha mu))
    # agree (the mean is chosen so that the cdf is near `middle`)
    x = special.gammaincinv(size, middle)  # b s at the chosen cdf
    t = np.log(b) - np.log(x)  # log(alpha mu)
    p = np.exp(-np.logaddexp(0.0, t))
    lower, upper = special.betainc(size, b, p), special.betaincc(size, b, p)
    s = np.exp(-t)
    assert special.gammainc(size, b * s) == pytest.approx(lower, abs=1e-14, rel=1e-11)
    assert special.gammaincc(size, b * s) == pytest.approx(upper, abs=1e-14, rel=1e-11)


@pytest.mark.parametrize("alpha", ALPHAS)
def test_negative_binomial_quantiles_are_the_smallest_counts_reaching_q_at_huge_means(alpha):
    raw = np.log([1e18, 1e20, 1e100, 1e200, 1e300, 1e307])
    law = NegativeBinomialLaw(raw, alpha)
    qs = np.array([1e-10, 0.05, 0.5, 0.95, 1 - 1e-10])
    for q in qs:
        k = law.ppf(np.full(raw.size, q))
        assert not np.isnan(k).any()
        fin = np.isfinite(k)
        # P(Y <= k) >= q, and just below k the cdf is below q (relative step: no integer
        # neighbours above 2**53)
        lw = NegativeBinomialLaw(raw[fin], alpha)
        # the count below (above 2**53, a relative step of 1e-12: between neighbouring floats the
        # tail probabilities differ by less than their rounding)
        below = np.where(k[fin] <= 2.0**53, k[fin] - 1.0, k[fin] * (1 - 1e-12))
        if q < 0.5:
            assert np.all(lw.cdf(k[fin]) >= q)
            assert np.all((lw.cdf(below) < q) | (k[fin] == 0))
        else:  # read on the upper tail, where 1 - q is exact
            assert np.all(lw.sf(k[fin]) <= 1.0 - q)
            assert np.all((lw.sf(below) > 1.0 - q) | (k[fin] == 0))
        # the gamma limit of the quantile, mu / r G_r^-1(q) (Poisson-gamma mixture with the
        # Poisson noise negligible at these means), where it is far above 0 and r <= 1e3 (at
        # r = 1e6 scipy's gammainc is 7e-6 relative off in the tail at 1e-6, against mpmath)
        with np.errstate(over="ignore", invalid="ignore"):
            lim = np.exp(raw[fin] + np.log(alpha)) * special.gammaincinv(1.0 / alpha, q)
        big = (lim > 1e25 * max(1.0, 1.0 / alpha)) & np.isfinite(lim) & (alpha >= 1e-3)
        np.testing.assert_allclose(k[fin][big], lim[big], rtol=1e-13)
    # quantiles are ordered in q, and beyond the largest float they are inf, never NaN
    ks = np.array([law.ppf(np.full(raw.size, q)) for q in qs])
    assert np.all(np.diff(ks, axis=0) >= 0)


def test_negative_binomial_law_is_poisson_like_at_tiny_dispersion_and_huge_means():
    # dispersion 1e-100: P(Y > 3) at mean 1 is the Poisson's; at alpha mu = e^720 (p underflows)
    # every count below 2e78 is far below the mean, so its upper tail is 1
    law = NegativeBinomialLaw(np.array([0.0, 720.17 + np.log(1e100)]), 1e-100)
    # scipy.stats.poisson(1).sf(3) as the outside reference
    np.testing.assert_allclose(law.sf(np.array([3.0, 2.31e78])), [stats.poisson(1.0).sf(3.0), 1.0], rtol=1e-12)


def test_negative_binomial_law_refuses_rows_whose_tails_scipy_cannot_compute(monkeypatch):
    # no legal input found where every form fails; the refusal is checked by making scipy fail
    from lossfam.families import negative_binomial as nb

    real = special.betainc
    monkeypatch.setattr(nb.special, "betainc", lambda a, b, x: np.where(np.asarray(b) > 10, np.nan, real(a, b, x)))
    law = NegativeBinomialLaw(np.array([0.0, np.log(40.0), 0.0]), 0.5)
    with pytest.raises(ValueError, match=r"negative_binomial: the law's tail probabilities cannot be computed at "
                                         r"dispersion 0.5 for 1 row\(s\), e\.g\. rows \[1\]"):
        law.cdf(np.array([3.0, 30.0, 2.0]))
    with pytest.raises(ValueError, match=r"quantiles cannot be computed .* rows \[1\]"):
        law.ppf(np.array([0.5, 0.5, 0.5]))


def test_negative_binomial_law_when_the_mean_overflows():
    law = NegativeBinomialLaw(np.array([800.0, -800.0]), 0.5)
    lo, hi = law.interval(0.9)
    np.testing.assert_array_equal(lo, [np.inf, 0.0])  # mean e^800: every finite count has cdf ~ 0
    np.testing.assert_array_equal(hi, [np.inf, 0.0])
    assert law.cdf(np.array([1e300, 0.0]))[1] == 1.0
    # P(Y <= 1e300) = gammainc(2, 1e300 * 2 e^-800) (gamma limit) ~ x^2 / 2
    x = 2e300 * np.exp(-400.0) * np.exp(-400.0)
    assert law.cdf(np.array([1e300, 0.0]))[0] == pytest.approx(x * x / 2.0, rel=1e-12)


def test_negative_binomial_draws_refuse_means_numpy_cannot_draw():
    law = NegativeBinomialLaw(np.log([1e300]), 0.25)
    with pytest.raises(ValueError, match="lam value too large"):
        law.rvs(random_state=0)
    # ordinary means: the mixture draws have the law's mean and variance
    law = NegativeBinomialLaw(np.zeros(200_000) + np.log(6.0), 0.5)
    y = law.rvs(random_state=1)
    assert y.mean() == pytest.approx(6.0, rel=0.02) and y.var() == pytest.approx(6.0 + 0.5 * 36.0, rel=0.05)


_PATHS = """
import faulthandler, sys, warnings
import numpy as np
import lossfam
faulthandler.dump_traceback_later({timeout}, exit=True)
warnings.simplefilter("ignore")
fam = lossfam.family({name!r}, **{params!r})
nan = []
for mu in [1e15, 1e18, 1e30, 1e100, 1e200, 1e300, 1e307]:
    law = fam.distribution(np.full(3, np.log(mu)))
    for what, call in [("cdf", lambda: law.cdf(np.full(3, mu))), ("sf", lambda: law.sf(np.full(3, mu))),
                       ("ppf", lambda: law.ppf(np.array([1e-10, 0.5, 1 - 1e-10]))),
                       ("isf", lambda: law.isf(np.array([1e-10, 0.5, 1 - 1e-10]))),
                       ("interval", lambda: np.concatenate(law.interval(0.9)))]:
        print(what, mu, flush=True)
        if np.isnan(np.asarray(call(), dtype=float)).any():
            nan.append((what, mu))
print("NaN", nan)
"""


def _known(name, reason):
    return pytest.param(name, marks=pytest.mark.xfail(strict=False, reason=reason))


@pytest.mark.parametrize("name, params", [
    ("negative_binomial", {"dispersion": 0.25}),
    ("negative_binomial", {"dispersion": 1e-6}),
    ("poisson", {}),  # scipy's own poisson.ppf is NaN there from means ~1e15 (lossfam's PoissonLaw)
    ("tweedie", {}),
    ("tweedie", {"power": 1.9}),
    ("tweedie", {"power": 1.1, "dispersion": 1e-3}),
])
def test_count_law_tails_and_quantiles_return_without_nan_at_huge_means(name, params):
    code = textwrap.dedent(_PATHS.format(name=name, params=params, timeout=50))
    res = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60)
    last = res.stdout.strip().splitlines()[-1] if res.stdout.strip() else ""
    assert res.returncode == 0, f"stalled after: {last}\n{res.stderr[-2000:]}"
    assert last == "NaN []", last


def _poisson_quantile_by_summing(mu, q):
    """Reference: the smallest k with P(Y <= k) >= q, the Poisson pmf e^-mu mu^j / j! summed in log
    space over mu +- 45 sd (the definition itself; no incomplete gamma function involved)."""
    sd = np.sqrt(mu)
    j = np.arange(max(0.0, np.floor(mu - 45 * sd)), np.ceil(mu + 45 * sd) + 1)
    lp = j * np.log(mu) - mu - special.gammaln(j + 1)
    lp -= special.logsumexp(lp)
    if q <= 0.5:
        return j[np.searchsorted(np.exp(np.logaddexp.accumulate(lp)), q)]
    at_least = np.exp(np.logaddexp.accumulate(lp[::-1]))[::-1]  # P(Y >= j)
    return j[np.flatnonzero(np.r_[at_least[1:], 0.0] <= 1.0 - q)[0]]


def test_poisson_quantiles_where_scipy_fails_are_the_summed_laws():
    """Where scipy.stats.poisson.ppf is NaN or wrong (means from ~1e7; scipy 1.17), PoissonLaw's
    quantile equals the one from the pmf summed in log space, from 1e-300 to 1 - 1e-10; and for
    means up to the float64 limit it is finite, ordered in q and near mu + z sqrt(mu)."""
    fam = lossfam.family("poisson")
    qs = np.array([1e-300, 1e-10, 0.05, 0.5, 0.95, 1 - 1e-10])
    for mu in (1e7, 1e8, 1e9):
        law = fam.distribution(np.full(qs.size, np.log(mu)))
        expected = [_poisson_quantile_by_summing(m, q) for m, q in zip(law.mu, qs)]
        np.testing.assert_array_equal(law.ppf(qs), expected)
        np.testing.assert_array_equal(fam.distribution(np.full(3, np.log(mu))).isf(1.0 - qs[2:5]), expected[2:5])
    # scipy itself, here: counts too low at 1 - 1e-10 for mean 1e7, NaN at 1e-10 for mean 1e11
    assert stats.poisson.ppf(1 - 1e-10, 1e7) < _poisson_quantile_by_summing(1e7, 1 - 1e-10)
    assert np.isnan(stats.poisson.ppf(1e-10, 1e11))
    for mu in (1e11, 1e15, 1e18, 1e30, 1e100, 1e300, 1.7e308):
        k = fam.distribution(np.full(qs.size, np.log(mu))).ppf(qs)
        m = float(np.exp(np.log(mu)))
        z = stats.norm.ppf(qs)
        assert np.all(np.isfinite(k)) and np.all(np.diff(k) >= 0)
        assert np.all(np.abs(k - (m + z * np.sqrt(m))) <= (z * z + 1) / 6 + 1 + 4 * np.spacing(m))


def test_spread_negative_binomial_law_at_tiny_dispersion_is_the_families_and_poissons():
    # per-row dispersions from exp(-37) (size ~1e16, where scipy.stats.nbinom's logpmf and cdf have
    # lost every digit) down to exp(-800) (alpha underflows to 0); means 0.2 to 40
    fam = lossfam.family("negative_binomial_spread")
    log_alpha = np.repeat([-37.0, -45.0, -60.0, -800.0], 3)
    mu = np.tile([0.2, 5.0, 40.0], 4)
    raw = np.column_stack([np.log(mu), log_alpha])
    law = fam.distribution(raw)
    pois = stats.poisson(mu)  # scipy.stats.poisson as the outside reference (the alpha -> 0 limit)
    for y in (np.zeros(12), np.round(mu), np.round(mu) + 7.0, np.round(3 * mu + 10)):
        np.testing.assert_allclose(law.logpmf(y), pois.logpmf(y), rtol=1e-12, atol=1e-13)
        np.testing.assert_allclose(law.cdf(y), pois.cdf(y), rtol=1e-12, atol=1e-15)
        np.testing.assert_allclose(law.sf(y), pois.sf(y), rtol=1e-10, atol=1e-300)
        # the law's mass is the family's own nll where that is finite (alpha not underflowed)
        fin = log_alpha > -700
        np.testing.assert_allclose(-law.logpmf(y)[fin], fam.nll(y[fin], raw[fin]), rtol=1e-12, atol=1e-13)
    for q in (0.05, 0.5, 0.95, 0.999):
        np.testing.assert_array_equal(law.ppf(np.full(12, q)), pois.ppf(q))
    lo, hi = law.interval(0.9)
    np.testing.assert_array_equal(lo, pois.ppf(0.05))
    np.testing.assert_array_equal(hi, pois.ppf(0.95))
    np.testing.assert_allclose(law.mean(), mu, rtol=1e-15)
    draws = law.rvs(random_state=0)
    assert draws.shape == (12,) and np.all(np.isfinite(draws)) and np.all(draws >= 0)


def test_spread_negative_binomial_law_mixes_poisson_and_overdispersed_rows():
    # one law with rows on both sides of the Poisson switch: each row as its own law
    fam = lossfam.family("negative_binomial_spread")
    raw = np.array([[np.log(4.0), np.log(0.5)], [np.log(4.0), -60.0], [np.log(30.0), np.log(2.0)],
                    [np.log(30.0), -50.0]])
    law = fam.distribution(raw)
    y = np.array([2.0, 2.0, 30.0, 30.0])
    alpha = np.exp(raw[:, 1])
    # scipy.stats.nbinom where it is accurate (alpha of order 1), scipy.stats.poisson where alpha ~ 0
    ref_cdf = [_scipy_nbinom(raw[0, 0], alpha[0]).cdf(2.0), stats.poisson(4.0).cdf(2.0),
               _scipy_nbinom(raw[2, 0], alpha[2]).cdf(30.0), stats.poisson(30.0).cdf(30.0)]
    np.testing.assert_allclose(law.cdf(y), ref_cdf, rtol=1e-10)
    np.testing.assert_allclose(-law.logpmf(y), fam.nll(y, raw), rtol=1e-12)
    ref_q = [_scipy_nbinom(raw[0, 0], alpha[0]).ppf(0.9), stats.poisson(4.0).ppf(0.9),
             _scipy_nbinom(raw[2, 0], alpha[2]).ppf(0.9), stats.poisson(30.0).ppf(0.9)]
    np.testing.assert_array_equal(law.ppf(np.full(4, 0.9)), ref_q)
    np.testing.assert_allclose(law.var(), np.exp(raw[:, 0]) * (1 + alpha * np.exp(raw[:, 0])), rtol=1e-14)


def test_poisson_switch_point_is_where_the_laws_agree_to_rounding():
    # just above the switch (alpha (1 + mu) = 1e-19, the negative binomial forms) and just below
    # it (the Poisson law) the probabilities agree with scipy.stats.poisson to float64 rounding
    mu = np.array([0.5, 3.0, 50.0])
    y = np.array([1.0, 6.0, 70.0])
    for scale in (10.0, 0.1):
        law = NegativeBinomialLaw(np.log(mu), scale * 1e-20 / (1.0 + mu))
        assert (law._poisson is not None) == (scale < 1)
        np.testing.assert_allclose(law.logpmf(y), stats.poisson(mu).logpmf(y), rtol=1e-13)
        np.testing.assert_allclose(law.cdf(y), stats.poisson(mu).cdf(y), rtol=1e-12)
