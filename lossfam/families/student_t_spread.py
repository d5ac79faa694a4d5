r"""Student t errors whose scale varies with the features: raw scores (mu, log s).

Raw scores r = (r0, r1): location mu = r0 (identity link, the median), scale s = e^{r1} (log
link); the degrees of freedom nu > 0 are the fixed field ``df`` (default 4, as the one-score
``student_t``).  The law is the one-score family's; with u = (y - mu) / s and the row weight of
the EM iteration for the t model, a = (nu + 1) / (nu + u^2):

    nll = (nu+1)/2 log1p(u^2 / nu) + r1 + lgamma(nu/2) - lgamma((nu+1)/2) + log(nu pi)/2

    gradient   d/dr0 = -a u / s                    (du/dr0 = -1/s)
               d/dr1 = 1 - a u^2                   (du/dr1 = -u)
    Hessian    d2/dr0^2   = (nu+1) (nu - u^2) / (s^2 (nu + u^2)^2)   (negative for u^2 > nu)
               d2/dr0 dr1 = 2 nu (nu+1) u / (s (nu + u^2)^2)
               d2/dr1^2   = 2 nu (nu+1) u^2 / (nu + u^2)^2
               (d/du [u / (nu + u^2)] = (nu - u^2) / (nu + u^2)^2, d/du [u^2 / (nu + u^2)] =
               2 nu u / (nu + u^2)^2, and d(1/s)/dr1 = -1/s)
    Fisher     E[d2/dr0^2] = (nu+1) / ((nu+3) s^2),  E[d2/dr1^2] = 2 nu / (nu+3),  E[d2/dr0 dr1] = 0
               (u^2 / (nu + u^2) ~ Beta(1/2, nu/2), so E[(nu + u^2)^-2] and E[u^2 (nu + u^2)^-2]
               are Beta moments; the cross term is odd in u): diagonal, so the natural gradient is
               g / diag(F).  (Lange, Little and Taylor, 1989, "Robust statistical modeling using
               the t distribution", JASA 84, give the same information for (mu, s^2), recalled from
               memory; checked here by the Monte Carlo variance of the score.)

Newton's diagonal: the base rule, the exact diagonal where positive, else the Fisher entry (the
location entry is negative for outlying rows, |u| > sqrt(nu); the scale entry is 0 at u = 0).

Numerics.  For |u| >= 1 the products are formed as a u = (nu+1) / (u + nu/u) and
a u^2 = (nu+1) / (1 + nu/u^2), and the Hessian with nu/u^2 in place of nu: no u^2 overflows,
and a far outlier's gradient tends to (0, -nu).  Where u^2 overflows, log1p(u^2/nu) is
log1p(e^x) with x = 2 (log|y - mu| - r1) - log nu (the one-score family's overflow-free form).

Far raw scores.  u comes from ``scaled_residual`` (no 0 * inf where e^{-r1} overflows or
underflows or y - mu overflows), and the terms with a power of 1/s are formed without a separate
1/s factor: for |u| < 1, a u / s = (nu+1) / (nu + u^2) (y - mu) / s^2 (again ``scaled_residual``);
for |u| >= 1, a u / s = (nu+1) q / (y - mu) and (nu+1) (p - q) / (s^2 (nu + u^2)) =
(nu+1) (p - q) q / (y - mu)^2 (s u = y - mu), so a row at a scale below e^{-709} keeps the
gradient -(nu+1) / (y - mu) of its exact value instead of 0 * inf.  Values are finite, or +-inf
exactly where they are beyond float64; the location curvatures underflow to 0 for r1 > 372.5.

Baseline: no closed form (the joint location-scale t likelihood); the generic BFGS search from
the one-score family's baseline (its weighted M-estimate at the default scale) and the fitted
log scale at that location.  No maximum exists when a weight share above nu / (nu + 1) sits on
one value of y - o0 (with mu there, the nll falls like (share - (1 - share) nu) r1 as
r1 -> -inf): ValueError.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

from .._checks import POSITIVE, REAL
from ..links import IDENTITY, LOG
from ._several import SeveralScoreFamily, scaled_residual
from .student_t import StudentT, _log_abs_diff, _log_norm


@dataclass(frozen=True)
class StudentTSpread(SeveralScoreFamily):
    df: float = 4.0

    name = "student_t_spread"
    score_names = ("location", "log_scale")
    links = (IDENTITY, LOG)
    target_domain = REAL
    param_domains = {"df": POSITIVE}
    prediction_kind = "median"
    fisher_diagonal = True
    default_curvature = "natural"

    def constant_scale(self):
        return StudentT(df=self.df)

    def _nll(self, y, raw):
        nu = self.df
        with np.errstate(over="ignore", under="ignore", invalid="ignore", divide="ignore"):
            u = scaled_residual(y, raw[:, 0], raw[:, 1])
            lg = np.log1p(u * u / nu)
            far = ~np.isfinite(lg)
            if np.any(far):  # u^2 overflows: log1p(e^x), x = log(u^2 / nu) from logs
                x = 2.0 * (_log_abs_diff(y[far], raw[far, 0]) - raw[far, 1]) - np.log(nu)
                lg[far] = np.logaddexp(0.0, x)
            return 0.5 * (nu + 1.0) * lg + (raw[:, 1] + _log_norm(nu))

    def _pieces(self, y, raw, with_aus=True):
        """(a u^2, p = nu / (nu + u^2), q = u^2 / (nu + u^2), a u / s (None without ``with_aus``),
        y - mu on the rows with |u| >= 1, those rows, 1 / s^2, u) without overflow of u^2 and
        without 0 * inf (module docstring, "Far raw scores")."""
        nu = self.df
        u = scaled_residual(y, raw[:, 0], raw[:, 1])
        with np.errstate(over="ignore", under="ignore", invalid="ignore", divide="ignore"):
            far = np.abs(u) >= 1.0
            uf = np.where(far, u, 1.0)
            un = np.where(far, 0.0, u)
            nu_u2 = nu / (uf * uf)  # nu / u^2 where |u| >= 1
            au2 = np.where(far, (nu + 1.0) / (1.0 + nu_u2), (nu + 1.0) * un * un / (nu + un * un))
            p = np.where(far, nu_u2 / (1.0 + nu_u2), nu / (nu + un * un))
            q = np.where(far, 1.0 / (1.0 + nu_u2), un * un / (nu + un * un))
            # a u / s: near, (nu+1) / (nu + u^2) (y - mu) / s^2; far, (nu+1) q / (y - mu)
            d = np.where(far, y - raw[:, 0], 1.0)
            aus = None
            if with_aus:
                z2 = np.where(far, 0.0, scaled_residual(y, raw[:, 0], raw[:, 1], 2.0))
                aus = np.where(far, (nu + 1.0) * q / d, (nu + 1.0) / (nu + un * un) * z2)
            inv_s2 = np.exp(-2.0 * raw[:, 1])
        return au2, p, q, aus, d, far, inv_s2, u

    def _gradient(self, y, raw):
        au2, _, _, aus, _, _, _, _ = self._pieces(y, raw)
        return np.column_stack([-aus, 1.0 - au2])

    def _hessian(self, y, raw):
        nu = self.df
        au2, p, q, aus, d, far, inv_s2, _ = self._pieces(y, raw)
        h = np.empty((y.shape[0], 2, 2))
        with np.errstate(over="ignore", under="ignore", invalid="ignore", divide="ignore"):
            # (nu+1)(nu - u^2) / (s^2 (nu + u^2)^2) = (nu+1) (p - q) / (s^2 (nu + u^2)): near,
            # with 1 / s^2; far, = (nu+1) (p - q) q / (y - mu)^2 (s^2 u^2 = (y - mu)^2)
            near00 = np.where(p == q, 0.0, (nu + 1.0) * p / nu * (p - q) * inv_s2)  # (nu+1) p / nu = a
            h[:, 0, 0] = np.where(far, np.where(p == q, 0.0, (nu + 1.0) * (p - q) * q / (d * d)), near00)
            # 2 nu (nu+1) u / (s (nu + u^2)^2) = 2 p (a u / s)
            h[:, 0, 1] = h[:, 1, 0] = 2.0 * p * aus
            # 2 nu (nu+1) u^2 / (nu + u^2)^2 = 2 (a u^2) p
            h[:, 1, 1] = 2.0 * au2 * p
        return h

    def _natural_direction(self, y, raw):
        # F^{-1} g in closed form: d/dr0 / ((nu+1) / ((nu+3) s^2)) = -(nu+3) (y - mu) / (nu + u^2)
        # (for |u| < 1; for |u| >= 1, -(nu+3) q s / u, s / u = e^{r1 - log|u|}), and
        # d/dr1 / (2 nu / (nu+3)): no inf / inf where 1/s^2 overflows
        nu = self.df
        au2, _, q, _, _, far, _, u = self._pieces(y, raw, with_aus=False)
        with np.errstate(over="ignore", under="ignore", invalid="ignore", divide="ignore"):
            un = np.where(far, 0.0, u)
            near0 = -(nu + 3.0) * np.where(far, 0.0, y - raw[:, 0]) / (nu + un * un)
            far0 = -(nu + 3.0) * q * np.sign(u) * np.exp(raw[:, 1] - np.log(np.abs(np.where(far, u, 1.0))))
            n0 = np.where(far, far0, near0)
        return np.column_stack([n0, (1.0 - au2) * (nu + 3.0) / (2.0 * nu)])

    def _fisher_diagonal(self, raw):
        nu = self.df
        inv_s = np.exp(-raw[:, 1])
        with np.errstate(over="ignore"):
            f0 = (nu + 1.0) / (nu + 3.0) * inv_s * inv_s
        return np.column_stack([f0, np.full(raw.shape[0], 2.0 * nu / (nu + 3.0))])

    def _start(self, y, w, offset):
        one = self.constant_scale()
        o0 = None if offset is None else offset[:, 0]
        t = y if o0 is None else y - o0
        values, where = np.unique(t, return_inverse=True)
        share = np.bincount(where, weights=w).max() / w.sum()
        if share > self.df / (self.df + 1.0):
            # with mu at that value, the nll behaves as (share - (1 - share) nu) r1 as r1 -> -inf
            raise ValueError(f"{self.name}: a share {share:.3g} of the weight sits on one target value "
                             f"(above nu / (nu + 1) = {self.df / (self.df + 1.0):.3g}), so too many residuals are "
                             "exactly zero there and the likelihood rises without bound as the scale shrinks")
        c0 = one._baseline(y, w, o0)
        fitted = c0 if o0 is None else c0 + o0
        try:
            s = one._fit_nuisance(y, np.broadcast_to(fitted, y.shape), w)["scale"]
        except ValueError as err:
            raise ValueError(f"{self.name}: {err}") from None
        log_s = np.log(s) if offset is None else np.log(s) - np.average(offset[:, 1], weights=w)
        return np.array([c0, log_s])

    def _distribution(self, raw):
        return stats.t(df=self.df, loc=raw[:, 0], scale=np.exp(raw[:, 1]))
