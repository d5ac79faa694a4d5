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

e^-raw overflows for raw below ~ -709.78: nll and Hessian are then +inf and the
gradient -inf (never NaN).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import optimize, stats
from scipy.special import digamma, gammaln

from .._checks import POSITIVE
from ..links import LOG
from ._base import Family


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

    def _nll(self, y, raw):
        k = self.shape
        return k * y * np.exp(-raw) + k * raw - (k - 1.0) * np.log(y) + (gammaln(k) - k * np.log(k))

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
            return np.log(np.dot(w, y)) - np.log(w.sum())
        return np.log(np.dot(w, y * np.exp(-offset))) - np.log(w.sum())

    def _fit_nuisance(self, y, raw, w):
        lr = np.log(y) - raw
        target = float(np.dot(w, np.expm1(lr) - lr) / w.sum())  # mean_w of y/mu - 1 - log(y/mu)
        if not target > 0:
            raise ValueError(
                "gamma: every target equals its predicted mean, so the maximum-likelihood shape is infinite"
            )

        def excess(log_k):
            k = np.exp(log_k)
            return np.log(k) - digamma(k) - target

        # log k - digamma(k) ~ 1/(2k) for large k and ~ 1/k for small k: bracket around 1/(2 target)
        guess = np.log(0.5 / target)
        lo, hi = guess - 2.0, guess + 2.0
        while excess(lo) < 0:
            lo -= 2.0
        while excess(hi) > 0:
            hi += 2.0
        return {"shape": float(np.exp(optimize.brentq(excess, lo, hi, xtol=1e-14)))}

    def _distribution(self, raw):
        with np.errstate(over="ignore"):
            mu = np.exp(raw)
        return stats.gamma(a=self.shape, scale=mu / self.shape)
