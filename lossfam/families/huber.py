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
               sum w psi((y - c)/s) = 0 (monotone and piecewise linear in c:
               safeguarded Newton, location_m_estimate; in a gap between rows
               where the score is 0 throughout, the gap's midpoint)
    s^       = root of sum w psi(u) u = sum w     (d/ds of the weighted nll; the
               left side falls monotonically in s: Newton from the Gaussian
               scale, monotone, _scale_root)
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import optimize, special

from .. import _checks
from .._checks import POSITIVE, REAL
from ..links import IDENTITY
from ._base import BLOCK_ROWS, Family, by_row_blocks, residuals, sum_by_row_blocks


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
        lo, hi = _checks._bounds(t)
        if lo == hi:
            return lo
        return location_m_estimate(t, None if _constant(w) else w, self.scale, self.delta, lo, hi)

    def _fit_nuisance(self, y, raw, w):
        r = residuals(y, raw)
        if not np.min(w) > 0:
            keep = w > 0
            r, w = r[keep], w[keep]
        lo, hi = _checks._bounds(_checks.finite_residuals(r, self.name))
        amax = max(hi, -lo)  # max |r|
        if not amax > 0:
            raise ValueError("huber: every residual is zero, so the maximum-likelihood scale is 0 (not a valid scale)")
        # rho = |r| / max|r| in [0, 1] (overwriting r): z = max|r| / s is then the unknown, and u = rho z stays finite
        rho = np.abs(r, out=r)
        rho /= amax
        return {"scale": float(amax / _scale_root(rho, None if _constant(w) else w, self.delta))}

    def _distribution(self, raw):
        return HuberLaw(raw, self.scale, self.delta)


def _constant(w):
    """True when every weight is the same (only relative weights matter: then none are needed)."""
    lo, hi = _checks._bounds(w)
    return lo == hi


#: |S| below FLAT_TOL d W counts as zero where no row lies in the core (location_m_estimate)
FLAT_TOL = 1e-9
#: iterations of the safeguarded root finders below (far more than they take: 3-10 on real data)
MAX_ITERATIONS = 4000


def location_m_estimate(t, w, s, d, lo, hi):
    """The Huber M-estimate of location c: the root of S(c) = sum w psi((t - c) / s), psi = clip(., -d, d).

    S falls monotonically in c and is piecewise linear: with the core rows
    |t - c| < d s fixed it is sum_core w (t - c) / s + d (sum w over rows above
    the core - sum w below), of slope -D / s, D = sum_core w.  Newton's step
    c + s S(c) / D therefore lands exactly on the root once the core is right.
    Safeguard: the bracket [lo, hi] (S(lo) >= 0 >= S(hi)) shrinks with every
    evaluation, and a Newton step that leaves it, or that is not below half
    the step two evaluations back, is replaced by bisection.  Stops when the step is below
    1e-14 s (the score's resolution) + 4 eps |c|, as brentq did before
    (|c| the smaller end of the bracket).  One
    pass over the rows per evaluation (``sum_by_row_blocks``), no row-sized
    temporaries; ``w=None`` means equal weights.

    Where no row lies in the core, S is constant, d (W above - W below),
    between the nearest rows below and above c (one more pass finds them).
    When that constant is zero (to 1e-9 d W: rounding of the sum), every c
    of the gap is a root, and the midpoint of the two rows is returned (so the
    estimate of -t is minus that of t); otherwise the bracket jumps past the
    gap.
    """
    def kernel(t, w, u, m):
        np.subtract(t, c, out=u)
        u /= s
        np.maximum(u, -d, out=u)
        np.minimum(u, d, out=u)
        np.less(np.abs(u, out=m), d, out=m)  # m: 1.0 in the core, 0.0 outside (float, for the dot below)
        if w is None:
            return float(u.sum()), float(m.sum())
        return float(np.dot(w, u)), float(np.dot(w, m))

    tol_abs = max(1e-14 * s, 1e-300)
    total = float(t.size) if w is None else float(w.sum())
    with np.errstate(over="ignore"):
        c = float(np.dot(w, t) / w.sum()) if w is not None else float(np.mean(t))
    if not lo < c < hi:  # the mean overflowed, or the rows are too few to place it inside
        c = lo / 2 + hi / 2
    steps = []
    for _ in range(MAX_ITERATIONS):
        score, core = sum_by_row_blocks(kernel, (t, w), n_scratch=2)
        if score == 0.0 and core > 0:
            return c
        if score > 0:
            lo = c
        else:
            hi = c
        if core == 0:  # a gap between rows, where S is constant
            below, above = _neighbours(t, w, c)
            if abs(score) <= FLAT_TOL * d * total:
                return below / 2 + above / 2
            if score > 0:
                lo = max(lo, above - d * s)
            else:
                hi = min(hi, below + d * s)
        tol = tol_abs + 4 * np.finfo(float).eps * min(abs(lo), abs(hi))
        if hi - lo <= tol:
            return c if lo <= c <= hi else lo / 2 + hi / 2
        step = s * score / core if core > 0 else np.nan
        new = c + step
        # bisect when Newton leaves the bracket or its steps have not halved in two evaluations
        if lo <= new <= hi and abs(step) <= tol:
            return new
        if not lo < new < hi or (len(steps) > 1 and abs(step) > 0.5 * abs(steps[-2])):
            new = lo / 2 + hi / 2
            step = new - c
            if abs(step) <= tol:
                return new
        steps.append(step)
        c = new
    raise ValueError("huber: the targets span too wide a range to locate the baseline in float64")  # pragma: no cover


def _neighbours(t, w, c):
    """The largest t below c and the smallest above it, among rows of positive weight (one pass)."""
    def kernel(t, w):
        keep = True if w is None else w > 0
        return (float(np.max(t, where=keep & (t < c), initial=-np.inf)),
                float(np.min(t, where=keep & (t > c), initial=np.inf)))

    below = above = None
    for start in range(0, t.size, BLOCK_ROWS):
        rows = slice(start, start + BLOCK_ROWS)
        b, a = kernel(t[rows], None if w is None else w[rows])
        below = b if below is None else max(below, b)
        above = a if above is None else min(above, a)
    return below, above


def _scale_root(rho, w, d):
    """The root z of F(z) = mean_w psi(rho z) rho z = 1 (rho = |r| / max|r|, z = max|r| / s).

    F is the weighted mean of min(u, d) u, u = rho z: the scale's score
    equation (d/ds of the weighted nll, times s).  Per row, F / z is rho^2 z
    in the core (u <= d) and d rho beyond: increasing and concave in z, so
    h(z) = (F(z) - 1) / z is increasing and concave, with slope
    h'(z) = (K + 1) / z^2, K the weighted mean of u^2 over the core.  Newton's
    step on h is

        z <- z (1 + (1 - F) / (1 + K)).

    On a concave increasing function every Newton iterate lands at or left of
    the root, so from the left the iterates rise monotonically to it, without
    a bracket (quadratically once the core stops changing).  The start is the
    Gaussian scale's z0 = 1 / sqrt(mean_w rho^2), where F(z0) <= 1 because
    min(u, d) u <= u^2.  Stops when a step is below 1e-15 relative (or stalls
    in rounding).  One pass over the rows per step (``sum_by_row_blocks``),
    no row-sized temporaries; ``w=None`` means equal weights.
    """
    def kernel(rho, w, u, c):
        np.multiply(rho, z, out=u)
        np.minimum(u, d, out=c)  # psi(u) for u >= 0
        return float(np.dot(c, u)), float(np.dot(c, c)), float(np.count_nonzero(u > d))

    def weighted_kernel(rho, w, u, c, wc):
        np.multiply(rho, z, out=u)
        np.minimum(u, d, out=c)
        np.multiply(c, w, out=wc)
        return float(np.dot(wc, u)), float(np.dot(wc, c)), float(np.add.reduce(w, where=u > d))

    total = float(rho.size) if w is None else float(w.sum())
    (mean_sq,) = sum_by_row_blocks(lambda rho, w: (float(np.dot(rho, rho) if w is None else np.dot(w * rho, rho)),),
                                   (rho, w))
    z = 1.0 / np.sqrt(mean_sq / total)
    for _ in range(MAX_ITERATIONS):
        if not z < 1e300:
            raise ValueError("huber: the residuals span too many orders of magnitude to fit the scale in float64")
        if w is None:
            p, s2, w_tail = sum_by_row_blocks(kernel, (rho, None), n_scratch=2)
        else:
            p, s2, w_tail = sum_by_row_blocks(weighted_kernel, (rho, w), n_scratch=3)
        f = p / total
        k = max((s2 - d * d * w_tail) / total, 0.0)  # the core's share of sum w c^2
        if not f < 1.0:
            return z
        new = z * (1.0 + (1.0 - f) / (1.0 + k))
        if not new > z * (1.0 + 1e-15):
            return new if new > z else z
        z = new
    raise ValueError("huber: the scale's root finding did not converge")  # pragma: no cover
