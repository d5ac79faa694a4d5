r"""Asymmetric Laplace errors: the pinball (quantile) loss.

With location mu = raw (identity link; mu is the tau-quantile of the law),
quantile level tau in (0, 1) and scale b > 0, and the check function
rho_tau(u) = u (tau - 1[u < 0]):

    p(y) = tau (1 - tau) / b * exp(-rho_tau((y - mu) / b))

    nll      = rho_tau(y - raw) / b - log(tau (1 - tau)) + log(b)
    gradient = (1[y < raw] - tau) / b            (a subgradient)
    Hessian  = 0 almost everywhere: replaced by the surrogate below
    deviance = 2 rho_tau(y - raw)
    baseline = weighted tau-quantile of y (of y - o with an offset): the
               midpoint of the set of minimisers (lossfam._boost.quantiles)
    b^       = sum w rho_tau(y - raw) / sum w    (maximum likelihood)

Surrogate Hessian.  rho_tau(r) = (|r| + (2 tau - 1) r) / 2 is a linear term
plus |r| / 2, and |r| / 2 is majorised at r0 by r^2 / (4 |r0|) + |r0| / 4, so

    h = 1 / (2 b max(|y - raw|, FLOOR * b)),      FLOOR = 1e-3 (as for laplace).

The Newton step then has the units of the residuals (see lossfam.families.laplace).

scipy.stats.laplace_asymmetric(kappa, loc, scale) is the same law with
kappa = sqrt(tau / (1 - tau)) and scale = b / sqrt(tau (1 - tau)).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

from .. import _checks
from .._checks import OPEN_UNIT, POSITIVE, REAL
from ..links import IDENTITY
from ._base import Family, FromParam, residuals, scaled_mean
from .._boost.quantiles import sample_quantile
from .laplace import FLOOR


def pinball(r, tau, out=None):
    """rho_tau(r) = r (tau - 1[r < 0]) = max(tau r, (tau - 1) r); ``out=r`` overwrites r."""
    if out is None:
        return np.maximum(tau * r, (tau - 1.0) * r)
    below = (tau - 1.0) * r
    np.multiply(r, tau, out=out)
    return np.maximum(out, below, out=out)


@dataclass(frozen=True)
class AsymmetricLaplace(Family):
    quantile: float = 0.5
    scale: float = 1.0

    name = "asymmetric_laplace"
    link_function = IDENTITY
    target_domain = REAL
    param_domains = {"quantile": OPEN_UNIT, "scale": POSITIVE}
    exact_hessian = False
    prediction_kind = "quantile"
    # engine facts: as laplace, with the tau-quantile (the built-in quantile objectives at alpha = tau)
    dispersion_unit = ("scale", 2.0)
    leaf_value = "quantile"
    native_twins = {
        "lightgbm": {"objective": "quantile", "alpha": FromParam("quantile")},
        "xgboost": {"objective": "reg:quantileerror", "quantile_alpha": FromParam("quantile")},
    }

    def _nll(self, y, raw):
        t = self.quantile
        return pinball(y - raw, t) / self.scale + (np.log(self.scale) - np.log(t * (1.0 - t)))

    def _grad_hess(self, y, raw):
        t, b = self.quantile, self.scale
        r = raw - y  # = -(y - raw)
        # (sign(r) + 1)/2 - tau: 1 - tau above, -tau below, and at the kink the
        # average of both sides, 1/2 - tau (a valid subgradient)
        g = np.sign(r)
        g += 1.0
        g *= 0.5
        g -= t
        if b != 1.0:
            g /= b
        h = np.abs(r, out=r)
        np.maximum(h, FLOOR * b, out=h)
        h *= 2.0 * b
        np.reciprocal(h, out=h)
        return g, h

    def _deviance(self, y, raw):
        return 2.0 * pinball(y - raw, self.quantile)

    def _baseline(self, y, w, offset):
        target = y if offset is None else y - offset
        return sample_quantile(target, w, self.quantile, "midpoint")

    def _fit_nuisance(self, y, raw, w):
        r = _checks.finite_residuals(residuals(y, raw), self.name)
        b = scaled_mean(pinball(r, self.quantile, out=r), w, overwrite=True)
        if not b > 0:
            raise ValueError(
                "asymmetric_laplace: every residual is zero, so the maximum-likelihood scale is 0 (not a valid scale)"
            )
        return {"scale": float(b)}

    def _distribution(self, raw):
        t = self.quantile
        kappa = np.sqrt(t / (1.0 - t))
        return stats.laplace_asymmetric(kappa, loc=raw, scale=self.scale / np.sqrt(t * (1.0 - t)))
