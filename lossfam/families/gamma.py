r"""Gamma errors: the gamma deviance, for positive skewed amounts.

With mean mu = e^raw (log link), shape k > 0 (scale mu / k, so the
coefficient of variation is 1 / sqrt(k)) and y > 0:

    p(y) = y^(k-1) e^(-k y / mu) / (Gamma(k) (mu / k)^k)

    nll      = k y e^-raw + k raw - (k - 1) log y + lgamma(k) - k log k
    gradient = k (1 - y e^-raw)
    Hessian  = k y e^-raw                          (exact; > 0 since y > 0)
    deviance = 2 (y/mu - 1 - log(y/mu)) = 2 (expm1(l) - l), l = log y - raw
    baseline = log(sum w y / sum w); with an offset o, log(sum w y e^-o / sum w)
    k^       = root of log k - digamma(k) = mean_w(y/mu - 1 - log(y/mu))
               (d/dk of the weighted nll; the left side falls from +inf to 0,
               so the root is unique; scipy.optimize.brentq on log k)

The nll is evaluated as k (e^l - l) + log y + lgamma(k) - k log k with
l = log y - raw (the same expression regrouped), so a tiny y times a huge
e^-raw, or k raw near the float64 limit, cannot form 0 * inf or inf - inf.
e^-raw overflows for raw below ~ -709.78: nll and Hessian are then +inf and the
gradient -inf (never NaN).

The shape equation needs f(k) = log k - digamma(k) to full relative accuracy
even where f(k) ~ 1/(2k) is far below the rounding of log k (coefficients of
variation below ~1e-4): for k >= 16, f is evaluated from its asymptotic series
1/(2k) + 1/(12k^2) - 1/(120k^4) + 1/(252k^6) - 1/(240k^8) + 1/(132k^10)
(Abramowitz and Stegun, Handbook of Mathematical Functions, eq. 6.3.18;
truncation error below 3e-15 relative at k = 16), and
s = mean_w(e^l - 1 - l) from its Taylor series for |l| < 1e-2.

Censored rows (lossfam.families._censored): log y = raw + log(G / k) with G ~ Gamma(k, 1), a
location law on z = log v - raw (scale 1) with x = k e^z:

    log F0 = log P(k, x),  log S0 = log Q(k, x)      (regularised incomplete gamma functions)
    log f0 = k log x - x - lgamma(k),  psi = k - x

P and Q come from scipy.special.gammainc / gammaincc (log1p of the complement where the value
is above 1/2); where one of them is below 1e-280 (its log
would lose digits in the subnormal range, then underflow), its log is computed directly: log P
from the series P = x^k e^-x / Gamma(k+1) sum_n x^n / ((k+1)...(k+n)) (x < k there), log Q from
the continued fraction of Q evaluated by the modified Lentz method (x > k there) (Press,
Teukolsky, Vetterling and Flannery, Numerical Recipes, 3rd ed., 2007, section 6.2, recalled from
memory; both checked against mpmath in the tests).
The censored gradient and Hessian at an integer shape from 2 to 30 use the Poisson sum of the
survival instead of ``gammainc`` / ``gammaincc`` (IntegerGammaLaw).
"""
from __future__ import annotations

import functools
import math
from dataclasses import dataclass

import numpy as np
from scipy import optimize, stats
from scipy.special import digamma, gammainc, gammaincc, gammaincinv, gammaln, logsumexp

from .. import _checks
from .._checks import POSITIVE
from ..links import LOG
from ._base import Family, scaled_mean
from ._censored import TailLaw, horner as _horner, int_power as _int_power


class LogGammaLaw(TailLaw):
    """The law of z = log(G / k), G ~ Gamma(k, 1), in linear space for the censored gradient and
    Hessian (lossfam.families._censored.TailLaw): with x = k e^z, F0 = P(k, x), S0 = Q(k, x)
    (scipy.special.gammainc / gammaincc), f0 = x^k e^-x / Gamma(k), psi = k - x; the generic
    ratios f0 / S0 and f0 / F0 (tails below TINY go to the log-space pieces).  At k = 1 the law
    is the minimum extreme-value law (weibull's), used instead (``Gamma._tail_law``)."""

    log_bounds = True

    def __init__(self, k):
        self.k = float(k)
        self.log_k = float(np.log(k))
        self.norm = float(gammaln(k))
        self.median = float(np.log(gammaincinv(k, 0.5)) - self.log_k)

    def _x(self, z):
        return self.k * np.exp(z)

    def pdf(self, z):
        k = self.k
        return np.exp(k * (self.log_k + z) - self._x(z) - self.norm)

    def score(self, z):
        return self.k - self._x(z)

    def cdf(self, z):
        return gammainc(self.k, self._x(z))

    def sf(self, z):
        return gammaincc(self.k, self._x(z))

    #: beyond x = FAR_SLOPE k + FAR_X the right-censored ratios come from the asymptotic series
    FAR_SLOPE = 4.0
    FAR_X = 50.0
    TERMS = 40

    def right(self, z):
        """(r, c) of right-censored rows: the generic ratio, and far in the upper tail (where the
        log-space pieces are numbers near -x and their difference loses eps x) the asymptotic
        series Gamma(k, x) = x^(k-1) e^-x (1 + V), V = sum_j (k-1)...(k-j) / x^j (Abramowitz and
        Stegun, Handbook of Mathematical Functions, eq. 6.5.32, recalled from memory; terms shrink
        the 41st term is below 40! / 50^40 ~ 1e-20 of the sum beyond x = 4k + 50):  r = x / (1 + V), and with W = x V,
        c = r + k - x = k - W / (1 + V)  (no difference of terms of the size of x)."""
        r, c = TailLaw.right(self, z)
        with np.errstate(over="ignore", invalid="ignore"):
            x = self._x(z)
            far = x > self.FAR_SLOPE * self.k + self.FAR_X
            if far.any():
                xf = x[far]
                k = self.k
                term = np.ones(xf.shape)
                w = np.ones(xf.shape)  # W / (k - 1): 1 + (k-2)/x + (k-2)(k-3)/x^2 + ...
                for j in range(2, self.TERMS + 1):
                    term = term * ((k - j) / xf)
                    w += term
                w *= k - 1.0
                one_v = 1.0 + w / xf
                r[far] = xf / one_v
                c[far] = k - w / one_v
        return r, c


#: the largest integer shape served in closed form (IntegerGammaLaw): its cost grows with the shape
INTEGER_SHAPE_MAX = 30


class IntegerGammaLaw(LogGammaLaw):
    r"""The law of z = log(G / k), G ~ Gamma(k, 1), at an integer shape k >= 2, with no incomplete
    gamma function (``gammaincc`` costs about 80 ns a value at k = 2).  With x = k e^z and
    T(x) = sum_{j<k} x^j / j! (positive coefficients):

        S0 = Q(k, x) = e^-x T(x),   f0 = x^k e^-x / (k-1)!,   psi = k - x

    (the Poisson sum of the gamma survival at integer shape: Abramowitz and Stegun, Handbook of
    Mathematical Functions, eq. 6.5.13 with 26.4.21, recalled from memory; checked against
    scipy.stats.gamma in the tests).

    Right-censored rows (TailLaw.right), with no e^-x and no difference:

        r = f0 / S0 = x^k / ((k-1)! T(x)),   c = r + psi = N(x) / T(x),
        N(x) = sum_{j<k} (k - j) x^j / j!

    (the x^k terms of (k - x) T(x) and x^k / (k-1)! cancel exactly and the others are positive).
    Beyond x = 1e10 (where x^k may overflow) the same ratios in y = 1/x: T / x^(k-1) =
    sum_{i<k} y^i / (k-1-i)! and N / x^(k-1) = sum_{i<k} (i+1) y^i / (k-1-i)!, r = x (x^(k-1) / T) / (k-1)!.

    Left-censored rows (the reversed hazard q = f0 / F0, c = q - psi = q + x - k): where
    x >= x0 = P^-1(k, 1/100), F0 = 1 - S0 >= 1/100 loses at most a factor 100 to rounding.
    Below x0, F0 = f0 M(x) / k with M(x) = sum_{n>=0} x^n / ((k+1)...(k+n)) (the series of
    P(k, x); Press, Teukolsky, Vetterling and Flannery, Numerical Recipes, 3rd ed., 2007,
    section 6.2, recalled from memory), so

        q = k / M(x),   c = (k - k M + x M) / M = sum_{n>=1} n x^n / ((k+1)...(k+n)) / M(x)

    (all terms positive), cut where the terms fall below 1e-17 at x0 (each term is at most
    x0 / (k+1) times the one before).  Closed intervals take S0 and F0 the same way
    (``tail_pdf``); f0 from x^k e^-x and S0 from e^-x T(x), or from exp(k log x - x) and
    exp(log T(x) - x) beyond x = 700, where e^-x leaves the normal range.
    """

    defers = False
    FAR = 1e10  # beyond, the right-censored ratios in y = 1/x
    CLIP = 1e3  # e^-x = 0 beyond: S0 = 0 and F0 = 1 exactly in float64 (T(x) kept finite)

    def __init__(self, k):
        super().__init__(k)
        n = int(round(k))
        self.n = n
        fact = [math.factorial(j) for j in range(n)]
        self.inv_fact = 1.0 / fact[n - 1]
        self.fact = float(fact[n - 1])
        self.t_coef = tuple(1.0 / f for f in fact)
        self.n_coef = tuple((n - j) / fact[j] for j in range(n))
        self.u_coef = tuple(1.0 / fact[n - 1 - i] for i in range(n))
        self.v_coef = tuple((i + 1) / fact[n - 1 - i] for i in range(n))
        self.x0 = float(gammaincinv(k, 0.01))
        terms = int(np.ceil(17.0 * np.log(10.0) / -np.log(self.x0 / (k + 1.0)))) + 1
        alpha = [1.0]
        for i in range(1, terms + 1):
            alpha.append(alpha[-1] / (k + i))
        self.m_coef = tuple(alpha)
        self.w_coef = tuple(i * a for i, a in enumerate(alpha))

    def _pdf_of(self, z, x, xc, e):
        """f0 from x, min(x, CLIP) and e^-min(x, CLIP)."""
        f = _int_power(xc, self.n)
        f *= e
        f *= self.inv_fact
        far = x > 700.0
        if far.any():
            f[far] = np.exp(self.k * (self.log_k + z[far]) - x[far] - self.norm)
        return f

    def _survival(self, z):
        """(x, min(x, CLIP), e^-min(x, CLIP), S0)."""
        x = self._x(z)
        xc = np.minimum(x, self.CLIP)
        e = np.negative(xc)
        np.exp(e, out=e)
        t = _horner(self.t_coef, xc)
        s0 = t * e
        far = x > 700.0  # e^-x leaves the normal range: S0 from log T - x (0 beyond CLIP, as it is)
        if far.any():
            s0[far] = np.exp(np.log(t[far]) - x[far])
        return x, xc, e, s0

    def pdf(self, z):
        x, xc, e, _ = self._survival(z)
        return self._pdf_of(z, x, xc, e)

    def tail_pdf(self, z, upper):
        x, xc, e, s0 = self._survival(z)
        f = self._pdf_of(z, x, xc, e)
        tail = np.subtract(1.0, s0, out=e)
        np.copyto(tail, s0, where=upper)
        small = ~upper & (x < self.x0)
        if small.any():
            tail[small] = f[small] * _horner(self.m_coef, x[small]) / self.k
        return tail, f

    def right(self, z):
        x = self._x(z)
        xc = np.minimum(x, self.FAR)
        t = _horner(self.t_coef, xc)
        r = _int_power(xc, self.n)
        r *= self.inv_fact
        r /= t
        c = _horner(self.n_coef, xc)
        c /= t
        far = x > self.FAR
        if far.any():
            xf = x[far]
            y = 1.0 / xf
            u = _horner(self.u_coef, y)
            r[far] = xf / (u * self.fact)  # (k-1)! U(y) ~ 1: no overflow before r itself
            c[far] = _horner(self.v_coef, y) / u
        return r, c

    def left(self, z):
        x, xc, e, s0 = self._survival(z)
        q = self._pdf_of(z, x, xc, e)
        f0 = np.subtract(1.0, s0, out=s0)
        q /= f0
        c = x - self.k
        c += q
        small = x < self.x0
        if small.any():
            xs = x[small]
            m = _horner(self.m_coef, xs)
            q[small] = self.k / m
            c[small] = _horner(self.w_coef, xs) / m
        return q, c


@functools.lru_cache(maxsize=64)
def _law_for(k):
    if k == round(k) and 2 <= k <= INTEGER_SHAPE_MAX:
        return IntegerGammaLaw(k)
    return LogGammaLaw(k)


@dataclass(frozen=True)
class Gamma(Family):
    shape: float = 1.0

    name = "gamma"
    link_function = LOG
    target_domain = POSITIVE
    param_domains = {"shape": POSITIVE}
    # engine facts: in 1/shape units the gradient and Hessian are 1 - y e^-raw and y e^-raw,
    # the built-in gamma objectives' own (neither engine damps them)
    dispersion_unit = ("shape", -1.0)
    native_twins = {"lightgbm": {"objective": "gamma"}, "xgboost": {"objective": "reg:gamma"}}
    support_edges = (0.0, np.inf)
    censored_fit = ("shape",)

    def _nll(self, y, raw):
        k = self.shape
        log_y = np.log(y)
        lr = log_y - raw
        with np.errstate(over="ignore", invalid="ignore"):
            t = np.where(lr > 709.0, np.inf, np.exp(np.minimum(lr, 709.0)) - lr)  # e^l - l >= 1
        return k * t + log_y + (gammaln(k) - k * np.log(k))

    def _grad_hess(self, y, raw):
        k = self.shape
        h = np.negative(raw)
        np.exp(h, out=h)
        h *= y
        g = 1.0 - h
        if k != 1.0:
            g *= k
            h *= k
        return g, h

    def _deviance(self, y, raw):
        lr = np.log(y) - raw
        return np.maximum(2.0 * (np.expm1(lr) - lr), 0.0)

    def _baseline(self, y, w, offset):
        if offset is None:
            total = float(np.dot(w, y))
            if np.isfinite(total) and total > 1e-280:
                return np.log(total) - np.log(w.sum())  # the sum is a normal number: no log space needed
        # log(sum w y e^-o / sum w) in log space: no overflow of y e^-o, no underflow of tiny y
        t = np.log(y) if offset is None else np.log(y) - offset
        return logsumexp(t, b=w) - np.log(w.sum())

    def _fit_nuisance(self, y, raw, w):
        lr = np.log(y)
        lr = np.subtract(lr, raw, out=lr) if isinstance(lr, np.ndarray) else lr - raw
        excess_per_row = _expm1_minus(lr)  # y/mu - 1 - log(y/mu) >= 0
        del lr
        over = None if _checks._finite_sum(excess_per_row) else (w > 0) & ~np.isfinite(excess_per_row)
        if over is not None and np.any(over):
            raise ValueError(
                f"gamma: the shape cannot be fitted because y / mu = y e^-raw overflows in "
                f"{_checks.rows_text(over, raw)} (raw scores)"
            )
        target = scaled_mean(excess_per_row, w, overwrite=True)
        if not target > 0:
            raise ValueError(
                "gamma: every target equals its predicted mean, so the maximum-likelihood shape is infinite"
            )

        if target > 1e8:
            # k < 1e-8: f(k) = log k + 1/k + euler_gamma + O(k) (A&S 6.3.5, 6.3.14), so 1/k = s - gamma - log k
            k = 1.0 / target
            for _ in range(8):
                k = 1.0 / (target - np.euler_gamma - np.log(k))
            if not k > 0:
                raise ValueError("gamma: the maximum-likelihood shape is below the float64 range (y / mu varies too much)")
            return {"shape": float(k)}

        def excess(log_k):
            return _log_minus_digamma(np.exp(log_k)) / target - 1.0

        # f(k) = log k - digamma(k) ~ 1/(2k) for large k and ~ 1/k for small k: bracket around 1/(2 target)
        guess = np.log(0.5 / target) if target < 1.0 else -np.log(target)
        lo, hi = guess - 2.0, guess + 2.0
        while excess(lo) < 0:
            lo -= 2.0
        while excess(hi) > 0:
            hi += 2.0
        return {"shape": float(np.exp(optimize.brentq(excess, lo, hi, xtol=1e-14, rtol=1e-15)))}

    def _tail_pieces(self, v, raw):
        k = self.shape
        z = np.log(v) - raw
        with np.errstate(over="ignore", divide="ignore"):
            x = k * np.exp(z)
            log_x = np.log(k) + z
            log_f0 = k * log_x - x - gammaln(k)
        log_p, log_q = _log_incomplete_gamma(k, x, log_x)
        return log_p, log_q, log_f0, x - k

    def _tail_law(self):
        if self.shape == 1.0:  # the exponential law: log G is the minimum extreme-value law
            from .weibull import EXTREME_VALUE
            return EXTREME_VALUE, 1.0
        return _law_for(float(self.shape)), 1.0

    def _distribution(self, raw):
        with np.errstate(over="ignore"):
            mu = np.exp(raw)
        return stats.gamma(a=self.shape, scale=mu / self.shape)


def _log_minus_digamma(k):
    """log k - digamma(k) > 0, to full relative accuracy for every k > 0 (series for k >= 16).

    A float for a scalar k, else an array of k's shape."""
    k = np.asarray(k, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        r = 1.0 / (k * k)
        series = (0.5 + (1.0 / 12.0 + r * (-1.0 / 120.0 + r * (1.0 / 252.0 + r * (-1.0 / 240.0 + r / 132.0)))) / k) / k
        out = np.where(k < 16.0, np.log(k) - digamma(k), series)
    return float(out) if out.ndim == 0 else out


def _expm1_minus(x):
    """e^x - 1 - x >= 0 without cancellation near 0 (Taylor series for |x| < 1e-2, to x^7/5040)."""
    with np.errstate(over="ignore"):
        out = np.expm1(x)
        out = np.subtract(out, x, out=out) if isinstance(out, np.ndarray) else out - x
    small = (x > -1e-2) & (x < 1e-2)  # |x| < 1e-2
    if np.any(small):
        s = x[small]
        out[small] = s * s * (0.5 + s * (1 / 6 + s * (1 / 24 + s * (1 / 120 + s * (1 / 720 + s / 5040)))))
    return out


_TINY = 1e-280


def _log_incomplete_gamma(k, x, log_x):
    """(log P(k, x), log Q(k, x)) for x >= 0 (module docstring): scipy where the value is above
    1e-280, else the series (P) or the continued fraction (Q) in log space."""
    p = gammainc(k, x)
    q = gammaincc(k, x)
    with np.errstate(divide="ignore"):  # the log of a value near 1 from its complement
        log_p = np.where(q < 0.5, np.log1p(-q), np.log(p))
        log_q = np.where(p < 0.5, np.log1p(-p), np.log(q))
    small = (p < _TINY) & (x > 0)
    if np.any(small):
        xs, lx = x[small], log_x[small]
        term = np.ones_like(xs)
        total = np.ones_like(xs)
        for n in range(1, 2000):
            term *= xs / (k + n)
            total += term
            if np.all(term <= 1e-17 * total):
                break
        log_p[small] = k * lx - xs - gammaln(k + 1.0) + np.log(total)
    small = (q < _TINY) & np.isfinite(x)
    if np.any(small):
        xs, lx = x[small], log_x[small]
        tiny = 1e-300
        b = xs + 1.0 - k
        c = np.full_like(xs, 1.0 / tiny)
        d = 1.0 / b
        h = d.copy()
        for i in range(1, 2000):
            an = -i * (i - k)
            b = b + 2.0
            d = an * d + b
            d = np.where(np.abs(d) < tiny, tiny, d)
            c = b + an / c
            c = np.where(np.abs(c) < tiny, tiny, c)
            d = 1.0 / d
            delta = d * c
            h = h * delta
            if np.all(np.abs(delta - 1.0) < 1e-16):
                break
        log_q[small] = -xs + k * lx - gammaln(k) + np.log(h)
    return log_p, log_q
