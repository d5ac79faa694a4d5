r"""The censored likelihood of any family that declares its tail pieces, written once.

Pieces
------
A family that supports censored rows implements ``_tail_pieces(v, raw)``: at a
finite bound ``v`` inside its support and raw score ``raw`` it returns four
arrays

    log F       log of the cdf F(v; raw)
    log S       log of the survival function S(v; raw) = 1 - F(v; raw)
    log D       log of D = dS/draw = -dF/draw  (>= 0: a larger raw score moves
                the law to larger values, true of every family here)
    E           (d^2 S / draw^2) / D

each computed in log space by the family (never log(1 - cdf)).  For a
location-scale law on a transformed target, z = (t(v) - raw) / s with a
standard law (F0, S0, f0) and its score psi = d log f0 / dz,

    log D = log f0(z) - log s,      E = -psi(z) / s

(:func:`location_scale_pieces`).  gaussian (t = v), lognormal (t = log v,
normal), weibull (t = log v, the minimum extreme-value law, s = 1/k), gamma
(t = log v, the log-gamma law, s = 1), laplace and student_t (t = v) are of
this form.

Interval rows
-------------
For a row with bounds lo < hi (an open side contributes F(lo) = 0 or
S(hi) = 0), P = F(hi) - F(lo) = S(lo) - S(hi) and

    nll = -log P
    log P = log F(hi) + log1mexp(log F(lo) - log F(hi))    where F(hi) <= S(lo)
          = log S(lo) + log1mexp(log S(hi) - log S(lo))    otherwise

(the side whose larger term is smaller: its difference loses the least to
rounding; log1mexp(x) = log(1 - e^x) by expm1 or log1p as x is above or below
-log 2).  With a = D(hi) / P and b = D(lo) / P, both as exp(log D - log P)
(the ratio of a density to a tail probability stays finite far in the tails,
where each factor alone underflows):

    gradient = -dP/draw / P = a - b
    Hessian  = -d^2P/draw^2 / P + (dP/draw / P)^2 = E(hi) a - E(lo) b + (a - b)^2.

The Hessian is exact where it is positive.  It is >= 0 wherever the density
is log-concave (gaussian, lognormal, weibull, gamma, laplace: an interval
probability of a log-concave law is log-concave in its location), but exactly
0 on laplace's linear tails and negative for some student_t rows.  Where the
exact value is not above rounding (at most 1e-9 of the size of its terms) it is
replaced by the surrogate g^2 (the row's squared score, the outer-product
approximation of the information), which is positive wherever the gradient is
non-zero: a Newton step on such a row alone is then -1 / g, e.g. one scale
unit on laplace's tails.

Exact rows (lo == hi) use the family's own ``_nll`` and ``_grad_hess``, so a
target with no censored row gives today's numbers bit for bit.
"""
from __future__ import annotations

import numpy as np
from scipy import optimize
from scipy.special import log_ndtr

from .. import _checks

#: a Hessian at most this fraction of the size of its terms is rounding: the surrogate g^2 is used
ROUNDING = 1e-9
_LOG2 = float(np.log(2.0))


def log1mexp(x):
    """log(1 - e^x) for x <= 0 (-inf at 0, 0 at -inf), accurate on both sides of -log 2."""
    x = np.asarray(x, dtype=float)
    near = x > -_LOG2
    out = np.empty(x.shape)
    with np.errstate(divide="ignore", invalid="ignore"):
        if near.all():
            return np.log(-np.expm1(x))
        out[near] = np.log(-np.expm1(x[near]))
        far = ~near
        out[far] = np.log1p(-np.exp(x[far]))
    return out


def location_scale_pieces(z, s, log_cdf, log_sf, log_pdf, score):
    """The four pieces (module docstring) of a location-scale law at z = (t(v) - raw) / s."""
    return log_cdf(z), log_sf(z), log_pdf(z) - np.log(s), -score(z) / s


_HALF_LOG_2PI = 0.5 * float(np.log(2.0 * np.pi))


def normal_pieces(z, s):
    """The pieces of a normal law at z with scale s (scipy.special.log_ndtr for both tails)."""
    return location_scale_pieces(z, s, log_ndtr, lambda u: log_ndtr(-u),
                                 lambda u: -0.5 * u * u - _HALF_LOG_2PI, np.negative)


def open_sides(fam, lo, hi):
    """Masks of the rows whose lower / upper bound is a finite point inside the support (others are open)."""
    a, b = fam.support_edges
    return (lo > a) & np.isfinite(lo), (hi < b) & np.isfinite(hi)


def _pieces_at(fam, v, raw, mask, lower):
    """Pieces at the bounds v where ``mask``; neutral values (an open side) elsewhere."""
    n = v.size
    log_f = np.full(n, -np.inf if lower else 0.0)
    log_s = np.full(n, 0.0 if lower else -np.inf)
    log_d = np.full(n, -np.inf)
    e = np.zeros(n)
    if mask.any():
        with np.errstate(over="ignore", under="ignore", divide="ignore", invalid="ignore"):
            pf, ps, pd, pe = fam._tail_pieces(v[mask], raw[mask])
        log_f[mask], log_s[mask], log_d[mask], e[mask] = pf, ps, pd, pe
    return log_f, log_s, log_d, e


def interval_terms(fam, lo, hi, raw, derivatives=True):
    """(nll, gradient, Hessian) of rows lo < hi (gradient and Hessian None unless ``derivatives``)."""
    has_lo, has_hi = open_sides(fam, lo, hi)
    f_lo, s_lo, d_lo, e_lo = _pieces_at(fam, lo, raw, has_lo, True)
    f_hi, s_hi, d_hi, e_hi = _pieces_at(fam, hi, raw, has_hi, False)
    with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
        lower_side = f_hi <= s_lo
        # the chosen side's larger term and the difference of logs (-inf where the other term is 0)
        top = np.where(lower_side, f_hi, s_lo)
        diff = np.where(lower_side, np.where(np.isneginf(f_lo), -np.inf, f_lo - f_hi),
                        np.where(np.isneginf(s_hi), -np.inf, s_hi - s_lo))
        log_p = top + log1mexp(np.minimum(diff, 0.0))
        nll = -log_p
        if not derivatives:
            return nll, None, None
        a = np.exp(d_hi - log_p)
        b = np.exp(d_lo - log_p)
        g = a - b
        ea, eb = e_hi * a, e_lo * b
        h = ea - eb + g * g
        size = np.abs(ea) + np.abs(eb) + g * g
        sur = ~(h > ROUNDING * size)
        if sur.any():
            h[sur] = g[sur] * g[sur]
    return nll, g, h


def _split(target):
    """(exact rows, censored rows, y of exact rows, lower and upper of censored rows), computed once
    per target and kept on it (the engines call every round with the same target)."""
    cached = target._split
    if cached is None:
        ex = np.flatnonzero(target.exact)
        ce = np.flatnonzero(~target.exact)
        cached = (ex, ce, target.lower[ex], target.lower[ce], target.upper[ce])
        target._split = cached
    return cached


def censored_nll(fam, target, raw):
    ex, ce, y_ex, lo, hi = _split(target)
    out = np.empty(target.size)
    if ex.size:
        out[ex] = fam._nll(y_ex, raw[ex])
    if ce.size:
        out[ce] = interval_terms(fam, lo, hi, raw[ce], derivatives=False)[0]
    return out


def censored_grad_hess(fam, target, raw):
    ex, ce, y_ex, lo, hi = _split(target)
    if not ce.size:
        return fam._grad_hess(target.lower, raw)
    g = np.empty(target.size)
    h = np.empty(target.size)
    if ex.size:
        ge, he = fam._grad_hess(y_ex, raw[ex])
        g[ex], h[ex] = ge, he
    _, gc, hc = interval_terms(fam, lo, hi, raw[ce])
    g[ce], h[ce] = gc, hc
    return g, h


def censored_baseline(fam, target, w, offset):
    r"""The constant c minimising sum w nll(target, c + o): Newton steps on the (surrogate) Hessian,
    halved until the weighted nll does not rise beyond its rounding, from the family's exact-row
    baseline of a stand-in target; stops at a step below 1e-12 relative.

    Returns inf when no finite minimiser exists: no row (of positive weight) bounded above, or
    none bounded below (e.g. every row right-censored).
    """
    o = np.zeros(target.size) if offset is None else offset
    sw = w.sum()
    has_lo, has_hi = open_sides(fam, target.lower, target.upper)
    used = w > 0
    if not np.any(has_hi[used]) or not np.any(has_lo[used]):
        # every row open above (or every row open below): the nll falls forever as c grows (falls)
        return np.inf

    def mean_nll(c):
        return float(np.dot(w, censored_nll(fam, target, c + o)) / sw)

    c = _start(fam, target, w, offset)
    f = mean_nll(c)
    for _ in range(100):
        g, h = censored_grad_hess(fam, target, c + o)
        gs, hs = float(np.dot(w, g)), float(np.dot(w, h))
        if not (np.isfinite(gs) and np.isfinite(hs) and hs > 0):
            break
        step = -gs / hs
        if abs(step) <= 1e-12 * max(1.0, abs(c)):
            return c + step
        slack = 64 * np.finfo(float).eps * max(abs(f), 1.0)  # rounding of the mean nll
        for _ in range(60):
            fn = mean_nll(c + step)
            if fn <= f + slack:
                break
            step *= 0.5
        else:
            return c
        c, f = c + step, min(f, fn)
        if abs(c) > 1e300:
            return np.inf
    # not converged by Newton: a bracketing scalar search from the last point
    res = optimize.minimize_scalar(mean_nll, bracket=(c - 1.0, c + 1.0))
    return res.x if np.isfinite(res.fun) else np.inf


def _start(fam, target, w, offset):
    """A starting constant: the exact-row baseline of stand-in values inside the support."""
    mid = target.midpoint()
    ok = np.asarray(fam.target_domain.inside(mid), dtype=bool)
    if ok.any():
        try:
            o = None if offset is None else offset[ok]
            c = float(fam._baseline(mid[ok], w[ok], o))
            if np.isfinite(c):
                return c
        except (ValueError, FloatingPointError, ZeroDivisionError):
            pass
    return 0.0


def censored_fit_nuisance(fam, target, raw, w):
    """Maximum-likelihood values of ``fam.censored_fit`` parameters (Brent on the log of one
    parameter, Nelder-Mead on the logs of several), the others held."""
    import dataclasses

    names = list(fam.censored_fit)
    if not names:
        return {}
    sw = w.sum()

    def objective(logp):
        logp = np.atleast_1d(logp)
        try:
            f2 = dataclasses.replace(fam, **dict(zip(names, np.exp(logp))))
        except ValueError:
            return np.inf
        v = float(np.dot(w, censored_nll(f2, target, raw)) / sw)
        return v if np.isfinite(v) else np.inf

    start = np.log([fam.params[n] for n in names])
    if len(names) == 1:
        res = optimize.minimize_scalar(lambda t: objective([t]), bracket=(start[0] - 0.5, start[0] + 0.5),
                                       tol=1e-12)
        best = np.array([res.x])
    else:
        res = optimize.minimize(objective, start, method="Nelder-Mead",
                                options={"xatol": 1e-10, "fatol": 1e-14, "maxiter": 4000})
        best = res.x
    if not np.all(np.isfinite(best)) or not np.isfinite(objective(best)):
        raise ValueError(f"{fam.name}: no finite maximum-likelihood {', '.join(names)} for these censored targets")
    return {n: float(np.exp(v)) for n, v in zip(names, best)}


def check_interval_support(fam, target, owner):
    """Refuse bounds outside the family's support (rows named); exact rows must be valid targets."""
    if fam.support_edges is None or not _has_pieces(fam):
        raise ValueError(f"{owner}: this family has no censored likelihood (it declares no tail pieces); "
                         "censored and interval targets need a continuous family that does")
    a, b = fam.support_edges
    lo, hi, ex = target.lower, target.upper, target.exact
    dom = fam.nll_domain or fam.target_domain
    if ex.any():
        bad = ex & ~dom.inside(np.where(ex, lo, 0.0))
        if bad.any():
            raise ValueError(f"{owner}: an exact row (lower == upper) must be {dom.rule}; "
                             f"{_checks._describe_rows(bad, lo)}")
    c = ~ex
    bad = c & ~((lo == -np.inf) | ((lo >= a) & (lo < b)))
    if bad.any():
        raise ValueError(f"{owner}: a censored row's lower bound must be -inf or in [{a!r}, {b!r}) "
                         f"(the support); {_checks._describe_rows(bad, lo)}")
    bad = c & ~((hi == np.inf) | ((hi > a) & (hi <= b)))
    if bad.any():
        raise ValueError(f"{owner}: a censored row's upper bound must be +inf or in ({a!r}, {b!r}] "
                         f"(the support); {_checks._describe_rows(bad, hi)}")


def _has_pieces(fam):
    from ._base import Family
    return type(fam)._tail_pieces is not Family._tail_pieces
