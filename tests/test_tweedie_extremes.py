"""tweedie at the edges of its parameter space: tiny dispersions, powers next to 1, huge means.

References (named beside each check): mpmath sums of the series of Dunn and Smyth (2005,
"Series evaluation of Tweedie exponential dispersion model densities", Statistics and
Computing 15, eq. 4-5) at 80 digits; the small-dispersion (saddle-point) limit of an
exponential dispersion model; the Edgeworth expansion of the law's distribution function;
scipy.special for the pieces lossfam writes itself.
"""
import math
import warnings

import mpmath
import numpy as np
import pytest
from scipy import special

import lossfam
from lossfam.families import TweedieLaw
from lossfam.families import tweedie as tw


@pytest.fixture
def strict_warnings():
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        yield


def series_nll_mp(y, raw, p, phi, dps=80, reach=200):
    """nll of one row by the series in mpmath (module docstring), terms within `reach` of j*."""
    with mpmath.workdps(dps):
        y, raw, p, phi = (mpmath.mpf(float(v)) for v in (y, raw, p, phi))
        mu = mpmath.exp(raw)
        a = (2 - p) / (p - 1)
        z = a * mpmath.log(y) - a * mpmath.log(p - 1) - (1 + a) * mpmath.log(phi) - mpmath.log(2 - p)
        jstar = int(mpmath.nint(y ** (2 - p) / (phi * (2 - p))))
        logs = [j * z - mpmath.loggamma(j + 1) - mpmath.loggamma(a * j)
                for j in range(max(1, jstar - reach), jstar + reach + 1)]
        top = max(logs)
        assert logs[0] < top - 120 or jstar - reach <= 1
        assert logs[-1] < top - 120
        log_sum = top + mpmath.log(mpmath.fsum(mpmath.exp(v - top) for v in logs))
        d = y * mu ** (1 - p) / (p - 1) + mu ** (2 - p) / (2 - p)
        return float(d / phi + mpmath.log(y) - log_sum)


# ------------------------------------------------------------------------------ the nll
@pytest.mark.parametrize("p", [1.2, 1.5, 1.9])
@pytest.mark.parametrize("y", [1e-3, 1.0, 1e5, 1e300])
def test_nll_at_a_vanishing_dispersion_is_the_normal_limit(p, y, strict_warnings):
    # as phi -> 0 an exponential dispersion model's density at its mean tends to the
    # saddle-point form (2 pi phi V(mu))^(-1/2), relative error O(phi / mu^(2-p)) (Jorgensen,
    # The Theory of Dispersion Models, 1997, section 3.5; recalled from memory): at y = mu,
    # nll -> log(2 pi phi y^p) / 2
    phi = 1e-300
    fam = lossfam.family("tweedie", power=p, dispersion=phi)
    got = fam.nll(np.array([y]), np.log([y]))[0]
    want = 0.5 * (math.log(2 * math.pi) + math.log(phi) + p * math.log(y))
    assert got == pytest.approx(want, rel=1e-12, abs=1e-12)
    # off the mean the nll is huge or +inf, never NaN
    off = fam.nll(np.array([y, y]), np.log([y]) + np.array([1e-3, 5.0]))
    assert np.all(off > got) and not np.isnan(off).any()


@pytest.mark.parametrize("p, phi, y, shift", [
    (1 + 2.0**-52, 1.18, 1.29e16, 0.0),
    (1 + 2.0**-52, 1.18, 1.29e16, 1e-9),
    (1 + 1e-9, 0.5, 3e10, 0.0),
    (1 + 1e-6, 2.0, 5e7, 1e-4),
])
def test_nll_with_power_next_to_one_matches_an_80_digit_series(p, phi, y, shift, strict_warnings):
    # reference: the series summed in mpmath at 80 digits (module docstring); these rows have
    # central indices j* ~ 1e7 .. 1e16, beyond any table of the series constants
    raw = math.log(y) + shift
    got = lossfam.family("tweedie", power=p, dispersion=phi).nll(np.array([y]), np.array([raw]))[0]
    assert got == pytest.approx(series_nll_mp(y, raw, p, phi), rel=1e-9)


def test_nll_with_power_next_to_one_tends_to_the_scaled_poisson_normal_limit():
    # as p -> 1 the law is phi times a Poisson(mu / phi) count, smoothed by gamma amounts of
    # variance ~ phi^2 (p-1); with j* ~ 1e16 counts it is normal with variance phi mu (the
    # Tweedie variance phi mu^p at p -> 1): nll at y = mu -> log(2 pi phi mu) / 2
    y, phi = 1.29e16, 1.18
    got = lossfam.family("tweedie", power=1 + 2.0**-52, dispersion=phi).nll(np.array([y]), np.log([y]))[0]
    assert got == pytest.approx(0.5 * math.log(2 * math.pi * phi * y), rel=1e-9)


# ------------------------------------------------------------------------------ pieces
def test_stirling_error_and_bd_match_scipy_and_mpmath():
    x = np.array([1e-8, 0.3, 1.0, 7.5, 14.999, 15.0, 40.0, 1e4, 1e12, 1e300])
    with mpmath.workdps(700):
        want = [float(mpmath.loggamma(mpmath.mpf(v) + 1) - (mpmath.mpf(v) * mpmath.log(v) - v
                                                            + mpmath.log(2 * mpmath.pi * v) / 2)) for v in x]
    np.testing.assert_allclose(tw._stirling_error(x), want, rtol=1e-12, atol=1e-15)
    t = np.array([-0.9, -0.1, -0.0999, -1e-6, 1e-12, 0.05, 0.0999, 0.1, 3.0])
    with mpmath.workdps(50):
        want = [float((1 + mpmath.mpf(v)) * mpmath.log1p(mpmath.mpf(v)) - mpmath.mpf(v)) for v in t]
    np.testing.assert_allclose(tw._bd(t), want, rtol=1e-14)


@pytest.mark.parametrize("shape", [1e12, 1e14])
def test_large_shape_incomplete_gamma_matches_scipy_where_scipy_is_accurate(shape):
    # scipy.special.gammaincc at shapes 1e12 - 1e14 and moderate deviations (where it agrees
    # with the normal limit to ~1e-15); the Temme form is used from 1e12 on
    t = np.array([-4.0, -1.0, -1e-3, 0.0, 0.3, 2.0, 5.0])
    excess = t * np.sqrt(shape)
    got = tw._gamma_cdf_large(np.full(t.size, shape), excess, True)
    np.testing.assert_allclose(got, special.gammaincc(shape, shape + excess), rtol=1e-12)
    both = got + tw._gamma_cdf_large(np.full(t.size, shape), excess, False)
    np.testing.assert_allclose(both, 1.0, rtol=1e-15)


def test_dispersion_score_by_bins_equals_the_row_by_row_sum():
    # the binned Taylor expansion of the series part of the score against the plain sum of
    # E_W[j] over the rows (both lossfam's; the row-wise one is checked against differences of
    # the series in test_family_fits_extreme.py)
    rng = np.random.default_rng(7)
    for p in (1.01, 1.3, 1.5, 1.9, 1.999):
        for phi in (1e-3, 1.0, 30.0):
            mu = np.exp(rng.normal(0.0, 2.0, 3000))
            y = TweedieLaw(mu, p, phi).rvs(random_state=rng)
            w = rng.uniform(0.1, 2.0, y.size)
            bins = tw._TaylorBins(y, w, p)
            pos = y > 0
            for log_phi in np.log(phi) + np.array([-3.0, 0.0, 3.0]):
                rowwise = np.sum(w[pos] * tw._series_mean_count(y[pos], p, np.exp(log_phi)))
                assert bins.mean_count_sum(log_phi) == pytest.approx(rowwise, rel=1e-13), (p, phi, log_phi)


# ------------------------------------------------------------------------------ the law
@pytest.mark.parametrize("p, phi, mu", [(1.5, 1.0, 1e30), (1.5, 1.0, 1e100), (1.5, 1.0, 1e300),
                                        (1.2, 0.3, 1e50), (1.9, 1.0, 1e200), (1.9, 2.0, 1e307)])
def test_law_at_huge_means_follows_the_edgeworth_expansion(p, phi, mu, strict_warnings):
    # Edgeworth: F(mu + z sd) = Phi(z) - phi(z) gamma (z^2 - 1) / 6 + O(1/lam), gamma the
    # skewness p sqrt(phi mu^(p-2)) of the Tweedie law (third cumulant phi^2 p mu^(2p-1)); here
    # lam = mu^(2-p) / (phi (2-p)) >= 1e12 (Hall, The Bootstrap and Edgeworth Expansion, 1992,
    # section 2.2; recalled from memory)
    law = TweedieLaw(np.array([mu]), p, phi)
    log_sd = 0.5 * (math.log(phi) + p * math.log(mu))
    skew = p * math.exp(0.5 * (math.log(phi) + (p - 2) * math.log(mu)))
    for z in (-2.0, 0.0, 1.0):
        y = mu + z * math.exp(log_sd) if abs(z) * math.exp(log_sd - math.log(mu)) > 1e-12 else mu
        zz = (y - mu) / math.exp(log_sd)  # the deviation y really has after rounding
        want = special.ndtr(zz) - math.exp(-zz * zz / 2) / math.sqrt(2 * math.pi) * skew * (zz * zz - 1) / 6
        assert law.cdf(np.array([y]))[0] == pytest.approx(want, abs=1e-12)
        assert law.sf(np.array([y]))[0] == pytest.approx(1 - want, abs=1e-12)
    # ppf: the smallest float y with cdf(y) >= q (at these means the cdf may jump between
    # neighbouring floats, so cdf(ppf(q)) = q is not always attainable)
    q = np.array([0.05, 0.5, 0.95])
    y = law.ppf(q)
    assert np.all(law.cdf(y) >= q - 1e-12)
    assert np.all((law.cdf(np.nextafter(y, 0)) < q + 1e-12) | (np.abs(law.cdf(y) - q) < 1e-9))
