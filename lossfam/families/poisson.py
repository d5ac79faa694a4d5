r"""Poisson counts: the Poisson deviance.

With mean mu = e^raw (log link) and y = 0, 1, 2, ...:

    P(y) = mu^y e^(-mu) / y!

    nll      = e^raw - y raw + lgamma(y + 1)
    gradient = e^raw - y
    Hessian  = e^raw                              (exact)
    deviance = 2 (y log(y / mu) - y + mu) = 2 y (expm1(d) - d), d = raw - log y
               (2 mu where y = 0; the expm1 form avoids cancellation near mu = y)
    baseline = log(sum w y / sum w); with an offset o, log(sum w y / sum w e^o)

nll needs integer counts (it is a log-probability).  The gradient, Hessian,
deviance and baseline accept any y >= 0: a rate y per unit of exposure with
the exposure as weight gives the same gradients as the count model.
e^raw overflows beyond raw ~ 709.78: nll, gradient and Hessian are then +inf.
For counts y >= 1e4 (where lgamma(y + 1) and y raw cancel) and wherever the
direct nll would meet inf - inf (raw or y near the float64 limit) it is
evaluated as the sum of two non-negative parts instead,

    nll = y (expm1(d) - d) + [lgamma(y + 1) - y log y + y],   d = raw - log y,

(e^raw where y = 0), so it is +inf on overflow and never NaN.  The bracket is
Stirling's remainder 0.5 log(2 pi y) + 1/(12 y) - 1/(360 y^3) + 1/(1260 y^5)
for y >= 1e4 (Abramowitz and Stegun, Handbook of Mathematical Functions,
eq. 6.1.41; truncation below 1e-30 there).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats
from scipy.special import gammaln, logsumexp, xlogy

from .._checks import NONNEGATIVE, NONNEGATIVE_INTEGER
from ..links import LOG
from ._base import Family


@dataclass(frozen=True)
class Poisson(Family):
    name = "poisson"
    link_function = LOG
    target_domain = NONNEGATIVE
    nll_domain = NONNEGATIVE_INTEGER
    discrete = True
    # engine facts: both engines' built-in poisson multiply every Hessian by e^0.7 (LightGBM
    # poisson_max_delta_step, XGBoost max_delta_step, which also clips each leaf at 0.7); the
    # default step guard does the same, so the default is the built-in
    hessian_damping = 0.7
    native_twins = {"lightgbm": {"objective": "poisson", "poisson_max_delta_step": 0.7},
                    "xgboost": {"objective": "count:poisson", "max_delta_step": 0.7}}

    def _nll(self, y, raw):
        with np.errstate(invalid="ignore"):
            out = np.exp(raw) - y * raw + gammaln(y + 1.0)
        bad = np.isnan(out) | (y >= 1e4)  # large counts: the direct form cancels (1e300 - 6.9e302 + 6.9e302)
        if np.any(bad):
            out[bad] = _nll_split(y[bad], raw[bad])
        return out

    def _grad_hess(self, y, raw):
        h = np.exp(raw)
        return h - y, h

    def _deviance(self, y, raw):
        mu = np.exp(raw)
        pos = y > 0
        d = raw - np.log(np.where(pos, y, 1.0))
        with np.errstate(invalid="ignore"):  # 0 * inf in the branch not taken where y = 0
            dev = np.where(pos, y * (np.expm1(d) - d), mu)
        return np.maximum(2.0 * dev, 0.0)

    def _baseline(self, y, w, offset):
        total = float(np.dot(w, y))
        if not total > 0:
            raise ValueError("poisson: every row with positive weight has count 0, so the best constant raw score is -inf")
        if offset is None and np.isfinite(total) and total > 1e-280:
            return np.log(total) - np.log(w.sum())  # the sum is a normal number: no log space needed
        # log sum w y - log sum w e^o, in log space so that large offsets neither overflow nor underflow
        with np.errstate(divide="ignore"):
            log_total = logsumexp(np.log(y), b=w)
        log_exposure = np.log(w.sum()) if offset is None else logsumexp(offset, b=w)
        return log_total - log_exposure

    def _distribution(self, raw):
        with np.errstate(over="ignore"):
            return PoissonLaw(np.exp(raw))


class PoissonLaw:
    r"""scipy.stats.poisson(mu) per row, with quantiles that are right for every legal mean.

    scipy's poisson.ppf (scipy 1.17, measured against the pmf summed in log space) returns NaN
    for most levels from means of about 1e11 (every level from about 1e30; inf at q = 1/2 for mean
    1.7e308) and counts several too small at q = 1 - 1e-10 from means of about 1e7 (its
    incomplete gamma function loses accuracy in the tails of large shapes: 27% at shape 1e8, six
    standard deviations out).  From ``FAR_MEAN`` on, the quantile is the Cornish-Fisher expansion
    of the Poisson law (all cumulants mu, skewness mu^-1/2, excess kurtosis 1/mu) with the
    continuity correction,

        k(q) = ceil(mu + z sqrt(mu) + (z^2 - 1)/6 + (11 z - 5 z^3) / (72 sqrt(mu)) - 1/2),

    z = Phi^-1(q) (E. A. Cornish and R. A. Fisher, "Moments and cumulants in the specification of
    distributions", Revue de l'Institut International de Statistique 5, 1937; terms recalled from
    memory and checked against the pmf summed in log space in tests/test_discrete_laws_extreme.py).
    Its next term is of order z^4 / mu: at most ~0.2 of a count for mu >= 1e7 and q >= 1e-300, so
    a count can be one off only where the quantile lies that close to an integer.  Above 2**53
    the result is the float nearest the expansion.  Everything else is scipy's.
    """

    FAR_MEAN = 1e7

    def __init__(self, mu):
        self._law = stats.poisson(mu)
        self.mu = np.asarray(mu, dtype=float)

    def __getattr__(self, name):
        return getattr(self._law, name)

    def _quantile(self, lower_q, upper_q):
        out = np.asarray(self._law.ppf(lower_q), dtype=float)
        lower_q, upper_q, mu = np.broadcast_arrays(lower_q, upper_q, self.mu)
        own = (mu >= self.FAR_MEAN) & np.isfinite(mu) & (lower_q > 0) & (upper_q > 0)
        if np.any(own):
            out = np.array(np.broadcast_to(out, mu.shape), dtype=float)
            out[own] = _far_quantile(mu[own], lower_q[own], upper_q[own])
        return out[()]

    def ppf(self, q):
        q = np.asarray(q, dtype=float)
        return self._quantile(q, 1.0 - q)

    def isf(self, q):
        q = np.asarray(q, dtype=float)
        return self._quantile(1.0 - q, q)

    def median(self):
        return self.ppf(np.full(self.mu.shape, 0.5))

    def interval(self, confidence):
        c = np.asarray(confidence, dtype=float)
        if np.any((c < 0) | (c > 1)):
            raise ValueError("poisson: confidence must be between 0 and 1 inclusive")
        return self.ppf((1.0 - c) / 2.0), self.ppf((1.0 + c) / 2.0)


def _far_quantile(mu, lower_q, upper_q):
    """PoissonLaw's expansion (its docstring), z taken from the smaller of the two tails."""
    z = np.where(lower_q <= 0.5, stats.norm.ppf(lower_q), stats.norm.isf(upper_q))
    root = np.sqrt(mu)
    k = mu + z * root + (z * z - 1.0) / 6.0 + (11.0 * z - 5.0 * z ** 3) / (72.0 * root) - 0.5
    return np.maximum(np.ceil(k), 0.0)


def _stirling_remainder(y):
    """lgamma(y + 1) - (y log y - y), >= 0; Stirling's series for large y (no cancellation)."""
    big = y >= 1e4
    safe = np.where(big, y, 1.0)
    series = 0.5 * np.log(2.0 * np.pi * safe) + 1.0 / (12.0 * safe) - 1.0 / (360.0 * safe**3) + 1.0 / (1260.0 * safe**5)
    direct = gammaln(np.where(big, 1.0, y) + 1.0) - xlogy(y, y) + y
    return np.where(big, series, direct)


def _nll_split(y, raw):
    """The nll as a sum of non-negative parts (for rows where the direct form meets inf - inf)."""
    with np.errstate(over="ignore", divide="ignore", invalid="ignore"):
        d = raw - np.log(np.where(y > 0, y, 1.0))
        part = np.where(y > 0, y * (np.expm1(d) - d), np.exp(raw))
        return part + _stirling_remainder(y)
