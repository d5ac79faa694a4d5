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
               sum w (expit(c + o) - y) = 0 (monotone in c; scipy.optimize.brentq
               on [logit(mean) - max o, logit(mean) - min o], which brackets it)

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
from ._base import Family, by_row_blocks


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
        g, h = by_row_blocks(self._fill_grad_hess, (y, raw), n_out=2)
        return g, h

    def _fill_grad_hess(self, y, raw, g, h):
        """Gradient into g and Hessian into h for one block of rows."""
        half = np.multiply(raw, 0.5, out=h)
        np.tanh(half, out=g)
        g *= 0.5
        g += 0.5  # expit(raw)
        g -= y
        np.cosh(half, out=h)
        h *= h
        np.divide(0.25, h, out=h)  # expit(raw) expit(-raw)

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

        # expit is increasing: at c = logit(mean) - max(o) every expit(c + o) <= mean (score <= 0),
        # at c = logit(mean) - min(o) every one is >= mean (score >= 0); so the root lies between,
        # whatever the size of the offsets (no bracket growth that could stall)
        top, bottom = float(np.max(offset)), float(np.min(offset))
        if top == bottom:
            return logit(mean) - top
        # widen by 1 plus a few units in the last place, so rounding in c + o cannot cross the root
        pad = 1.0 + 8.0 * float(np.spacing(max(abs(top), abs(bottom))))
        lo, hi = logit(mean) - top - pad, logit(mean) - bottom + pad
        if score(lo) > 0 or score(hi) < 0:  # pragma: no cover - float64 cannot resolve c + o here
            raise ValueError("bernoulli: the offsets are too large for a constant raw score to be resolved in float64")
        # bisection from a bracket as wide as 1e308 to 4 ulps takes up to ~2100 halvings
        try:
            return optimize.brentq(score, lo, hi, xtol=1e-13, rtol=4 * np.finfo(float).eps, maxiter=4000)
        except RuntimeError:
            raise ValueError("bernoulli: the offsets span too wide a range for a constant raw score "
                             "to be resolved in float64") from None

    def _distribution(self, raw):
        return stats.bernoulli(expit(raw))
