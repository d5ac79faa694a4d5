r"""Asymmetric Laplace errors whose scale varies with the features: raw scores (tau-quantile, log b).

Raw scores r = (r0, r1): the tau-quantile mu = r0 (identity link), scale b = e^{r1} (log link);
tau in (0, 1) is the fixed field ``quantile``.  The law is the one-score ``asymmetric_laplace``
family's, same parametrisation, p(y) = tau (1 - tau) / b exp(-rho_tau((y - mu) / b)) with the
check function rho_tau(u) = u (tau - 1[u < 0]).  With v = rho_tau(y - mu) / b >= 0:

    nll = v + r1 - log(tau (1 - tau))

    gradient   d/dr0 = (1[y < mu] - tau) / b        d/dr1 = 1 - v
               (a subgradient in r0; at the kink y = mu, 1/2 - tau, the mean of the two sides,
               as the one-score family)
    Hessian    d2/dr0^2 = 0 almost everywhere (the kink at y = mu)
               d2/dr0 dr1 = -(1[y < mu] - tau) / b
               d2/dr1^2 = v
    Fisher     P(y < mu) = tau (mu is the tau-quantile), and on either side v ~ Exp(1)
               (below mu, |y - mu| / b ~ Exp(rate 1 - tau) and v = (1 - tau) |y - mu| / b; above,
               rate tau and v = tau (y - mu) / b), independent of the side.  So
               E[d/dr0^2] = tau (1 - tau) / b^2,  E[d/dr1^2] = Var(v) = 1,
               E[d/dr0 d/dr1] = E[1[y < mu] - tau] E[1 - v] / b = 0:
               the Fisher matrix is diagonal, diag(tau (1 - tau) / b^2, 1), and the natural gradient is
               ((1[y < mu] - tau) b / (tau (1 - tau)), 1 - v).

Newton's diagonal (``_newton_diagonal``): the exact d2/dr0^2 is 0, so the location column takes
the Fisher entry tau (1 - tau) / b^2 (a group's Newton step is then b (mean of tau - 1[y < mu])
/ (tau (1 - tau)), in the units of y); the scale column takes v, or the Fisher entry 1 where v = 0.

Baseline (closed form, the maximum-likelihood pair for a constant row): r0 = the weighted
tau-quantile of y - o0 (the midpoint rule of the one-score family, whatever b), r1 = log of the
weighted mean of rho_tau(y - o0 - r0) (d/dr1 of the weighted nll is sum w (1 - v) = 0), i.e.
(asymmetric_laplace baseline, log of its fitted scale).  With an offset on the scale column the
generic search (BFGS) is used from there.

Far raw scores.  z = (y - mu) / b comes from ``scaled_residual`` (no 0 * inf where e^{-r1}
overflows or underflows or y - mu overflows), and v = rho_tau(z) (rho_tau is positively
homogeneous): values are finite, or +-inf exactly where they are beyond float64; the location
curvature tau (1 - tau) / b^2 underflows to 0 for r1 > 372.5.

Predictive law: scipy.stats.laplace_asymmetric(kappa, loc=mu, scale=b / sqrt(tau (1 - tau))),
kappa = sqrt(tau / (1 - tau)), as the one-score family.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

from .._checks import OPEN_UNIT, REAL
from ..links import IDENTITY, LOG
from ._several import SeveralScoreFamily, scaled_residual
from .asymmetric_laplace import AsymmetricLaplace, pinball


@dataclass(frozen=True)
class AsymmetricLaplaceSpread(SeveralScoreFamily):
    quantile: float = 0.5

    name = "asymmetric_laplace_spread"
    score_names = ("quantile", "log_scale")
    links = (IDENTITY, LOG)
    target_domain = REAL
    param_domains = {"quantile": OPEN_UNIT}
    prediction_kind = "quantile"
    fisher_diagonal = True
    constant_param = "scale"
    start_is_baseline = True
    default_curvature = "natural"
    kinked_scores = (0,)

    def constant_scale(self):
        return AsymmetricLaplace(quantile=self.quantile)

    def _parts(self, y, raw):
        """(1[y < mu] - tau, with 1/2 - tau at the kink; v; 1 / b)."""
        t = self.quantile
        inv_b = np.exp(-raw[:, 1])
        # rho_tau is positively homogeneous: rho_tau(y - mu) / b = rho_tau(z), z = (y - mu) / b
        z = scaled_residual(y, raw[:, 0], raw[:, 1])
        with np.errstate(over="ignore"):
            side = np.sign(y - raw[:, 0])  # the sign of y - mu even where z underflows
        return 0.5 * (1.0 - side) - t, pinball(z, t), inv_b

    def _nll(self, y, raw):
        t = self.quantile
        _, v, _ = self._parts(y, raw)
        return v + raw[:, 1] - np.log(t * (1.0 - t))

    @staticmethod
    def _over_b(s, inv_b):
        """s / b, 0 where s = 0 (tau = 1/2 at the kink) even where 1 / b overflows."""
        with np.errstate(invalid="ignore"):
            return np.where(s == 0, 0.0, s * inv_b)

    def _gradient(self, y, raw):
        s, v, inv_b = self._parts(y, raw)
        return np.column_stack([self._over_b(s, inv_b), 1.0 - v])

    def _hessian(self, y, raw):
        s, v, inv_b = self._parts(y, raw)
        h = np.zeros((y.shape[0], 2, 2))
        h[:, 0, 1] = h[:, 1, 0] = -self._over_b(s, inv_b)
        h[:, 1, 1] = v
        return h

    def _fisher_diagonal(self, raw):
        t = self.quantile
        inv_b = np.exp(-raw[:, 1])
        return np.column_stack([t * (1.0 - t) * inv_b * inv_b, np.ones(raw.shape[0])])

    def _newton_diagonal(self, y, raw):
        t = self.quantile
        _, v, inv_b = self._parts(y, raw)
        return np.column_stack([t * (1.0 - t) * inv_b * inv_b, np.where(v > 0, v, 1.0)])

    def _natural_direction(self, y, raw):
        # F^{-1} g in closed form, ((1[y < mu] - tau) b / (tau (1 - tau)), 1 - v): no inf / inf
        # where 1/b overflows, 0 at the kink at tau = 1/2 even where b overflows
        t = self.quantile
        s, v, _ = self._parts(y, raw)
        with np.errstate(over="ignore", invalid="ignore"):
            b = np.exp(raw[:, 1])
            return np.column_stack([np.where(s == 0, 0.0, s * b / (t * (1.0 - t))), 1.0 - v])

    def _distribution(self, raw):
        t = self.quantile
        kappa = np.sqrt(t / (1.0 - t))
        return stats.laplace_asymmetric(kappa, loc=raw[:, 0], scale=np.exp(raw[:, 1]) / np.sqrt(t * (1.0 - t)))
