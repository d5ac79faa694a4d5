r"""Bernoulli targets: the log loss.

With p = expit(raw) (logit link) and y in {0, 1}:

    P(y) = p^y (1 - p)^(1 - y)

    nll      = -y log_expit(raw) - (1 - y) log_expit(-raw)
               ( = log(1 + e^raw) - y raw, evaluated without overflow)
    gradient = expit(raw) - y
    Hessian  = expit(raw) expit(-raw)             (exact; = p (1 - p) without cancellation)

    For speed (two fresh arrays, no branches) the kernel uses the half-angle
    forms p = (1 + tanh(raw/2)) / 2 and p (1 - p) = 1 / (4 cosh^2(raw/2)).
    The Hessian keeps full relative accuracy (cosh overflows to inf, giving
    exactly 0, only where the true value is below 1e-300); the gradient is
    accurate to 1.2e-16 absolute, i.e. to the rounding of a number of size 1,
    which is what a sum of gradients over rows can resolve.
    deviance = 2 nll                              (the saturated model has nll 0)
    baseline = logit(sum w y / sum w); with an offset o, the root of
               sum w (expit(c + o) - y) = 0 (monotone in c; scipy.optimize.brentq)

log_expit and expit from scipy.special keep nll, gradient and Hessian finite
and accurate for raw scores of any size (tested to +-1e4).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import optimize, stats
from scipy.special import expit, log_expit, logit

from .._checks import BINARY
from ..links import LOGIT
from ._base import Family


@dataclass(frozen=True)
class Bernoulli(Family):
    name = "bernoulli"
    link_function = LOGIT
    target_domain = BINARY
    discrete = True
    native_twins = {"lightgbm": {"objective": "binary"}, "xgboost": {"objective": "binary:logistic"}}

    def _nll(self, y, raw):
        return -(y * log_expit(raw) + (1.0 - y) * log_expit(-raw))

    def _grad_hess(self, y, raw):
        half = np.multiply(raw, 0.5)
        g = np.tanh(half)
        g *= 0.5
        g += 0.5  # expit(raw)
        g -= y
        h = np.cosh(half, out=half)
        h *= h
        np.divide(0.25, h, out=h)  # expit(raw) expit(-raw)
        return g, h

    def _deviance(self, y, raw):
        return 2.0 * self._nll(y, raw)

    def _baseline(self, y, w, offset):
        mean = np.dot(w, y) / w.sum()
        if mean <= 0.0 or mean >= 1.0:
            label = int(mean >= 1.0)
            raise ValueError(
                f"bernoulli: every row with positive weight has label {label}, so the best constant "
                f"raw score is {'+' if label else '-'}inf; the baseline needs both labels"
            )
        if offset is None:
            return logit(mean)

        def score(c):
            return float(np.dot(w, expit(c + offset) - y))

        c0 = logit(mean) - np.average(offset, weights=w)
        lo, hi = c0 - 1.0, c0 + 1.0
        while score(lo) > 0:
            lo -= 2.0 * (hi - lo)
        while score(hi) < 0:
            hi += 2.0 * (hi - lo)
        return optimize.brentq(score, lo, hi, xtol=1e-13)

    def _distribution(self, raw):
        return stats.bernoulli(expit(raw))
