r"""Laplace errors whose scale varies with the features: raw scores (mu, log b).

Raw scores r = (r0, r1): median mu = r0 (identity link), scale b = e^{r1} (log link).  The law is
the one-score ``laplace`` family's, p(y) = exp(-|y - mu| / b) / (2 b).  With z = (y - mu) / b:

    nll = |z| + r1 + log 2

    gradient   d/dr0 = -sign(z) / b                 d/dr1 = 1 - |z|
               (d|y - mu|/dmu = -sign(y - mu), a subgradient: 0 at the kink y = mu;
               d/dr1 of |y - mu| e^{-r1} is -|z})
    Hessian    d2/dr0^2 = 0 almost everywhere (the kink at y = mu)
               d2/dr0 dr1 = sign(z) / b             (d/dr1 of -sign(z) e^{-r1})
               d2/dr1^2 = |z|
    Fisher     E[d/dr0^2] = 1 / b^2  (the squared score is 1 / b^2 off the kink; equivalently the
               kink's delta 2 p(mu) / b = 1 / b^2 in E[Hessian]),
               E[d/dr1^2] = Var(|z|) = 1 (|z| ~ Exp(1)),
               E[d/dr0 d/dr1] = E[-sign(z) (1 - |z|)] / b = 0 (z is symmetric, |z| independent
               of sign(z)): the Fisher matrix is diagonal, diag(1 / b^2, 1), and the natural
               gradient is (-b sign(z), 1 - |z|).

Newton's diagonal (``_newton_diagonal``): the exact d2/dr0^2 is 0, so the location column takes
the Fisher entry 1 / b^2 (a Newton step on a group of rows is then b times the mean sign of the
residuals: it has the units of y); the scale column takes |z|, or the Fisher entry 1 where
|z| = 0 (a row exactly at the median).

Far raw scores.  |z| comes from ``scaled_residual`` (no 0 * inf where e^{-r1} overflows or
underflows or y - mu overflows): values are finite, or +-inf exactly where they are beyond float64
(|z| for |y - mu| / b > 1.8e308, 1 / b for r1 < -709.78, 1 / b^2 for r1 < -354.9); the location
curvature 1 / b^2 underflows to 0 for r1 > 372.5.

Baseline (closed form, the maximum-likelihood pair for a constant row): r0 = the weighted median of
y - o0 (any b; the midpoint rule of the one-score laplace), r1 = log(sum w |y - o0 - r0| / sum w)
(d/dr1 of the weighted nll is sum w (1 - |z|) = 0), i.e. (laplace baseline, log of its fitted
scale).  With an offset on the scale column the generic search (BFGS) is used from there.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .._checks import REAL
from ..links import IDENTITY, LOG
from ._several import SeveralScoreFamily, scaled_residual
from .laplace import Laplace, laplace_law

_LOG2 = float(np.log(2.0))


@dataclass(frozen=True)
class LaplaceSpread(SeveralScoreFamily):
    name = "laplace_spread"
    score_names = ("median", "log_scale")
    links = (IDENTITY, LOG)
    target_domain = REAL
    prediction_kind = "median"
    fisher_diagonal = True
    constant_param = "scale"
    start_is_baseline = True
    default_curvature = "natural"
    kinked_scores = (0,)

    def constant_scale(self):
        return Laplace()

    def _nll(self, y, raw):
        return np.abs(scaled_residual(y, raw[:, 0], raw[:, 1])) + raw[:, 1] + _LOG2

    def _parts(self, y, raw):
        inv_b = np.exp(-raw[:, 1])
        z = scaled_residual(y, raw[:, 0], raw[:, 1])
        with np.errstate(over="ignore"):
            return np.sign(y - raw[:, 0]), np.abs(z), inv_b  # the sign of y - mu even where z underflows

    @staticmethod
    def _sign_over_b(s, inv_b):
        """sign(z) / b, 0 at the kink even where 1 / b overflows."""
        with np.errstate(invalid="ignore"):
            return np.where(s == 0, 0.0, s * inv_b)

    def _gradient(self, y, raw):
        s, a, inv_b = self._parts(y, raw)
        return np.column_stack([-self._sign_over_b(s, inv_b), 1.0 - a])

    def _hessian(self, y, raw):
        s, a, inv_b = self._parts(y, raw)
        h = np.zeros((y.shape[0], 2, 2))
        h[:, 0, 1] = h[:, 1, 0] = self._sign_over_b(s, inv_b)
        h[:, 1, 1] = a
        return h

    def _fisher_diagonal(self, raw):
        inv_b = np.exp(-raw[:, 1])
        return np.column_stack([inv_b * inv_b, np.ones(raw.shape[0])])

    def _newton_diagonal(self, y, raw):
        _, a, inv_b = self._parts(y, raw)
        return np.column_stack([inv_b * inv_b, np.where(a > 0, a, 1.0)])

    def _natural_direction(self, y, raw):
        # F^{-1} g in closed form, (-b sign(z), 1 - |z|): no inf / inf where 1/b overflows
        s, a, _ = self._parts(y, raw)
        with np.errstate(over="ignore", invalid="ignore"):
            b = np.exp(raw[:, 1])
            return np.column_stack([np.where(s == 0, 0.0, -s * b), 1.0 - a])

    def _distribution(self, raw):
        return laplace_law(loc=raw[:, 0], scale=np.exp(raw[:, 1]))
