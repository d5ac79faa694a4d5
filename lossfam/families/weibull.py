r"""Weibull durations: times to failure or to an event, with a shape that says whether the hazard rises.

With scale lambda = e^raw (log link on the scale), shape k > 0 and y > 0, in the
reliability parametrisation (S(y) = exp(-(y / lambda)^k); hazard rising for
k > 1, constant for k = 1, the exponential law with rate 1 / lambda):

    p(y) = (k / lambda) (y / lambda)^(k-1) exp(-(y / lambda)^k)

With u = log y - raw and w = k u (so e^w = (y / lambda)^k):

    nll      = e^w - w + log y - log k
    gradient = k (1 - e^w)                         (dw / draw = -k)
    Hessian  = k^2 e^w                             (exact; > 0)
    deviance = 2 (e^w - 1 - w)                     (2 (nll - nll at lambda = y), the minimum at w = 0)
    baseline = (1/k) log(sum w_i e^(k (log y_i - o_i)) / sum w_i)   (the root of the weighted
               gradient; logsumexp in log space)
    k^       = root of mean_w(u (e^(k u) - 1)) = 1 / k  (d/dk of the weighted nll; the left side
               rises with k (its derivative mean_w(u^2 e^(ku)) > 0) and the right side falls, so
               the root is unique when some u != 0; scipy.optimize.brentq on log k)

Step guard.  Where y is far below lambda, e^w -> 0: the gradient tends to k while the Hessian
k^2 e^w vanishes, so a leaf of such rows alone takes a Newton step of about -1 / (k e^w), without
bound (seen in boosting with an in-sample shape: a first tree step of -31 on the log scale).
``auto_step_limit = 1.0`` makes the engines' default guard cap each row's step at 1 on the raw
(log) scale: the Hessian is raised to |g| where it is below, the gradient untouched, so the fixed
point is the same.

The median is lambda (log 2)^(1/k); the mean lambda Gamma(1 + 1/k).  The predictive law is
scipy.stats.weibull_min(c = k, scale = e^raw).

Censored rows (lossfam.families._censored): log y = raw + W / k with W the standard minimum
extreme-value law, S0(w) = exp(-e^w), so on z = k (log v - raw) (scale s = 1/k)

    log S0 = -e^z,  log F0 = log1mexp(-e^z),  log f0 = z - e^z,  psi = 1 - e^z

(the accelerated-failure-time model with extreme-value errors).  In linear space
(``ExtremeValueLaw``, for the censored gradient and Hessian), with x = e^z:

    right-censored:  r = f0 / S0 = x,                    c = r + psi = 1
    left-censored:   q = f0 / F0 = x / expm1(x),         c = q - psi = q - 1 + x

(x / expm1(x) = 1 - x/2 + x^2/12 - x^4/720 + x^6/30240 - ..., the generating function of the
Bernoulli numbers, so c = x/2 + x^2/12 - x^4/720 + x^6/30240 for x < 1e-2, where q - 1 + x
would cancel; recalled from memory, checked against mpmath in the tests).  References: Lawless,
"Statistical Models and Methods for Lifetime Data", 2nd ed., Wiley 2003, section 1.3.2 and
chapter 5 (recalled from memory).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import optimize, stats
from scipy.special import logsumexp

from .._checks import POSITIVE
from ..links import LOG
from . import _censored
from ._base import Family
from ._censored import TailLaw
from .gamma import _expm1_minus


class ExtremeValueLaw(TailLaw):
    """The standard minimum extreme-value law of z = k (log v - raw) (module docstring)."""

    log_bounds = True
    median = float(np.log(np.log(2.0)))
    defers = False

    def pdf(self, z):
        return np.exp(z - np.exp(z))

    def score(self, z):
        return 1.0 - np.exp(z)

    def cdf(self, z):
        return -np.expm1(-np.exp(z))

    def sf(self, z):
        return np.exp(-np.exp(z))

    def tail(self, z, upper):
        x = np.exp(z)
        return np.where(upper, np.exp(-x), -np.expm1(-x))

    @staticmethod
    def log_tail(z, upper):
        """log S0(z) = -e^z, or log F0(z) = log(-expm1(-e^z)), = z - e^z / 2 below z = -20 (the
        same terms as ``Weibull._tail_pieces``)."""
        x = np.exp(z)
        if upper:
            return np.negative(x, out=x)
        return np.where(z < -20.0, z - 0.5 * x, np.log(-np.expm1(-x)))

    def right(self, z):
        return np.exp(z), np.ones(z.shape)

    def left(self, z):
        x = np.exp(z)
        q = x / np.expm1(x)
        c = q - 1.0
        c += x
        small = x < 1e-2
        if small.any():
            xs = x[small]
            x2 = xs * xs
            q[small] = 1.0 - 0.5 * xs + x2 * (1.0 / 12.0 - x2 / 720.0)
            c[small] = xs * (0.5 + xs * (1.0 / 12.0 + xs * xs * (-1.0 / 720.0 + x2 / 30240.0)))
        far = x > 700.0  # expm1(x) overflows past 709.78: q = x e^-x / (1 - e^-x), 0 when x = inf
        if far.any():
            xf = x[far]
            qf = xf * np.exp(-xf)
            qf[np.isinf(xf)] = 0.0
            q[far] = qf
            c[far] = np.where(np.isinf(xf), 1.0, qf - 1.0 + xf)
        return q, c


EXTREME_VALUE = ExtremeValueLaw()


@dataclass(frozen=True)
class Weibull(Family):
    shape: float = 1.0

    name = "weibull"
    link_function = LOG
    target_domain = POSITIVE
    param_domains = {"shape": POSITIVE}
    prediction_kind = "scale"
    support_edges = (0.0, np.inf)
    censored_fit = ("shape",)
    auto_step_limit = 1.0

    @property
    def prediction_level(self):
        """The scale lambda is the (1 - 1/e)-quantile of every Weibull law: S(lambda) = e^-1."""
        return float(-np.expm1(-1.0))

    def _w(self, y, raw):
        return self.shape * (np.log(y) - raw)  # +-inf where k (log y - raw) exceeds float64

    def _nll(self, y, raw):
        ly = np.log(y)
        w = self.shape * (ly - raw)
        with np.errstate(over="ignore", invalid="ignore"):
            t = np.exp(w) - w  # e^w - w >= 1; inf - inf at w = +inf, where the true value is +inf
        t[w == np.inf] = np.inf
        return t + ly - np.log(self.shape)

    def _grad_hess(self, y, raw):
        k = self.shape
        with np.errstate(over="ignore"):
            e = np.exp(self._w(y, raw))
            g = k * (1.0 - e)
            h = k * (k * e)  # k (k e), not k^2 e: k^2 may overflow where e = 0 (0 * inf)
        return g, h

    def _deviance(self, y, raw):
        w = self._w(y, raw)
        with np.errstate(over="ignore", invalid="ignore"):
            d = 2.0 * _expm1_minus(w)
        d[w == np.inf] = np.inf
        return d

    def _baseline(self, y, w, offset):
        k = self.shape
        t = np.log(y) if offset is None else np.log(y) - offset
        with np.errstate(over="ignore", invalid="ignore"):
            kt = k * t
            if not np.all(np.isfinite(kt[w > 0])):
                return np.inf  # k (log y - o) beyond float64: no finite baseline (refused by the caller)
            return (logsumexp(kt, b=w) - np.log(w.sum())) / k

    def _fit_nuisance(self, y, raw, w):
        pos = w > 0
        u, w = (np.log(y) - raw)[pos], w[pos]
        if not np.any(u != 0):
            raise ValueError("weibull: every log residual is zero, so the maximum-likelihood shape is infinite")
        sw = w.sum()

        def excess(log_k):
            k = np.exp(log_k)
            with np.errstate(over="ignore", invalid="ignore"):
                term = u * np.expm1(k * u)  # >= 0, +inf where it overflows
                term[u == 0] = 0.0
                v = float(np.dot(w, term) / sw) - 1.0 / k
            return min(v, 1e300)  # keep brentq's interpolation finite

        lo, hi = -1.0, 1.0
        while excess(lo) > 0:
            lo -= 2.0
            if lo < -690:
                raise ValueError("weibull: the maximum-likelihood shape is below the float64 range "
                                 "(the log residuals are too spread)")
        while excess(hi) < 0:
            hi += 2.0
            if hi > 690:
                raise ValueError("weibull: the maximum-likelihood shape is above the float64 range")
        return {"shape": float(np.exp(optimize.brentq(excess, lo, hi, xtol=1e-14, rtol=1e-15)))}

    def _tail_pieces(self, v, raw):
        k = self.shape
        z = k * (np.log(v) - raw)
        with np.errstate(over="ignore"):
            ez = np.exp(z)
        # log F0 = log(1 - exp(-e^z)) = z + log((1 - e^-e^z) / e^z) ~ z - e^z / 2 where e^z is tiny
        log_f = np.where(z < -20.0, z - 0.5 * ez, _censored.log1mexp(-ez))
        return log_f, -ez, z - ez + np.log(k), k * (ez - 1.0)

    def _tail_law(self):
        return EXTREME_VALUE, 1.0 / self.shape

    def _distribution(self, raw):
        with np.errstate(over="ignore"):
            return stats.weibull_min(c=self.shape, scale=np.exp(raw))
