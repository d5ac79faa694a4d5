r"""Gaussian errors: the squared-error loss.

Density, with mean mu = raw (identity link) and scale sigma > 0:

    p(y) = exp(-(y - mu)^2 / (2 sigma^2)) / (sigma sqrt(2 pi))

    nll      = (y - raw)^2 / (2 sigma^2) + log(sigma) + log(2 pi) / 2
    gradient = (raw - y) / sigma^2
    Hessian  = 1 / sigma^2                       (exact)
    deviance = (y - raw)^2                       (unit deviance, sigma-free)
    baseline = sum w y / sum w                   (weighted mean; with offset o: mean of y - o)
    sigma^   = sqrt(sum w (y - raw)^2 / sum w)   (maximum likelihood)

Domains: y real, raw real.

Censored rows (lossfam.families._censored): the normal law of z = (y - raw) / sigma,
log F = log_ndtr(z), log S = log_ndtr(-z), log D = log phi(z) - log sigma, E = z / sigma;
a gaussian with left-censoring at a detection limit is the Tobit model.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

from .. import _checks
from .._checks import POSITIVE, REAL
from ..links import IDENTITY
from . import _censored
from ._base import Family, residuals

_HALF_LOG_2PI = 0.5 * np.log(2.0 * np.pi)


@dataclass(frozen=True)
class Gaussian(Family):
    scale: float = 1.0

    name = "gaussian"
    link_function = IDENTITY
    target_domain = REAL
    param_domains = {"scale": POSITIVE}
    # engine facts: in scale**2 units the gradient and Hessian are raw - y and 1, the built-ins' own
    dispersion_unit = ("scale", 2.0)
    native_twins = {"lightgbm": {"objective": "regression"}, "xgboost": {"objective": "reg:squarederror"}}
    support_edges = (-np.inf, np.inf)
    censored_fit = ("scale",)

    def _nll(self, y, raw):
        z = (y - raw) / self.scale
        return 0.5 * z * z + (np.log(self.scale) + _HALF_LOG_2PI)

    def _grad_hess(self, y, raw):
        s = np.float64(self.scale)
        inv_var = 1.0 / s / s  # inf (not ZeroDivisionError) when it overflows
        g = raw - y
        if inv_var != 1.0:
            g /= s  # divide twice rather than multiply by inv_var: 0 / s^2 stays 0 when s^2 underflows
            g /= s
        return g, np.full_like(g, inv_var)

    def _deviance(self, y, raw):
        r = y - raw
        return r * r

    def _baseline(self, y, w, offset):
        target = y if offset is None else y - offset
        return np.average(target, weights=w)

    def _fit_nuisance(self, y, raw, w):
        r = _checks.finite_residuals(residuals(y, raw), self.name)
        lo, hi = _checks._bounds(r)
        m = max(hi, -lo)  # max |r|, without an array of absolute values
        if not m > 0 or not (w.min() > 0 or np.any(r[w > 0] != 0)):
            raise ValueError("gaussian: every residual is zero, so the maximum-likelihood scale is 0 (not a valid scale)")
        u = np.divide(r, m, out=r)  # residuals relative to the largest: their squares neither overflow nor all underflow
        return {"scale": float(m * np.sqrt(np.dot(w, np.multiply(u, u, out=u)) / w.sum()))}

    def _tail_pieces(self, v, raw):
        return _censored.normal_pieces((v - raw) / self.scale, self.scale)

    def _tail_law(self):
        return _censored.NORMAL, self.scale

    def _distribution(self, raw):
        return stats.norm(loc=raw, scale=self.scale)
