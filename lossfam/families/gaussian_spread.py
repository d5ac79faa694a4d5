r"""Gaussian errors whose scale varies with the features: raw scores (mu, log sigma).

Raw scores r = (r0, r1): mean mu = r0 (identity link), scale sigma = e^{r1} (log link).
With z = (y - mu) / sigma:

    nll = z^2 / 2 + r1 + log(2 pi) / 2

    gradient   d/dr0 = -z / sigma              d/dr1 = 1 - z^2
    Hessian    d2/dr0^2 = 1 / sigma^2          d2/dr0 dr1 = 2 z / sigma      d2/dr1^2 = 2 z^2
    Fisher     E[d2/dr0^2] = 1 / sigma^2       E[d2/dr0 dr1] = 0             E[d2/dr1^2] = 2
               (E z = 0, E z^2 = 1: the two raw scores are orthogonal, so the natural gradient
               is (-(y - mu), (1 - z^2) / 2))

Newton's diagonal: d2/dr1^2 = 2 z^2 vanishes at a zero residual; there the Fisher entry 2 is used.

Far raw scores.  z and (y - mu) / sigma^2 are formed by ``scaled_residual`` (no 0 * inf where
e^{-r1} overflows or underflows, or where y - mu overflows): every value is finite, or +-inf
exactly where it is beyond float64 (e.g. z^2 / 2 for |y - mu| / sigma > 1e154, 1 / sigma^2 for
r1 < -354.9, -(y - mu) in the natural gradient when the difference exceeds 1.8e308); the
curvatures 1 / sigma^2 underflow to 0 for r1 > 372.5 (their exact values are below 1e-323).
The engines' curvature hooks are these closed forms (no (n, 2, 2) arrays): Newton (1/sigma^2,
2 z^2 or 2), Fisher diagonal (1/sigma^2, 2), natural gradient (-(y - mu), (1 - z^2) / 2).
Baseline: r0 = the weighted mean of y - o0, r1 = log of the maximum-likelihood standard deviation
of the residuals (closed form, in units of the largest |y - o0| so that targets near 1e308 do not
overflow the sums; with an offset on r1 the generic search is used).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

from .._checks import REAL
from ..links import IDENTITY, LOG
from ._several import SeveralScoreFamily, scaled_residual

_HALF_LOG_2PI = 0.5 * np.log(2.0 * np.pi)


@dataclass(frozen=True)
class GaussianSpread(SeveralScoreFamily):
    name = "gaussian_spread"
    score_names = ("mean", "log_scale")
    links = (IDENTITY, LOG)
    target_domain = REAL
    fisher_diagonal = True
    default_curvature = "natural"

    def constant_scale(self):
        from .gaussian import Gaussian
        return Gaussian()

    def _z(self, y, raw):
        return scaled_residual(y, raw[:, 0], raw[:, 1])

    def _nll(self, y, raw):
        z = self._z(y, raw)
        return 0.5 * z * z + raw[:, 1] + _HALF_LOG_2PI

    def _gradient(self, y, raw):
        z = self._z(y, raw)
        return np.column_stack([-scaled_residual(y, raw[:, 0], raw[:, 1], 2.0), 1.0 - z * z])

    def _hessian(self, y, raw):
        z = self._z(y, raw)
        h = np.empty((y.shape[0], 2, 2))
        h[:, 0, 0] = np.exp(-2.0 * raw[:, 1])
        h[:, 0, 1] = h[:, 1, 0] = 2.0 * scaled_residual(y, raw[:, 0], raw[:, 1], 2.0)
        h[:, 1, 1] = 2.0 * z * z
        return h

    def _fisher(self, raw):
        f = np.zeros((raw.shape[0], 2, 2))
        f[:, 0, 0] = np.exp(-2.0 * raw[:, 1])
        f[:, 1, 1] = 2.0
        return f

    def _newton_diagonal(self, y, raw):
        z = self._z(y, raw)
        d1 = 2.0 * z * z
        return np.column_stack([np.exp(-2.0 * raw[:, 1]), np.where(d1 > 0, d1, 2.0)])

    def _fisher_diagonal(self, raw):
        return np.column_stack([np.exp(-2.0 * raw[:, 1]), np.full(raw.shape[0], 2.0)])

    def _natural_gradient(self, y, raw, g):
        # F = diag(1/sigma^2, 2): F^{-1} g = (sigma^2 g0, g1 / 2)
        return np.column_stack([g[:, 0] * np.exp(2.0 * raw[:, 1]), 0.5 * g[:, 1]])

    def _natural_direction(self, y, raw):
        # F^{-1} g in closed form: (-(y - mu), (1 - z^2) / 2), one pass, no sigma^2 factors
        out = np.empty((y.shape[0], 2))
        with np.errstate(over="ignore", under="ignore", invalid="ignore"):
            r = np.subtract(y, raw[:, 0], out=out[:, 0])
            z = r * np.exp(-raw[:, 1])
            if not (np.isfinite(np.sum(z)) and np.count_nonzero(z) == np.count_nonzero(r)):
                z = self._z(y, raw)  # a product that is not the exact value to rounding (scaled_residual)
        np.multiply(z, z, out=z)
        np.multiply(np.subtract(1.0, z, out=z), 0.5, out=out[:, 1])
        np.negative(r, out=r)
        return out

    def _start(self, y, w, offset):
        # in units of the largest |y - o0| (no overflow of sums or squares of targets near 1e308;
        # the log of the standard deviation as log(sd / scale) + log(scale))
        with np.errstate(over="ignore"):
            t = y if offset is None else y - offset[:, 0]
        if not np.isfinite(t).all():
            rows = np.flatnonzero(~np.isfinite(t))
            raise ValueError(f"{self.name}: y minus the location offset exceeds float64 on rows "
                             f"{rows[:10].tolist()}{' ...' if rows.size > 10 else ''}")
        scale = float(np.max(np.abs(t)))
        if not 0.0 < scale < np.inf:
            scale = 1.0
        ts = t / scale
        ms = np.average(ts, weights=w)
        sds = np.sqrt(np.average((ts - ms) ** 2, weights=w))
        return np.array([ms * scale, np.log(sds) + np.log(scale) if sds > 0 else 0.0])

    def _baseline(self, y, w, offset):
        if offset is None or not np.any(offset[:, 1]):
            c = self._start(y, w, offset)
            t = y if offset is None else y - offset[:, 0]
            if not np.any(t != c[0]):
                raise ValueError(f"{self.name}: every target equals the mean, so the maximum-likelihood "
                                 "scale is 0 (no finite log scale)")
            return c
        return super()._baseline(y, w, offset)

    def _distribution(self, raw):
        return stats.norm(loc=raw[:, 0], scale=np.exp(raw[:, 1]))
