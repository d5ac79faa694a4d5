r"""Log-normal errors: positive amounts whose logarithm is Gaussian.

With log y ~ N(raw, sigma^2): the raw score is the mean of log y, so the
response-scale prediction e^raw (log link) is the median of y; the mean is
e^(raw + sigma^2/2).  Scale sigma > 0 is the standard deviation of log y.
For y > 0, with l = log y - raw:

    p(y) = exp(-l^2 / (2 sigma^2)) / (y sigma sqrt(2 pi))

    nll      = l^2 / (2 sigma^2) + log sigma + log(2 pi)/2 + log y
               (the Jacobian term log y makes it a density of y itself, comparable with the
               gamma family's nll on the same targets)
    gradient = (raw - log y) / sigma^2
    Hessian  = 1 / sigma^2                               (exact)
    deviance = (log y - raw)^2                           (sigma-free, as for gaussian)
    baseline = sum w log y / sum w; with an offset o, the weighted mean of log y - o
    sigma^   = sqrt(sum w (log y - raw)^2 / sum w)      (maximum likelihood)

The predictive law is scipy.stats.lognorm(s = sigma, scale = e^raw).

Censored rows (lossfam.families._censored): the normal law of z = (log y - raw) / sigma, as
gaussian's on log y (the accelerated-failure-time model with normal errors on log time).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

from .. import _checks
from .._checks import POSITIVE
from ..links import LOG
from . import _censored
from ._base import Family

_HALF_LOG_2PI = 0.5 * np.log(2.0 * np.pi)


@dataclass(frozen=True)
class Lognormal(Family):
    scale: float = 1.0

    name = "lognormal"
    link_function = LOG
    target_domain = POSITIVE
    param_domains = {"scale": POSITIVE}
    prediction_kind = "median"
    dispersion_unit = ("scale", 2.0)
    support_edges = (0.0, np.inf)
    censored_fit = ("scale",)

    def _nll(self, y, raw):
        ly = np.log(y)
        z = (ly - raw) / self.scale
        return 0.5 * z * z + ly + (np.log(self.scale) + _HALF_LOG_2PI)

    def _grad_hess(self, y, raw):
        s = np.float64(self.scale)
        inv_var = 1.0 / s / s  # inf (not ZeroDivisionError) when it overflows
        g = np.log(y)
        np.subtract(raw, g, out=g)
        if inv_var != 1.0:
            g /= s  # divide twice: 0 / s^2 stays 0 when s^2 underflows (as in gaussian)
            g /= s
        return g, np.full_like(g, inv_var)

    def _deviance(self, y, raw):
        lr = np.log(y) - raw
        return lr * lr

    def _baseline(self, y, w, offset):
        t = np.log(y) if offset is None else np.log(y) - offset
        return np.average(t, weights=w)

    def _fit_nuisance(self, y, raw, w):
        r = _checks.finite_residuals(np.log(y) - raw, self.name)
        m = float(np.max(np.abs(r)))
        if not m > 0 or not np.any(r[w > 0] != 0):
            raise ValueError("lognormal: every log residual is zero, so the maximum-likelihood scale is 0 "
                             "(not a valid scale)")
        u = r / m  # relative to the largest: squares neither overflow nor all underflow (as in gaussian)
        return {"scale": float(m * np.sqrt(np.dot(w, u * u) / w.sum()))}

    def _tail_pieces(self, v, raw):
        return _censored.normal_pieces((np.log(v) - raw) / self.scale, self.scale)

    def _tail_law(self):
        return _censored.LOG_NORMAL, self.scale

    def _distribution(self, raw):
        with np.errstate(over="ignore"):
            return stats.lognorm(s=self.scale, scale=np.exp(raw))
