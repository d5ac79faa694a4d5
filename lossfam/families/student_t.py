r"""Student t errors: a heavy-tailed location model.

Density, with location mu = raw (identity link), degrees of freedom nu > 0 and
scale s > 0, r = y - raw and u = r / s:

    p(y) = Gamma((nu+1)/2) / (Gamma(nu/2) sqrt(nu pi) s) (1 + u^2/nu)^(-(nu+1)/2)

    nll      = (nu+1)/2 log1p(u^2/nu) + log s + lgamma(nu/2) - lgamma((nu+1)/2) + log(nu pi)/2
    gradient = (nu+1) (raw - y) / (nu s^2 + r^2)
    Hessian  = (nu+1) (nu s^2 - r^2) / (nu s^2 + r^2)^2: negative for |r| > sqrt(nu) s (the nll
               is not convex), so it is replaced by the surrogate below
    deviance = 2 s^2 (nll - nll at raw = y) = (nu+1) s^2 log1p(u^2/nu)   (-> r^2 as nu -> inf)
    baseline = the weighted M-estimate of location: a minimiser of sum w nll(y, c), by the EM
               iteration c <- sum w h_i y_i / sum w h_i (h below) from the weighted median
    s^       = root of sum w (nu+1) u^2 / (nu + u^2) = sum w (d/d log s of the weighted nll;
               the left side falls monotonically from (nu+1) sum_{r != 0} w to 0 as s grows,
               so the root is unique when fewer than a fraction nu/(nu+1) of the weight
               sits on zero residuals; scipy.optimize.brentq on log s)
    nu^      = only when ``estimate_df=True``: the profile likelihood over log nu (s^ at each
               nu; bounded Brent over nu in [0.05, 1e6]); ValueError when the maximum is at
               nu -> inf (Gaussian tails) or nu -> 0

Surrogate Hessian.  With t = r^2, the nll is (nu+1)/2 log(1 + t/(nu s^2)), a
concave function of t; its tangent at the current t0 lies above it, so the
quadratic in r

    (nu+1)/2 [log(1 + t0/(nu s^2)) + (r^2 - t0) / (nu s^2 + t0)]

majorises the nll with equal value and slope at the current residual.  Its
curvature in raw is the EM / iteratively reweighted least-squares weight of
the t model (Lange, Little and Taylor, 1989, "Robust statistical modeling using
the t distribution", JASA 84, eq. for the E-step weight), in scale units:

    h = (nu+1) / (nu s^2 + r^2) = [(nu+1) / (nu + u^2)] / s^2.

It is positive and finite everywhere, equals the exact Hessian (nu+1)/(nu s^2)
at r = 0, and a Newton step on a group of rows, sum h_i r_i / sum h_i, is a
weighted mean of the residuals: it has the units of y, and outlying rows get
small weights (the robustness of the t model).  No floor is needed (unlike
laplace's), since h is bounded by (nu+1)/(nu s^2).  Fit s first (``fit_nuisance``)
for the best steps.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import optimize, stats
from scipy.special import gammaln

from .._checks import POSITIVE, REAL
from ..links import IDENTITY
from ._base import Family
from .laplace import weighted_quantile

#: range of the degrees of freedom searched when estimate_df=True
DF_RANGE = (0.05, 1e6)


def _log_norm(nu):
    return gammaln(0.5 * nu) - gammaln(0.5 * (nu + 1.0)) + 0.5 * np.log(nu * np.pi)


@dataclass(frozen=True)
class StudentT(Family):
    df: float = 4.0
    scale: float = 1.0
    estimate_df: bool = False

    name = "student_t"
    link_function = IDENTITY
    target_domain = REAL
    param_domains = {"df": POSITIVE, "scale": POSITIVE}
    exact_hessian = False
    prediction_kind = "median"
    dispersion_unit = ("scale", 2.0)
    location_needs_nuisance = True

    def __post_init__(self):
        super().__post_init__()
        if not isinstance(self.estimate_df, (bool, np.bool_)):
            raise ValueError(f"student_t: parameter estimate_df must be True or False, got {self.estimate_df!r}")
        object.__setattr__(self, "estimate_df", bool(self.estimate_df))

    def _nll(self, y, raw):
        nu, s = self.df, self.scale
        u = (y - raw) / s
        return 0.5 * (nu + 1.0) * np.log1p(u * u / nu) + (np.log(s) + _log_norm(nu))

    def _grad_hess(self, y, raw):
        nu, s = self.df, self.scale
        r = np.subtract(raw, y)
        h = np.multiply(r, r)
        h += nu * s * s
        np.divide(nu + 1.0, h, out=h)
        r *= h
        return r, h

    def _deviance(self, y, raw):
        nu, s = self.df, self.scale
        u = (y - raw) / s
        return (nu + 1.0) * s * s * np.log1p(u * u / nu)

    def _baseline(self, y, w, offset):
        t = y if offset is None else y - offset
        nu, s = self.df, self.scale
        c = weighted_quantile(t, w, 0.5)
        size = max(1.0, float(np.max(np.abs(t))))
        for _ in range(10000):
            h = w * (nu + 1.0) / (nu * s * s + (t - c) ** 2)
            new = float(np.dot(h, t) / h.sum())
            if abs(new - c) <= 1e-15 * size:
                return new
            c = new
        return c

    def _fit_scale(self, nu, r, w):
        sw = w.sum()
        if not np.dot(w, r != 0) > sw * nu / (nu + 1.0):
            raise ValueError(
                "student_t: too many residuals are exactly zero, so the likelihood rises without bound "
                "as the scale shrinks (no maximum-likelihood scale)"
            )
        r2 = r * r

        def excess(log_s):
            u2 = r2 / np.exp(2.0 * log_s)
            return float(np.dot(w, (nu + 1.0) * u2 / (nu + u2)) / sw) - 1.0

        amax = float(np.sqrt(r2.max()))
        lo, hi = np.log(amax) - 10.0, np.log(amax) + 1.0
        while excess(lo) < 0:
            lo -= 10.0
        return float(np.exp(optimize.brentq(excess, lo, hi, xtol=1e-14)))

    def _fit_nuisance(self, y, raw, w):
        r = y - raw
        if not self.estimate_df:
            return {"scale": self._fit_scale(self.df, r, w)}
        sw = w.sum()

        def profile(log_nu):
            nu = float(np.exp(log_nu))
            s = self._fit_scale(nu, r, w)
            return float(np.dot(w, StudentT(df=nu, scale=s)._nll(y, raw)) / sw)

        lo, hi = np.log(DF_RANGE[0]), np.log(DF_RANGE[1])
        res = optimize.minimize_scalar(profile, bounds=(lo, hi), method="bounded", options={"xatol": 1e-9})
        grid = np.linspace(lo, hi, 25)  # the profile may have more than one local minimum
        vals = [profile(g) for g in grid]
        best = int(np.argmin(vals))
        if vals[best] < res.fun - 1e-12:
            a, b = grid[max(best - 1, 0)], grid[min(best + 1, grid.size - 1)]
            res = optimize.minimize_scalar(profile, bounds=(a, b), method="bounded", options={"xatol": 1e-9})
        if res.x > hi - 1e-3:
            raise ValueError(
                "student_t: the likelihood keeps rising as the degrees of freedom grow (the residuals "
                "have Gaussian tails): no maximum-likelihood df; use gaussian or fix df"
            )
        if res.x < lo + 1e-3:
            raise ValueError("student_t: the likelihood keeps rising as the degrees of freedom shrink: "
                             "no maximum-likelihood df; fix df")
        nu = float(np.exp(res.x))
        return {"df": nu, "scale": self._fit_scale(nu, r, w)}

    def _distribution(self, raw):
        return stats.t(df=self.df, loc=raw, scale=self.scale)
