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
The engines' curvature hooks are these closed forms (no (n, 2, 2) arrays): Newton (1/sigma^2,
2 z^2 or 2), Fisher diagonal (1/sigma^2, 2), natural gradient (-(y - mu), (1 - z^2) / 2).
Baseline: r0 = the weighted mean of y - o0, r1 = log of the maximum-likelihood standard deviation
of the residuals (closed form; with an offset on r1 the generic search is used).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

from .._checks import REAL
from ..links import IDENTITY, LOG
from ._several import SeveralScoreFamily

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
        return (y - raw[:, 0]) * np.exp(-raw[:, 1])

    def _nll(self, y, raw):
        z = self._z(y, raw)
        return 0.5 * z * z + raw[:, 1] + _HALF_LOG_2PI

    def _gradient(self, y, raw):
        inv_s = np.exp(-raw[:, 1])
        z = (y - raw[:, 0]) * inv_s
        return np.column_stack([-z * inv_s, 1.0 - z * z])

    def _hessian(self, y, raw):
        inv_s = np.exp(-raw[:, 1])
        z = (y - raw[:, 0]) * inv_s
        h = np.empty((y.shape[0], 2, 2))
        h[:, 0, 0] = inv_s * inv_s
        h[:, 0, 1] = h[:, 1, 0] = 2.0 * z * inv_s
        h[:, 1, 1] = 2.0 * z * z
        return h

    def _fisher(self, raw):
        inv_s = np.exp(-raw[:, 1])
        f = np.zeros((raw.shape[0], 2, 2))
        f[:, 0, 0] = inv_s * inv_s
        f[:, 1, 1] = 2.0
        return f

    def _newton_diagonal(self, y, raw):
        inv_s = np.exp(-raw[:, 1])
        z = (y - raw[:, 0]) * inv_s
        d1 = 2.0 * z * z
        return np.column_stack([inv_s * inv_s, np.where(d1 > 0, d1, 2.0)])

    def _fisher_diagonal(self, raw):
        inv_s = np.exp(-raw[:, 1])
        return np.column_stack([inv_s * inv_s, np.full(raw.shape[0], 2.0)])

    def _natural_gradient(self, y, raw, g):
        # F = diag(1/sigma^2, 2): F^{-1} g = (sigma^2 g0, g1 / 2)
        return np.column_stack([g[:, 0] * np.exp(2.0 * raw[:, 1]), 0.5 * g[:, 1]])

    def _natural_direction(self, y, raw):
        # F^{-1} g in closed form: (-(y - mu), (1 - z^2) / 2), one pass, no sigma^2 factors
        out = np.empty((y.shape[0], 2))
        r = np.subtract(y, raw[:, 0], out=out[:, 0])
        z = r * np.exp(-raw[:, 1])
        np.multiply(z, z, out=z)
        np.multiply(np.subtract(1.0, z, out=z), 0.5, out=out[:, 1])
        np.negative(r, out=r)
        return out

    def _start(self, y, w, offset):
        t = y if offset is None else y - offset[:, 0]
        m = np.average(t, weights=w)
        sd = np.sqrt(np.average((t - m) ** 2, weights=w))
        return np.array([m, np.log(sd) if sd > 0 else 0.0])

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
