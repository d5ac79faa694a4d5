r"""Laplace errors: the absolute-error loss.

Density, with location (median) mu = raw (identity link) and scale b > 0:

    p(y) = exp(-|y - mu| / b) / (2 b)

    nll      = |y - raw| / b + log(2 b)
    gradient = sign(raw - y) / b                 (a subgradient; 0 at raw = y)
    Hessian  = 0 almost everywhere: replaced by the surrogate below
    deviance = 2 |y - raw|                       (2 (nll - nll at raw = y), times b)
    baseline = weighted median of y (of y - o with an offset): the midpoint
               of the set of minimisers (the mean of the two middle values
               for an even count of unit weights; lossfam._boost.quantiles)
    b^       = sum w |y - raw| / sum w           (maximum likelihood)

Surrogate Hessian.  |r| is majorised at the current residual r0 by the
quadratic r^2 / (2|r0|) + |r0| / 2 (equal value and slope at r0, above it
everywhere).  Its curvature in raw, divided by b, is

    h = 1 / (b * max(|y - raw|, FLOOR * b)),      FLOOR = 1e-3.

A Newton step on a group of rows is then sum sign(r_i) / sum (1 / |r_i|): a
weighted average of the residuals themselves, so the step has the scale of
the target (the iteratively reweighted least-squares step for the median),
unlike a unit Hessian whose step is bounded by 1 whatever the units of y.
The floor keeps rows that already fit exactly from getting infinite weight;
it is relative to b, so fit b first (``fit_nuisance``) for best behaviour.

Censored rows (lossfam.families._censored): the standard Laplace law of z = (y - raw) / b with
the closed-form log tails of ``_LaplaceLaw`` and score psi = -sign(z); the censored Hessian is
0 on the linear tails, where the surrogate g^2 = 1 / b^2 takes over.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

from .. import _checks
from .._boost.quantiles import sample_quantile
from .._checks import POSITIVE, REAL
from ..links import IDENTITY
from ._base import Family, residuals, scaled_mean
from ._censored import TailLaw, location_scale_pieces

#: residuals below FLOOR * scale get the curvature of a residual of that size
FLOOR = 1e-3
_LOG2 = float(np.log(2.0))


class _LaplaceLaw(stats.rv_continuous):
    r"""The standard Laplace law with its log-density and log tails in closed form.

    scipy.stats.laplace takes the log of a density and of tail probabilities
    that underflow (log(0.5 e^-800) = -inf).  In closed form, with a = -|x|,

        log p(x) = a - log 2,
        log F(x) = a - log 2 for x < 0,   log1p(-e^a / 2) for x >= 0,
        log S(x) = log F(-x),

    finite for every finite x.  Same law, parametrised like scipy's (loc, scale).
    """

    def _pdf(self, x):
        return 0.5 * np.exp(-np.abs(x))

    def _logpdf(self, x):
        return -np.abs(x) - _LOG2

    def _cdf(self, x):
        half_tail = 0.5 * np.exp(-np.abs(x))
        return np.where(x < 0, half_tail, 1.0 - half_tail)

    def _sf(self, x):
        return self._cdf(-x)

    def _logcdf(self, x):
        a = -np.abs(x)
        return np.where(x < 0, a - _LOG2, np.log1p(-0.5 * np.exp(a)))

    def _logsf(self, x):
        return self._logcdf(-x)

    def _ppf(self, q):
        return np.where(q <= 0.5, np.log(2.0 * q), -np.log(2.0 * (1.0 - q)))

    def _isf(self, q):
        return -self._ppf(q)

    def _stats(self):
        return 0.0, 2.0, 0.0, 3.0

    def _entropy(self):
        return _LOG2 + 1.0


laplace_law = _LaplaceLaw(name="laplace")


class LaplaceTails(TailLaw):
    r"""The standard Laplace law in linear space for the censored gradient and Hessian
    (lossfam.families._censored.TailLaw).  Right-censored at z, with e = e^z for z < 0:

        z >= 0:  r = f0 / S0 = 1,            c = r + psi = 0: the linear tail, whose Hessian 0 is
                 replaced by the surrogate g^2 = r^2 / b^2, i.e. c = r = 1 is returned
        z <  0:  r = e / (2 - e),            c = r + 1 = 2 / (2 - e)

    and left(z) = right(-z) (symmetric law).  A closed interval z_lo < z_hi on one linear tail has
    P proportional to e^(+-raw / b): gradient -+1 / b, Hessian 0 (the surrogate g^2 = 1 / b^2).
    One that holds the mode (z_lo < 0 < z_hi) has, with e_lo = expm1(z_lo) and e_hi = expm1(-z_hi)
    (each in (-1, 0): a sum without cancellation), P = -(e_lo + e_hi) / 2, a = f0(z_hi) / P =
    (1 + e_hi) / (2 P), b = f0(z_lo) / P = (1 + e_lo) / (2 P), psi(z_hi) = -1 and psi(z_lo) = 1:

        gradient = (a - b) / b_scale,   Hessian = (a + b + (a - b)^2) / b_scale^2   (> 0, exact)."""

    symmetric = True
    defers = False

    @staticmethod
    def closed(zl, zh):
        g = np.where(zl >= 0, -1.0, 1.0)
        h = np.ones(zl.shape)
        mode = (zl < 0) & (zh > 0)
        if mode.any():
            e_lo = np.expm1(zl[mode])
            e_hi = np.expm1(np.negative(zh[mode]))
            p2 = np.add(e_lo, e_hi)  # -2 P
            a = (1.0 + e_hi) / -p2
            b = (1.0 + e_lo) / -p2
            gm = a - b
            g[mode] = gm
            h[mode] = a + b + gm * gm
        return g, h

    def pdf(self, z):
        return 0.5 * np.exp(-np.abs(z))

    def score(self, z):
        return -np.sign(z)

    def cdf(self, z):
        half = 0.5 * np.exp(-np.abs(z))
        return np.where(z < 0, half, 1.0 - half)

    def tail_pdf(self, z, upper):
        # F0(z) = f0(z) for z < 0, 1 - f0(z) above (f0 = e^-|z| / 2); S0(z) = F0(-z)
        f = np.abs(z)
        np.negative(f, out=f)
        np.exp(f, out=f)
        f *= 0.5
        near = (z < 0) == upper  # the tail holds the mode: 1 - f0
        return np.where(near, 1.0 - f, f), f

    def right(self, z):
        e = np.exp(np.minimum(z, 0.0))
        d = 2.0 - e
        pos = z >= 0
        return np.where(pos, 1.0, e / d), np.where(pos, 1.0, 2.0 / d)


LAPLACE_TAILS = LaplaceTails()


def weighted_quantile(values, weights, q):
    """Smallest value whose cumulative weight reaches q * total (numpy's inverted_cdf rule).

    This is a minimiser of sum w * pinball_q(values - c) over c.
    """
    return float(np.quantile(values, q, method="inverted_cdf", weights=weights))


@dataclass(frozen=True)
class Laplace(Family):
    scale: float = 1.0

    name = "laplace"
    link_function = IDENTITY
    target_domain = REAL
    param_domains = {"scale": POSITIVE}
    exact_hessian = False
    prediction_kind = "median"
    # engine facts: trees grown on the sign of the residual, leaves set to the weighted residual
    # median, which is what the built-in absolute-error objectives do (leaf renewal in C++)
    dispersion_unit = ("scale", 2.0)
    leaf_value = "median"
    native_twins = {"lightgbm": {"objective": "regression_l1"}, "xgboost": {"objective": "reg:absoluteerror"}}
    support_edges = (-np.inf, np.inf)
    censored_fit = ("scale",)

    def _nll(self, y, raw):
        return np.abs(y - raw) / self.scale + np.log(2.0 * self.scale)

    def _grad_hess(self, y, raw):
        r = raw - y
        g = np.sign(r)
        if self.scale != 1.0:
            g /= self.scale
        h = np.abs(r, out=r)
        np.maximum(h, FLOOR * self.scale, out=h)
        np.divide(1.0 / self.scale, h, out=h)
        return g, h

    def _deviance(self, y, raw):
        return 2.0 * np.abs(y - raw)

    def _baseline(self, y, w, offset):
        target = y if offset is None else y - offset
        return sample_quantile(target, w, 0.5, "midpoint")

    def _fit_nuisance(self, y, raw, w):
        r = _checks.finite_residuals(residuals(y, raw), self.name)
        b = scaled_mean(np.abs(r, out=r), w, overwrite=True)
        if not b > 0:
            raise ValueError("laplace: every residual is zero, so the maximum-likelihood scale is 0 (not a valid scale)")
        return {"scale": float(b)}

    def _tail_pieces(self, v, raw):
        law = laplace_law
        return location_scale_pieces((v - raw) / self.scale, self.scale, law._logcdf, law._logsf,
                                     law._logpdf, lambda z: -np.sign(z))

    def _tail_law(self):
        return LAPLACE_TAILS, self.scale

    def _distribution(self, raw):
        return laplace_law(loc=raw, scale=self.scale)
