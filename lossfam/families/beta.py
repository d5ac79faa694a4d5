r"""Beta errors in the mean-precision form: rates and proportions strictly between 0 and 1.

With mean mu = expit(raw) (logit link) and precision phi > 0, the shapes are
a = mu phi and b = (1 - mu) phi, so Var y = mu (1 - mu) / (1 + phi)
(Ferrari and Cribari-Neto, 2004, "Beta regression for modelling rates and
proportions", J. Appl. Statist. 31(7), eq. 2-3).  For 0 < y < 1:

    p(y) = Gamma(phi) / (Gamma(a) Gamma(b)) y^(a-1) (1-y)^(b-1)

    nll      = lgamma(a) + lgamma(b) - lgamma(phi) - (a-1) log y - (b-1) log(1-y)
               with lgamma(a) = lgamma(a+1) - log a and log a = log phi + log_expit(raw)
               (and the same for b with log_expit(-raw)), so it stays finite for any raw
    gradient = phi mu (1-mu) [digamma(a) - digamma(b) - logit(y)]      (d mu / d raw = mu (1-mu))
             = (1-mu) a digamma(a+1) - mu b digamma(b+1) + 2 mu - 1 - phi mu (1-mu) logit(y)
               (the same, using digamma(a) = digamma(a+1) - 1/a; finite for any raw)
    Hessian  = exact: phi mu(1-mu)(1-2mu) [digamma(a) - digamma(b) - logit(y)]
                      + phi^2 mu^2 (1-mu)^2 [trigamma(a) + trigamma(b)],
               which is negative for some (y, raw) (the nll is not convex in raw).  Replaced by
               its expectation under the model (Fisher scoring; E logit-type term = 0 since
               E log(y/(1-y)) = digamma(a) - digamma(b)):
               h = phi^2 mu^2 (1-mu)^2 [trigamma(a) + trigamma(b)]
                 = (1-mu)^2 (a^2 trigamma(a+1) + 1) + mu^2 (b^2 trigamma(b+1) + 1)
               (trigamma(a) = trigamma(a+1) + 1/a^2), positive (>= 1/2) and finite everywhere.
               Near the optimum the observed and expected Hessians agree on average, so
               Newton-type fits keep their fast convergence; the gradient is exact.
    deviance = 2 (nll(y, raw) - nll(y, raw~)), raw~ the per-row maximiser: the root of
               digamma(a) - digamma(b) = logit(y) (increasing in raw; found row by row with
               scipy.optimize.elementwise.find_root).  Unlike the counts and amounts families,
               the likelihood of one row does not peak at mu = y (Ferrari and Cribari-Neto 2004,
               section 3, define the deviance residuals with this saturated model).
    baseline = the root of digamma(mu phi) - digamma((1-mu) phi) = mean_w logit-term
               sum w log(y/(1-y)) / sum w (increasing in mu: a unique root; brentq on raw);
               with an offset, a generic scalar minimisation of the weighted nll
    phi^     = root of the weighted score in phi,
               sum w [mu digamma(a) + (1-mu) digamma(b) - digamma(phi) - mu log y - (1-mu) log(1-y)] = 0
               (the nll is convex in phi: the beta law is an exponential family in (a, b) and
               (a, b) is linear in phi, so the root is unique; brentq on log phi)

The predictive law is scipy.stats.beta(a, b).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import optimize, stats
from scipy.optimize import elementwise
from scipy.special import digamma, expit, gammaln, log_expit, zeta

from .._checks import OPEN_UNIT, POSITIVE
from ..links import LOGIT
from ._base import Family


@dataclass(frozen=True)
class Beta(Family):
    precision: float = 1.0

    name = "beta"
    link_function = LOGIT
    target_domain = OPEN_UNIT
    param_domains = {"precision": POSITIVE}
    exact_hessian = False
    location_needs_nuisance = True

    def _shapes(self, raw):
        phi = self.precision
        return phi * expit(raw), phi * expit(-raw)

    def _nll(self, y, raw):
        phi = self.precision
        a, b = self._shapes(raw)
        log_a = np.log(phi) + log_expit(raw)
        log_b = np.log(phi) + log_expit(-raw)
        return (gammaln(a + 1.0) - log_a + gammaln(b + 1.0) - log_b - gammaln(phi)
                - (a - 1.0) * np.log(y) - (b - 1.0) * np.log1p(-y))

    def _grad_hess(self, y, raw):
        phi = self.precision
        mu, nu = expit(raw), expit(-raw)  # nu = 1 - mu without cancellation
        a, b = phi * mu, phi * nu
        logit_y = np.log(y) - np.log1p(-y)
        # phi mu nu [digamma(a) - digamma(b) - logit y] with digamma(a) = digamma(a+1) - 1/a:
        # phi mu nu / a = nu and phi mu nu / b = mu, so no 1/a that overflows for tiny a
        g = phi * (mu * nu) * (digamma(a + 1.0) - digamma(b + 1.0) - logit_y) + (mu - nu)
        # a (a trigamma(a+1)) <= a: no a^2 that overflows before its factor nu^2 underflows;
        # trigamma(x) = zeta(2, x), the Hurwitz zeta function (what scipy's polygamma(1, x) evaluates)
        h = nu * nu * (a * (a * zeta(2.0, a + 1.0)) + 1.0) + mu * mu * (b * (b * zeta(2.0, b + 1.0)) + 1.0)
        return g, h

    def _logit_root(self, target):
        """Raw scores c solving digamma(a) - digamma(b) = target (a = phi expit(c), b = phi expit(-c)).

        With digamma(x) = digamma(x+1) - 1/x and 1/b - 1/a = 2 sinh(c) / phi the equation
        reads 2 sinh(c) / phi + D(c) = target, D(c) = digamma(a+1) - digamma(b+1), and
        |D| <= M = digamma(phi+1) - digamma(1); so the root lies between
        asinh(phi (target -+ M) / 2), a bracket that is always finite, and the function
        is evaluated without 1/a, which overflows for tiny a.
        """
        phi = self.precision
        log_phi = np.log(phi)
        target = np.asarray(target, dtype=float)

        def score(c, t):
            u = np.abs(c)
            with np.errstate(divide="ignore", over="ignore"):
                # 2 sinh(c) / phi = sign(c) exp(log(2 sinh|c|) - log phi), no inf - inf for tiny phi
                lead = np.copysign(np.exp(u + np.log1p(-np.exp(-2.0 * u)) - log_phi), c)
            return lead + digamma(phi * expit(c) + 1.0) - digamma(phi * expit(-c) + 1.0) - t

        def asinh_half_phi(v):  # asinh(phi v / 2) without overflowing phi v
            with np.errstate(divide="ignore", over="ignore"):
                x = 0.5 * phi * v
                far = np.copysign(log_phi + np.log(np.abs(v)), v)
            return np.where(np.abs(x) < 1e300, np.arcsinh(x), far)

        # M <= trigamma(1) phi (digamma is concave); the bound keeps M > 0 where digamma(phi+1)
        # rounds to digamma(1)
        m = max(float(digamma(phi + 1.0) - digamma(1.0)), 1.65 * phi)
        lo, hi = asinh_half_phi(target - m), asinh_half_phi(target + m)
        res = elementwise.find_root(score, (lo, hi), args=(target,),
                                    tolerances={"xatol": 1e-14, "xrtol": 1e-15})
        # the bracket is exact; one so narrow that rounding puts both ends on one side of the
        # root (no root found) holds the root to working precision: take its midpoint
        return np.where(np.isnan(res.x), lo + 0.5 * (hi - lo), res.x)

    def _saturated_raw(self, y):
        return self._logit_root(np.log(y) - np.log1p(-y))

    def _deviance(self, y, raw):
        sat = self._saturated_raw(y)
        return np.maximum(2.0 * (self._nll(y, raw) - self._nll(y, sat)), 0.0)

    def _baseline(self, y, w, offset):
        if offset is not None:
            # a scalar minimisation of the weighted mean nll over the rows with positive weight (a
            # row of weight 0 whose nll is inf would make the sum NaN)
            used = w > 0
            yy, ww, oo = y[used], w[used], offset[used]
            sw = ww.sum()

            def mean_nll(c):
                with np.errstate(over="ignore", invalid="ignore"):
                    v = float(np.dot(ww, self._nll(yy, c + oo)) / sw)
                return np.inf if np.isnan(v) else v

            return optimize.minimize_scalar(mean_nll).x
        target = float(np.dot(w, np.log(y) - np.log1p(-y)) / w.sum())
        return float(self._logit_root(np.array([target]))[0])

    def _fit_nuisance(self, y, raw, w):
        mu, nu = expit(raw), expit(-raw)
        ly, l1y = np.log(y), np.log1p(-y)
        sw = w.sum()
        fixed = float(np.dot(w, mu * ly + nu * l1y) / sw)

        # mu digamma(a) + nu digamma(b) - digamma(phi) = mu digamma(a+1) + nu digamma(b+1)
        # - digamma(phi+1) - 1/phi (digamma(x) = digamma(x+1) - 1/x; mu / a = nu / b = 1/phi):
        # no digamma of a subnormal shape
        def score(log_phi):
            phi = np.exp(log_phi)
            mean = float(np.dot(w, mu * digamma(phi * mu + 1.0) + nu * digamma(phi * nu + 1.0)) / sw)
            return mean - float(digamma(phi + 1.0)) - 1.0 / phi - fixed

        lo, hi = -1.0, 1.0
        while score(lo) > 0:
            lo -= 2.0
            if lo < -60.0:
                raise ValueError("beta: the likelihood keeps rising as the precision shrinks; no maximum-likelihood precision")
        while score(hi) < 0:
            hi += 2.0
            if hi > 60.0:
                raise ValueError("beta: the likelihood keeps rising as the precision grows (the targets "
                                 "equal their predicted means); no maximum-likelihood precision")
        return {"precision": float(np.exp(optimize.brentq(score, lo, hi, xtol=1e-14)))}

    def _distribution(self, raw):
        a, b = self._shapes(raw)
        return stats.beta(a, b)
