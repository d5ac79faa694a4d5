"""tweedie's nll against a 40-digit evaluation of the same law, on random (y, mu, phi, p).

Reference: the series of Dunn and Smyth (2005, "Series evaluation of Tweedie exponential
dispersion model densities", Statistics and Computing 15, 267-280, eq. 4-5),

    log f(y) = -(y mu^(1-p) / (p-1) + mu^(2-p) / (2-p)) / phi - log y + log sum_j W_j,
    log W_j = j z - lgamma(j+1) - lgamma(a j),  a = (2-p)/(p-1),
    z = a log y - a log(p-1) - (1+a) log phi - log(2-p),

summed here term by term in mpmath at 40 significant digits, from the largest term outward until
the terms fall below e^-105 (~1e-46) of the largest (log W_j is concave in j, so the rest is
smaller still), and P(Y = 0) = exp(-mu^(2-p) / (phi (2-p))).  The inputs are the float64 values
themselves (converted exactly), so the reference is the exact nll of what lossfam receives.
"""
import mpmath
import numpy as np
import pytest
from scipy import special

import lossfam
from lossfam.families import TweedieLaw


def reference_nll(y, raw, p, phi):
    """The nll of one row in mpmath at 40 digits (see the module docstring)."""
    mp = mpmath.mp
    with mpmath.workdps(40):
        y, raw, p, phi = (mp.mpf(float(v)) for v in (y, raw, p, phi))
        mu = mp.exp(raw)
        kappa = mu ** (2 - p) / (phi * (2 - p))
        if y == 0:
            return kappa
        a = (2 - p) / (p - 1)
        z = a * mp.log(y) - a * mp.log(p - 1) - (1 + a) * mp.log(phi) - mp.log(2 - p)
        peak = max(1, int(mp.nint(mp.exp((z - a * mp.log(a)) / (1 + a)))))

        def log_w(j):
            return j * z - mp.loggamma(j + 1) - mp.loggamma(a * j)

        logs = [log_w(peak)]
        best = logs[0]
        for step in (1, -1):  # walk right, then left, from the Stirling peak
            j = peak + step
            while j >= 1:
                t = log_w(j)
                logs.append(t)
                best = max(best, t)
                if t < best - 105 and t < logs[-2]:
                    break
                j += step
        log_sum = best + mp.log(mp.fsum(mp.exp(t - best) for t in logs))
        return y * mu ** (1 - p) / ((p - 1) * phi) + kappa + mp.log(y) - log_sum


def random_grid(rng, settings, rows, max_jstar):
    """(p, phi, y, raw) per setting: y drawn from the law itself and, for half the rows, spread
    over e^N(0, 2) times the mean (tails the law rarely reaches); rows with j* above max_jstar
    (the reference's cost grows like sqrt(j*)) are left out."""
    out = []
    for _ in range(settings):
        p = float(rng.uniform(1.01, 1.99))
        phi = float(np.exp(rng.uniform(np.log(0.02), np.log(50.0))))
        raw = rng.uniform(-4.0, 4.0, rows)
        y = TweedieLaw(np.exp(raw), p, phi).rvs(random_state=rng)
        off = rng.uniform(size=rows) < 0.5
        y[off] = np.exp(raw[off] + rng.normal(0.0, 2.0, off.sum()))
        jstar = y ** (2 - p) / (phi * (2 - p))
        keep = jstar <= max_jstar
        out.append((p, phi, y[keep], raw[keep]))
    return out


def summand_scale(y, p, phi):
    """|j* z| + lgamma(j* + 1) + |lgamma(a j*)| at the peak j* (0 at y = 0): the size of the
    summands of log W_j that cancel in the log of the series.  No float64 evaluation of the series
    can be closer to the exact value than a few units of rounding (2.2e-16) of this size."""
    a = (2 - p) / (p - 1)
    with np.errstate(divide="ignore"):
        z = a * np.log(y) - a * np.log(p - 1) - (1 + a) * np.log(phi) - np.log(2 - p)
        jstar = np.maximum(np.exp((z - a * np.log(a)) / (1 + a)), 1.0)
    scale = np.abs(jstar * z) + special.gammaln(jstar + 1) + np.abs(special.gammaln(a * jstar))
    return np.where(y > 0, scale, 0.0)


def check_grid(grid):
    """Every row within 1e-12 relative (to max(1, |nll|)), or, where the series' own summands are
    so large that float64 rounding of them alone exceeds that, within 16 units of their rounding."""
    for p, phi, y, raw in grid:
        got = lossfam.family("tweedie", power=p, dispersion=phi).nll(y, raw)
        assert np.all(np.isfinite(got))
        ref = np.array([float(reference_nll(*row)) for row in zip(y, raw, np.full(y.size, p), np.full(y.size, phi))])
        size = np.maximum(1.0, np.abs(ref))
        err = np.abs(got - ref) / size
        tol = np.maximum(1e-12, 16 * 2.2e-16 * summand_scale(y, p, phi) / size)
        k = int((err / tol).argmax())
        assert err[k] <= tol[k], (f"p={p!r} phi={phi!r}: relative error {err[k]:.2e} (allowed {tol[k]:.2e}) at "
                                  f"y={y[k]!r}, raw={raw[k]!r} (nll {got[k]!r}, reference {ref[k]!r})")


def wide_rows(rng, settings, rows, sigma=(42.0, 60.0)):
    """Rows whose series terms spread over sigma_j = sqrt(j* / (1 + a)) in the given range, where
    the nll takes the integral form: j* = sigma_j^2 (1 + a) = y^(2-p) / (phi (2-p)) solved for y."""
    out = []
    for p, phi in settings:
        a = (2 - p) / (p - 1)
        s = rng.uniform(*sigma, rows)
        y = (s**2 * (1 + a) * phi * (2 - p)) ** (1 / (2 - p))
        out.append((p, phi, y, np.log(y) + rng.normal(0.0, 0.3, rows)))
    return out


def test_nll_matches_a_40_digit_series_on_a_random_grid():
    rng = np.random.default_rng(20261202)
    grid = random_grid(rng, settings=12, rows=40, max_jstar=1500.0)
    assert sum(g[2].size for g in grid) > 400
    check_grid(grid)


def test_nll_matches_a_40_digit_series_where_it_takes_the_integral_form():
    from lossfam.families import tweedie as tw
    grid = wide_rows(np.random.default_rng(3), [(1.3, 0.005), (1.85, 0.05)], rows=6)
    for p, phi, y, _ in grid:  # the rows are where the integral form is used (else they test nothing new)
        z, a = tw._series_z(y, p, phi)
        assert np.all(np.sqrt(np.exp((z - a * np.log(a)) / (1 + a)) / (1 + a)) > tw._WIDE_SIGMA)
    check_grid(grid)


@pytest.mark.slow
def test_nll_matches_a_40_digit_series_on_a_large_random_grid():
    rng = np.random.default_rng(7)
    grid = random_grid(rng, settings=60, rows=80, max_jstar=2e4)
    grid += wide_rows(rng, [(1.1, 0.002), (1.5, 0.01), (1.95, 0.2)], rows=10, sigma=(40.0, 80.0))
    assert sum(g[2].size for g in grid) > 3000
    check_grid(grid)
