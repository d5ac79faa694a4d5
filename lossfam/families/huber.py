r"""Huber errors: the Huber loss as a proper likelihood.

With rho_delta(u) = u^2 / 2 for |u| <= delta and delta |u| - delta^2 / 2
otherwise, location mu = raw (identity link), fixed tuning constant delta > 0
and scale s > 0, the density is Huber's least-favourable law (Huber, 1964,
"Robust estimation of a location parameter", Ann. Math. Statist. 35):

    p(y) = exp(-rho_delta((y - mu) / s)) / (s C(delta)),
    C(delta) = sqrt(2 pi) (2 Phi(delta) - 1) + 2 exp(-delta^2 / 2) / delta

(the Gaussian core integrates to sqrt(2 pi)(2 Phi(delta) - 1); each
exponential tail integrates to exp(-delta^2/2)/delta).  With u = (y - raw)/s
and psi(u) = clip(u, -delta, delta):

    nll      = rho_delta(u) + log(s) + log C(delta)
    gradient = -psi(u) / s
    Hessian  = 1 / s^2 for |u| <= delta, 0 outside: replaced by the surrogate
               h = min(1, delta / |u|) / s^2, the curvature of the quadratic
               that majorises rho_delta at u (the iteratively reweighted
               least-squares weight psi(u)/u).  Exact inside the core,
               positive and finite everywhere, continuous at |u| = delta.
    deviance = 2 s^2 rho_delta(u)                 (2 s^2 (nll - nll at raw = y))
    baseline = the weighted Huber M-estimate of location: the root of
               sum w psi((y - c)/s) = 0 (monotone in c; scipy.optimize.brentq)
    s^       = root of sum w psi(u) u = sum w     (d/ds of the weighted nll; the
               left side falls monotonically in s; brentq on log s)
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import optimize, special

from .. import _checks
from .._checks import POSITIVE, REAL
from ..links import IDENTITY
from ._base import Family, by_row_blocks, residuals


def huber_rho(u, delta):
    a = np.abs(u)
    with np.errstate(over="ignore"):  # delta (a - delta / 2): no delta^2 that overflows alone
        return np.where(a <= delta, 0.5 * u * u, delta * (a - 0.5 * delta))


def huber_log_norm(delta):
    """log C(delta), the log normalising constant of the unit-scale Huber density."""
    core = np.sqrt(2.0 * np.pi) * (2.0 * special.ndtr(delta) - 1.0)
    tails = 2.0 * np.exp(-0.5 * delta * delta) / delta
    return float(np.log(core + tails))


class HuberLaw:
    """Huber's least-favourable law per row: logpdf, pdf, cdf, sf, ppf, mean, var, interval, rvs.

    A small vectorised distribution object in the spirit of a frozen scipy.stats law.
    """

    def __init__(self, loc, scale, delta):
        self.loc = np.asarray(loc, dtype=float)
        self.scale = float(scale)
        self.delta = float(delta)
        self._log_c = huber_log_norm(self.delta)
        d = self.delta
        self._tail_mass = np.exp(-0.5 * d * d) / d / np.exp(self._log_c)  # mass below -delta (unit law)

    def _u(self, y):
        return (np.asarray(y, dtype=float) - self.loc) / self.scale

    def logpdf(self, y):
        return -huber_rho(self._u(y), self.delta) - np.log(self.scale) - self._log_c

    def pdf(self, y):
        return np.exp(self.logpdf(y))

    def _unit_cdf_lower(self, u):
        """P(U <= u) for u <= 0 (U has the unit-scale law)."""
        d = self.delta
        c = np.exp(self._log_c)
        tail = np.exp(d * np.minimum(u, -d) + 0.5 * d * d) / d / c
        core = np.sqrt(2.0 * np.pi) * (special.ndtr(u) - special.ndtr(-d)) / c
        return np.where(u < -d, tail, self._tail_mass + core)

    def cdf(self, y):
        u = self._u(y)
        lower = self._unit_cdf_lower(-np.abs(u))
        return np.where(u <= 0, lower, 1.0 - lower)

    def sf(self, y):
        u = self._u(y)
        lower = self._unit_cdf_lower(-np.abs(u))
        return np.where(u >= 0, lower, 1.0 - lower)

    def _unit_ppf_lower(self, p):
        """Inverse of the unit cdf for p <= 1/2."""
        d = self.delta
        c = np.exp(self._log_c)
        with np.errstate(divide="ignore"):
            u_tail = (np.log(np.maximum(p, 1e-300) * d * c) - 0.5 * d * d) / d
        inner = (p - self._tail_mass) * c / np.sqrt(2.0 * np.pi) + special.ndtr(-d)
        u_core = special.ndtri(np.clip(inner, 0.0, 0.5))
        u = np.where(p < self._tail_mass, u_tail, u_core)
        return np.where(p <= 0, -np.inf, u)

    def ppf(self, q):
        q = np.asarray(q, dtype=float)
        lower = self._unit_ppf_lower(np.minimum(q, 1.0 - q))
        u = np.where(q <= 0.5, lower, -lower)
        return self.loc + self.scale * u

    def isf(self, q):
        return self.ppf(1.0 - np.asarray(q, dtype=float))

    def mean(self):
        return self.loc.copy()

    def median(self):
        return self.loc.copy()

    def var(self):
        d = self.delta
        c = np.exp(self._log_c)
        # E U^2: core sqrt(2 pi)[(2 Phi(d) - 1) - 2 d phi(d)] plus two tails
        # int_d^inf u^2 exp(-d u + d^2/2) du = exp(-d^2/2) (d^2 + 2 d (1/d) + 2/d^2)/d
        core = np.sqrt(2.0 * np.pi) * (2.0 * special.ndtr(d) - 1.0) - 2.0 * d * np.exp(-0.5 * d * d)
        tail = np.exp(-0.5 * d * d) * (d * d + 2.0 + 2.0 / (d * d)) / d
        return np.full_like(self.loc, (core + 2.0 * tail) / c * self.scale**2)

    def std(self):
        return np.sqrt(self.var())

    def interval(self, confidence):
        a = 0.5 * (1.0 - confidence)
        return self.ppf(np.full_like(self.loc, a)), self.ppf(np.full_like(self.loc, 1.0 - a))

    def rvs(self, size=None, random_state=None):
        rng = np.random.default_rng(random_state)
        shape = self.loc.shape if size is None else size
        return self.ppf(rng.uniform(size=shape))


@dataclass(frozen=True)
class Huber(Family):
    delta: float = 1.345
    scale: float = 1.0

    name = "huber"
    link_function = IDENTITY
    target_domain = REAL
    param_domains = {"delta": POSITIVE, "scale": POSITIVE}
    exact_hessian = False
    prediction_kind = "location"
    # engine facts: the threshold delta * scale is in units of y, so the location depends on the
    # scale (fitted at the baseline first).  Leaves keep the engine's Newton value on the IRLS
    # surrogate (a per-leaf line search was measured no more accurate, and slower).  No native
    # twin: LightGBM's huber has the same loss at alpha = delta * scale but a unit Hessian, not
    # this surrogate, so its trees differ.
    dispersion_unit = ("scale", 2.0)
    location_needs_nuisance = True

    def _nll(self, y, raw):
        u = (y - raw) / self.scale
        return huber_rho(u, self.delta) + (np.log(self.scale) + huber_log_norm(self.delta))

    def _grad_hess(self, y, raw):
        g, h = by_row_blocks(self._fill_grad_hess, (y, raw), n_out=2)
        return g, h

    def _fill_grad_hess(self, y, raw, g, h):
        """Gradient into g and Hessian into h for one block of rows."""
        s, d = np.float64(self.scale), self.delta
        r = np.subtract(raw, y, out=h)
        np.divide(r, s, out=g)
        np.maximum(g, -d, out=g)  # clip to [-d, d] with two ufunc calls (np.clip's wrapper costs more on small blocks)
        np.minimum(g, d, out=g)
        g /= s
        # min(1, d / |u|) / s^2 = d / (s max(|r|, d s)): finite even where |u| = |r| / s overflows
        a = np.abs(r, out=r)
        np.maximum(a, d * s, out=a)
        a *= s
        np.divide(d, a, out=h)

    def _deviance(self, y, raw):
        # 2 s^2 rho(r / s) written in r = y - raw: r^2 in the core, d s (2|r| - d s) in the tails
        # (no s^2 alone, which overflows for s > 1e154 although the deviance does not)
        r = y - raw
        a = np.abs(r)
        d, s = self.delta, self.scale
        ds = d * s
        with np.errstate(over="ignore", invalid="ignore", under="ignore"):
            # tails 2 d (s (|r| - d s / 2)): products of positives, none that underflows to 0 early
            return np.where(a <= ds, r * r, 2.0 * d * (s * (a - 0.5 * ds)))

    def _baseline(self, y, w, offset):
        t = y if offset is None else y - offset
        s, d = self.scale, self.delta
        psi = None  # psi((t - c) / s) per row, rewritten at every evaluation (no fresh arrays)

        def fill(t, out):
            np.subtract(t, c, out=out)
            out /= s
            np.clip(out, -d, d, out=out)

        def score(x):
            nonlocal psi, c
            c = x
            (psi,) = by_row_blocks(fill, (t,), n_out=1, out=None if psi is None else (psi,))
            return float(np.dot(w, psi))

        c = None

        lo, hi = float(t.min()), float(t.max())
        if lo == hi:
            return lo
        try:  # a bracket as wide as 1e308 needs up to ~2100 halvings
            # tolerance in units of the scale (the score's resolution), not of the widest target
            return optimize.brentq(score, lo, hi, xtol=max(1e-14 * s, 1e-300),
                                   rtol=4 * np.finfo(float).eps, maxiter=4000)
        except RuntimeError:  # pragma: no cover - the score is too coarse in float64 to locate its root
            raise ValueError("huber: the targets span too wide a range to locate the baseline in float64") from None

    def _fit_nuisance(self, y, raw, w):
        r = residuals(y, raw)
        if not np.min(w) > 0:
            keep = w > 0
            r, w = r[keep], w[keep]
        d = self.delta
        sw = w.sum()
        lo, hi = _checks._bounds(_checks.finite_residuals(r, self.name))
        amax = max(hi, -lo)  # max |r|
        if not amax > 0:
            raise ValueError("huber: every residual is zero, so the maximum-likelihood scale is 0 (not a valid scale)")
        r = np.divide(r, amax, out=r)  # solve for t = s / max|r|: residuals in [-1, 1], so u = r / t stays finite below
        terms = None  # psi(u) u per row, rewritten at every evaluation (no fresh arrays)

        def fill(r, out, u):
            np.divide(r, e, out=u)
            np.clip(u, -d, d, out=out)
            out *= u

        def excess(log_t):
            nonlocal terms, e
            e = np.exp(log_t)
            (terms,) = by_row_blocks(fill, (r,), n_out=1, n_scratch=1, out=None if terms is None else (terms,))
            return float(np.dot(w, terms) / sw) - 1.0

        e = None

        # psi(u) u <= u^2, so excess(0) <= mean r^2 - 1 <= 0; below, the tails grow like delta |r| / t
        lo, hi = -50.0, 1.0
        while excess(lo) < 0:
            lo -= 50.0
            if lo < -700.0:
                raise ValueError("huber: the residuals span too many orders of magnitude to fit the scale in float64")
        log_t = optimize.brentq(excess, lo, hi, xtol=1e-13)
        return {"scale": float(amax * np.exp(log_t))}

    def _distribution(self, raw):
        return HuberLaw(raw, self.scale, self.delta)
