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

Limits far in the tails
-----------------------
Where float64 cannot hold the terms above, the limits of the exact values are used:

* a closed row whose log tails round to the same value (its bounds give one transformed point,
  or the law is so far away that the difference of logs is lost): P = f(m) w (1 + O(w psi)) with
  m the midpoint and w = hi - lo, so nll = -log f(m) - log w and the gradient and Hessian are the
  exact row's at m (``_narrow_limit``);
* a closed row whose far tail is below eps of its near one (log difference < -40): P is the
  near tail to rounding (the far bound adds at most e^-40 times a ratio of hazards), so it is the
  one-sided row at the near bound: by the TailLaw's hazard where the family has one (rows the
  linear-space kernel cannot serve), else by the log-space terms where the ratios are lost;
* nll = +inf only where -log P itself exceeds float64 (P below e^-1.8e308), and then the
  gradient and Hessian are -+inf and +inf only where the log tail has no finite value either
  (e.g. weibull right-censored at k z > 709: g = -k e^(k z)).  NaN is never returned for legal
  bounds and finite raw scores.

Exact rows (lo == hi) use the family's own ``_nll`` and ``_grad_hess``, so a
target with no censored row gives today's numbers bit for bit.

The gradient and Hessian, fast
------------------------------
The log-space terms above serve the nll (of one-sided rows only where the law has no
``TailLaw.log_tail``: one log tail per row, e.g. ``log_ndtr``, is far cheaper than four pieces
at two bounds), and the gradient and Hessian of families that declare only their pieces.  A family that also declares its standard law in linear space
(``Family._tail_law``, a :class:`TailLaw`) gets ``censored_grad_hess`` by kind of row: the
family's own kernel over all rows (censored rows given a stand-in y, then overwritten), the
one-sided rows by their hazard ratio alone, the closed intervals by the difference of their
smaller-side tails, block by block (``BLOCK_ROWS``), with the row split and the transformed
bounds kept on the target; the log-space terms only for the rows whose tails underflow.  Both
writings are checked against each other in the tests.
"""
from __future__ import annotations

import numpy as np
from scipy import optimize
from scipy.special import log_ndtr, ndtr

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


def interval_terms(fam, lo, hi, raw, derivatives=True, one_sided=None):
    """(nll, gradient, Hessian) of rows lo < hi (gradient and Hessian None unless ``derivatives``).

    ``one_sided(lo, hi, raw)`` -> (g, h), if given, serves closed rows far in a tail (P equal to its
    near tail to rounding) whose log-space ratios are lost; by default the log-space terms of the
    one-sided row."""
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
        closed = has_lo & has_hi
        # a closed row whose tails round to the same value (or underflow): the narrow-interval limit
        lost = closed & ~np.isfinite(log_p) & np.isfinite(top)
        if lost.any():
            mid, gm, hm = _narrow_limit(fam, lo[lost], hi[lost], raw[lost], derivatives)
            nll[lost] = mid
        # a closed row far in a tail (its near tail underflows in log space, or the far one is below
        # eps of it): P = (near tail) (1 - e^diff) = the near tail to rounding, the one-sided row
        near = closed & ~lost & (np.isneginf(top) | (diff < -40.0))
        if derivatives and near.any():
            lo_n, hi_n = np.where(lower_side, -np.inf, lo)[near], np.where(lower_side, hi, np.inf)[near]
            if one_sided is None:
                _, gn, hn = interval_terms(fam, lo_n, hi_n, raw[near])
            else:
                gn, hn = one_sided(lo_n, hi_n, raw[near])
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
        if lost.any():
            g[lost], h[lost] = gm, hm
        if near.any():
            # the log-space ratios far in a tail lose eps |log P| (all digits where log P ~ -1e13):
            # the TailLaw's one-sided hazards, where given, replace them outright
            swap = near if one_sided is not None else near & ~(np.isfinite(g) & np.isfinite(h))
            g[swap], h[swap] = gn[swap[near]], hn[swap[near]]
        # a one-sided row whose tail is below e^-1.8e308 (log P = -inf): its score and curvature
        # exceed float64 too (d/draw of -log S -> -inf as log S -> -inf): the limits -+inf, +inf
        beyond = ~closed & np.isneginf(log_p)
        if beyond.any():
            g[beyond] = np.where(has_lo[beyond], -np.inf, np.inf)
            h[beyond] = np.inf
    return nll, g, h


def _near_side(fam, law, s, lo, hi, raw):
    """(g, h) of one-sided rows (lo = -inf: left-censored at hi; else right-censored at lo) by the
    TailLaw's hazard ratios, the log-space terms where those defer."""
    g = np.empty(lo.size)
    h = np.empty(lo.size)
    for right, idx in ((True, np.flatnonzero(np.isfinite(lo))), (False, np.flatnonzero(~np.isfinite(lo)))):
        if idx.size:
            t = _transformed(law, lo[idx] if right else hi[idx])
            g[idx], h[idx], _ = _one_sided(law, s, t, raw[idx], right)
    redo = np.isnan(g) | np.isnan(h)
    if redo.any():
        _, g[redo], h[redo] = interval_terms(fam, lo[redo], hi[redo], raw[redo])
    return g, h


def _narrow_limit(fam, lo, hi, raw, derivatives=True):
    r"""(nll, g, h) of closed rows lo < hi whose log tails cannot be told apart in float64 (the
    bounds round to the same transformed point, or both tails underflow): P = f(m) w (1 + O(w psi))
    with m the midpoint and w = hi - lo, so nll = -log f(m) - log w, and the gradient and Hessian
    are the exact row's at m (the O(w psi) terms are below the rounding of the log tails that lost
    them)."""
    with np.errstate(over="ignore", divide="ignore", invalid="ignore"):
        w = hi - lo  # exact for subnormal widths; halves only where it overflows
        wide = ~np.isfinite(w)
        log_w = np.where(wide, np.log(0.5 * hi - 0.5 * lo) + _LOG2, np.log(np.where(wide, 1.0, w)))
        mid = np.where(wide, 0.5 * lo + 0.5 * hi, lo + 0.5 * np.where(wide, 0.0, w))
        nll = fam._nll(mid, raw) - log_w
        if not derivatives:
            return nll, None, None
        g, h = fam._grad_hess(mid, raw)
    return nll, g, h


def _cache(target):
    """The target's per-row cache (a dict kept on it: the engines call every round with the same target)."""
    if target._split is None:
        target._split = {}
    return target._split


def _split(target):
    """(exact rows, censored rows, y of exact rows, lower and upper of censored rows), computed once
    per target and kept on it."""
    cache = _cache(target)
    cached = cache.get("split")
    if cached is None:
        ex = np.flatnonzero(target.exact)
        ce = np.flatnonzero(~target.exact)
        cached = (ex, ce, target.lower[ex], target.lower[ce], target.upper[ce])
        cache["split"] = cached
    return cached


def censored_nll(fam, target, raw):
    """The censored nll per row: exact rows by the family's ``_nll``, closed intervals by the
    log-space terms (``interval_terms``), one-sided rows by the law's own log tail where its
    TailLaw has one (``TailLaw.log_tail``: -log S0 or -log F0 at z, one function call), else by
    the log-space terms too."""
    ex, ce, y_ex, lo, hi = _split(target)
    out = np.empty(target.size)
    if ex.size:
        out[ex] = fam._nll(y_ex, raw[ex])
    if not ce.size:
        return out
    law_s = fam._tail_law()
    if law_s is None or law_s[0].log_tail is None:
        out[ce] = interval_terms(fam, lo, hi, raw[ce], derivatives=False)[0]
        return out
    law, s = law_s
    s = float(s)
    rows = _rows_for(fam, target, law)
    with np.errstate(over="ignore", under="ignore", divide="ignore", invalid="ignore"):
        for kind, upper in (("right", True), ("left", False)):
            idx = rows.idx[kind]
            if idx.size:
                z = np.subtract(rows.t_lo[kind] if upper else rows.t_hi[kind], raw[idx])
                if s != 1.0:
                    z /= s
                out[idx] = np.negative(law.log_tail(z, upper))
        idx = rows.idx["closed"]
        if idx.size:
            out[idx] = interval_terms(fam, rows.lo["closed"], rows.hi["closed"], raw[idx], derivatives=False)[0]
        if rows.idx["void"].size:
            out[rows.idx["void"]] = 0.0
    return out


# ---------------------------------------------------------------------------- the fast kernel
#: a tail probability below this is left to the log-space pieces (its ratios lose digits or underflow)
TINY = 1e-280


class TailLaw:
    r"""The standard law of a location-scale family, in linear space, for the censored gradient and
    Hessian (the log-space ``_tail_pieces`` stay the reference, used for the nll and for the rows
    this class cannot serve).

    A family that has one returns ``(law, s)`` from ``_tail_law()``: the bound v of a row enters
    as z = (t(v) - raw) / s, with t = log where ``log_bounds`` (the transform is computed once per
    target and kept).  A one-sided row needs one ratio only, never a logarithm:

    right-censored at z (P = S0(z)), the hazard r = f0 / S0 and c = r + psi:
        nll = -log S0(z),   gradient = -r / s,   Hessian = r c / s^2
    left-censored at z (P = F0(z)), the reversed hazard q = f0 / F0 and c = q - psi:
        nll = -log F0(z),   gradient = q / s,    Hessian = q c / s^2

    (d/dz of -log S0 is r, and dr/dz = r (r + psi); dz/draw = -1 / s.)  ``right(z)`` and
    ``left(z)`` return (r, c) and (q, c); a law writes them in closed form where it can, so
    that c, a difference of two close terms far in a tail, keeps its digits.  r (q) is NaN
    where the law cannot give it (a tail below TINY): those rows take the log-space path.
    c <= 0 marks a Hessian that is not positive (or not above rounding): the surrogate g^2.

    A closed interval z_lo < z_hi uses P = F0(z_hi) - F0(z_lo) when (z_lo + z_hi) / 2 is at or
    below the median, else S0(z_lo) - S0(z_hi) (the subtracted term is then at most 1/2, so
    P keeps the relative accuracy of its larger term), with a = f0(z_hi) / (s P),
    b = f0(z_lo) / (s P):

        gradient = a - b,   Hessian = -(psi(z_hi) a - psi(z_lo) b) / s + (a - b)^2

    the formulas of the log-space path (module docstring) with E = -psi / s.  Rows whose larger
    tail term is below TINY, or whose P is not positive, take the log-space path.
    """

    log_bounds = False
    #: z at which F0 = 1/2
    median = 0.0
    #: True when ``right`` / ``left`` may return NaN (rows for the log-space path); False for laws
    #: whose one-sided ratios are in closed form everywhere
    defers = True
    #: S0(z) = F0(-z): ``left`` and the upper tail follow from ``right`` and the lower tail
    symmetric = False
    #: None, or ``closed(z_lo, z_hi)`` -> (s g, s^2 h) of closed intervals in closed form (no
    #: rows left for the log-space path)
    closed = None
    #: None, or ``log_tail(z, upper)`` -> log S0(z) where ``upper`` (a bool for all rows), else
    #: log F0(z), accurate in both tails (for the nll of one-sided rows)
    log_tail = None

    def pdf(self, z):  # pragma: no cover - abstract
        raise NotImplementedError

    def score(self, z):  # pragma: no cover - abstract
        raise NotImplementedError

    def cdf(self, z):  # pragma: no cover - abstract
        raise NotImplementedError

    def sf(self, z):
        return self.cdf(-z) if self.symmetric else 1.0 - self.cdf(z)

    def tail(self, z, upper):
        """F0(z) where ``upper`` is False, S0(z) where it is True."""
        if self.symmetric:
            return self.cdf(np.where(upper, -z, z))
        out = np.empty(z.shape)
        out[upper] = self.sf(z[upper])
        out[~upper] = self.cdf(z[~upper])
        return out

    def tail_pdf(self, z, upper):
        """(``tail(z, upper)``, ``pdf(z)``): a law may share work between the two."""
        return self.tail(z, upper), self.pdf(z)

    def tail_pdf_score(self, z, upper):
        """(``tail(z, upper)``, ``pdf(z)``, ``score(z)``), new arrays: a law may share work."""
        return (*self.tail_pdf(z, upper), self.score(z))

    def right(self, z):
        """(r, c) of right-censored rows from the sf (generic; NaN where S0 < TINY)."""
        tail = self.sf(z)
        return self._ratio(z, tail, self.score(z))

    def left(self, z):
        """(q, c) of left-censored rows (generic; NaN where F0 < TINY)."""
        if self.symmetric:
            return self.right(-z)
        tail = self.cdf(z)
        return self._ratio(z, tail, -self.score(z))

    def _ratio(self, z, tail, psi):
        with np.errstate(divide="ignore", invalid="ignore", over="ignore", under="ignore"):
            r = self.pdf(z) / tail
            c = r + psi
            np.copyto(c, 0.0, where=~(c > ROUNDING * (r + np.abs(psi))))
        r[~(tail >= TINY)] = np.nan
        return r, c


def int_power(x, m):
    """x ** m for an integer m >= 1 by repeated squaring (numpy's power calls pow for m > 2)."""
    out = None
    sq = x
    while True:
        if m & 1:
            out = sq.copy() if out is None else np.multiply(out, sq, out=out)
        m >>= 1
        if not m:
            return out
        sq = sq * sq


def horner(coef, x):
    """sum_j coef[j] x^j (coef a tuple of floats, lowest degree first)."""
    out = np.full(x.shape, coef[-1])
    for a in coef[-2::-1]:
        out *= x
        out += a
    return out


class NormalLaw(TailLaw):
    r"""The standard normal law (gaussian on y, lognormal on log y).

    The hazard r(z) = phi(z) / Phi(-z) from scipy.special.ndtr, and c = r - z, for z <= 5.
    Beyond, r - z loses digits to cancellation (1e-13 relative at z = 5, 1e-10 at z = 30) and
    Phi(-z) underflows past z ~ 38, so c = r - z comes from the continued fraction of the Mills
    ratio Phi(-z) / phi(z) = 1 / (z + 1 / (z + 2 / (z + 3 / (z + ...)))), i.e.
    r - z = 1 / (z + 2 / (z + 3 / (z + ...))), 40 levels (within 2e-16 of mpmath at 50 digits
    for z >= 4; Abramowitz and Stegun, Handbook of Mathematical Functions, eq. 26.2.14, recalled
    from memory; checked in the tests).  The normal law is symmetric:
    left(z) = right(-z).
    """

    symmetric = True
    defers = False
    FAR = 5.0
    LEVELS = 40

    def __init__(self, log_bounds=False):
        self.log_bounds = log_bounds

    def pdf(self, z):
        out = np.multiply(z, z)
        out *= -0.5
        np.exp(out, out=out)
        out *= _INV_SQRT_2PI
        return out

    def score(self, z):
        return np.negative(z)

    def cdf(self, z):
        return ndtr(z)

    @staticmethod
    def log_tail(z, upper):
        """log S0(z) = log_ndtr(-z) or log F0(z) = log_ndtr(z) (scipy.special.log_ndtr)."""
        return log_ndtr(np.negative(z) if upper else z)

    def right(self, z):
        far = z > self.FAR
        r = self.pdf(z)
        r /= ndtr(np.negative(z))
        c = np.subtract(r, z)
        if far.any():
            zf = z[far]
            d = zf.copy()
            for k in range(self.LEVELS, 1, -1):
                d = zf + k / d
            cf = 1.0 / d
            c[far] = cf
            r[far] = zf + cf
        return r, c


_INV_SQRT_2PI = float(1.0 / np.sqrt(2.0 * np.pi))
#: the normal law on y (gaussian) and on log y (lognormal)
NORMAL = NormalLaw()
LOG_NORMAL = NormalLaw(log_bounds=True)


def _transformed(law, v):
    return np.log(v) if law.log_bounds else v


class _Rows:
    """The rows of a target by kind, with their bounds (transformed for the law), kept on the target."""

    def __init__(self, fam, target, law):
        has_lo, has_hi = open_sides(fam, target.lower, target.upper)
        ce = ~target.exact
        kinds = {"right": ce & has_lo & ~has_hi, "left": ce & ~has_lo & has_hi,
                 "closed": ce & has_lo & has_hi, "void": ce & ~has_lo & ~has_hi}
        self.idx = {k: np.flatnonzero(m) for k, m in kinds.items()}
        self.lo = {k: target.lower[self.idx[k]] for k in ("right", "closed")}
        self.hi = {k: target.upper[self.idx[k]] for k in ("left", "closed")}
        with np.errstate(divide="ignore"):
            self.t_lo = {k: _transformed(law, v) for k, v in self.lo.items()}
            self.t_hi = {k: _transformed(law, v) for k, v in self.hi.items()}
        # the exact kernel runs over all rows, on a stand-in y inside the target domain for the
        # censored rows (their values are then overwritten): no gather or scatter of exact rows
        fill = target.midpoint()
        dom = fam.target_domain
        bad = ce & ~np.asarray(dom.inside(fill), dtype=bool)
        if bad.any():
            ok = ~bad & np.asarray(dom.inside(fill), dtype=bool)
            fill = np.where(bad, fill[np.flatnonzero(ok)[0]], fill) if ok.any() else None
        self.fill = fill


def _rows_for(fam, target, law):
    cache = _cache(target)
    key = ("rows", type(fam), bool(law.log_bounds))
    rows = cache.get(key)
    if rows is None:
        rows = cache[key] = _Rows(fam, target, law)
    return rows


def _one_sided(law, s, t, raw, right):
    """(g, h, rows to redo in log space or None) of one-sided rows at transformed bounds t (TailLaw)."""
    z = np.subtract(t, raw)
    if s != 1.0:
        z /= s
    r, c = law.right(z) if right else law.left(z)
    redo = np.isnan(r) if law.defers else None
    g = np.negative(r) if right else r.copy()
    h = np.multiply(r, c, out=c)
    if s != 1.0:
        g /= s
        h /= s  # twice, not by s^2: s^2 may overflow or underflow where the quotient does not
        h /= s
    ok = h > 0
    if not ok.all():  # the surrogate g^2 (np.copyto: no boolean gather and scatter)
        np.copyto(h, g * g, where=~ok)
    return g, h, redo


def _closed(law, s, tl, th, raw):
    """(g, h, rows to redo in log space) of closed intervals (TailLaw)."""
    zl = np.subtract(tl, raw)
    zh = np.subtract(th, raw)
    if s != 1.0:
        zl /= s
        zh /= s
    if law.closed is not None:  # the law's own closed form, in z units
        g, h = law.closed(zl, zh)
        if s != 1.0:
            g /= s
            h /= s
            h /= s
        return g, h, None
    upper = zl + zh
    upper = upper > 2.0 * law.median
    t_lo, a, psi_lo = law.tail_pdf_score(zl, upper)
    t_hi, b_hi, psi_hi = law.tail_pdf_score(zh, upper)
    big = np.where(upper, t_lo, t_hi)
    p = np.where(upper, t_hi, t_lo)
    np.subtract(big, p, out=p)
    redo = ~((big >= TINY) & (p > 0))
    if s != 1.0:
        p *= s
    b = a  # f0(z_lo) / (s P)
    b /= p
    a = b_hi  # f0(z_hi) / (s P)
    a /= p
    g = a - b
    ea = psi_hi
    ea *= a
    eb = psi_lo
    eb *= b
    h = np.subtract(eb, ea, out=ea)  # (psi_lo b - psi_hi a), times 1 / s below
    if s != 1.0:
        h /= s
    size = np.abs(h)
    g2 = g * g
    h += g2
    size += g2
    size *= ROUNDING
    ok = h > size
    if not ok.all():
        np.copyto(h, g2, where=~ok)
    return g, h, redo


def censored_grad_hess(fam, target, raw):
    """Gradient and Hessian of the censored nll per row.  With a TailLaw (``fam._tail_law()``): the
    family's own kernel over all rows, then each kind of censored row by its own formulas
    (TailLaw), block by block (``BLOCK_ROWS`` rows stay in cache), the log-space terms only for
    rows those cannot serve.  Otherwise the log-space terms for every censored row."""
    law_s = fam._tail_law()
    if law_s is None:
        return _grad_hess_log_space(fam, target, raw)
    ex, ce, y_ex, lo, hi = _split(target)
    if not ce.size:
        return fam._grad_hess(target.lower, raw)
    law, s = law_s
    s = float(s)
    rows = _rows_for(fam, target, law)
    if rows.fill is None:
        g = np.empty(target.size)
        h = np.empty(target.size)
        if ex.size:
            g[ex], h[ex] = fam._grad_hess(y_ex, raw[ex])
    else:
        g, h = fam._grad_hess(rows.fill, raw)
    from ._base import BLOCK_ROWS
    with np.errstate(over="ignore", under="ignore", divide="ignore", invalid="ignore"):
        for kind in ("right", "left", "closed"):
            idx = rows.idx[kind]
            for start in range(0, idx.size, BLOCK_ROWS):
                blk = slice(start, start + BLOCK_ROWS)
                ib = idx[blk]
                rb = raw[ib]
                if kind == "closed":
                    gb, hb, redo = _closed(law, s, rows.t_lo[kind][blk], rows.t_hi[kind][blk], rb)
                elif kind == "right":
                    gb, hb, redo = _one_sided(law, s, rows.t_lo[kind][blk], rb, True)
                else:
                    gb, hb, redo = _one_sided(law, s, rows.t_hi[kind][blk], rb, False)
                lost = np.isnan(gb) | np.isnan(hb)  # a ratio of two underflowed tails: the log-space terms
                if lost.any():
                    redo = lost if redo is None else (redo | lost)
                if redo is not None and redo.any():
                    k = np.flatnonzero(redo)
                    lo_k = rows.lo[kind][blk][k] if kind != "left" else np.full(k.size, -np.inf)
                    hi_k = rows.hi[kind][blk][k] if kind != "right" else np.full(k.size, np.inf)
                    _, gb[k], hb[k] = interval_terms(fam, lo_k, hi_k, rb[k],
                                                     one_sided=lambda l, u, r: _near_side(fam, law, s, l, u, r))
                g[ib] = gb
                h[ib] = hb
        void = rows.idx["void"]
        if void.size:  # both sides open: P = 1, no information
            g[void] = 0.0
            h[void] = 0.0
    return g, h


def _grad_hess_log_space(fam, target, raw):
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
