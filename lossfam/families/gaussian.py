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
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

from .._checks import POSITIVE, REAL
from ..links import IDENTITY
from ._base import Family

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

    def _nll(self, y, raw):
        z = (y - raw) / self.scale
        return 0.5 * z * z + (np.log(self.scale) + _HALF_LOG_2PI)

    def _grad_hess(self, y, raw):
        inv_var = 1.0 / (self.scale * self.scale)
        g = raw - y
        if inv_var != 1.0:
            g *= inv_var
        return g, np.full_like(g, inv_var)

    def _deviance(self, y, raw):
        r = y - raw
        return r * r

    def _baseline(self, y, w, offset):
        target = y if offset is None else y - offset
        return np.average(target, weights=w)

    def _fit_nuisance(self, y, raw, w):
        r = y - raw
        var = np.dot(w, r * r) / w.sum()
        if not var > 0:
            raise ValueError("gaussian: every residual is zero, so the maximum-likelihood scale is 0 (not a valid scale)")
        return {"scale": float(np.sqrt(var))}

    def _distribution(self, raw):
        return stats.norm(loc=raw, scale=self.scale)
