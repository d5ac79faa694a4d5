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

Censored rows (lossfam.families._censored): the standard t law of z = (y - raw) / s, log tails
from scipy.stats.t.logcdf / logsf, score psi = -(nu+1) z / (nu + z^2).  The censored Hessian is
negative for some rows (the t density is not log-concave); there the surrogate g^2 is used.
The censored gradient and Hessian at an integer df (even up to 60, odd up to 9) use the t
cdf's finite sums in closed form instead of ``stdtr`` (EvenStudentTTails, OddStudentTTails).
"""
from __future__ import annotations

import functools
import math
from dataclasses import dataclass
from fractions import Fraction

import numpy as np
from scipy import optimize, stats
from scipy.special import expit, gammaln, stdtr

from .._checks import POSITIVE, REAL
from ..links import IDENTITY
from ._base import Family
from ._censored import ROUNDING, TailLaw, location_scale_pieces
from ._censored import horner as _horner, int_power as _int_power
from .laplace import weighted_quantile

#: range of the degrees of freedom searched when estimate_df=True
DF_RANGE = (0.05, 1e6)


#: beyond this |z| the censored pieces use the far-tail forms (_log_t_tail, _log1p_sq, _t_score)
_T_FAR = 1e8
#: beyond this |z|, z^2 is near overflow: log1p(z^2 / nu) and psi are written without z^2
_T_HUGE = 1e100


def _log1p_sq(z, nu):
    """log(1 + z^2 / nu), written 2 log|z| - log nu + log1p(nu / z^2) for |z| > 1e100 (z^2 may overflow)."""
    z = np.asarray(z, dtype=float)
    with np.errstate(over="ignore", divide="ignore"):
        a = np.abs(z)
        big = a > _T_HUGE
        safe = np.where(big, a, 1.0)
        return np.where(big, 2.0 * np.log(safe) - np.log(nu) + np.log1p(nu / (safe * safe)), np.log1p(z * z / nu))


def _t_score(z, nu):
    """psi(z) = -(nu + 1) z / (nu + z^2), written -(nu + 1) / (z + nu / z) for |z| > 1e100 (no inf / inf)."""
    z = np.asarray(z, dtype=float)
    big = np.abs(z) > _T_HUGE
    safe = np.where(big, z, 1.0)
    return np.where(big, -(nu + 1.0) / (safe + nu / safe), -(nu + 1.0) * z / (nu + z * z))


def _log_t_tail(z, nu):
    r"""log F0(z) of Student's t with nu df, by scipy.stats.t.logcdf for z >= -_T_FAR; below, where
    F0 underflows (scipy then returns -inf), from F0(z) = I_x(nu/2, 1/2) / 2 with x = nu / (nu + z^2)
    and I_x(a, b) = x^a (1 - x)^b 2F1(a + b, 1; a + 1; x) / (a B(a, b)) (the hypergeometric form
    of the incomplete beta function; scipy.special.hyp2f1, betaln), log x = log nu - log(nu + z^2)
    by ``_log1p_sq``: log F0 = -log 2 + a log x + b log1p(-x) + log 2F1 - log a - log B(a, b)."""
    from scipy.special import betaln, hyp2f1

    z = np.asarray(z, dtype=float)
    out = np.empty(z.shape)
    far = z < -_T_FAR
    near = ~far
    if near.any():
        out[near] = stats.t.logcdf(z[near], nu)
    if far.any():
        a, b = 0.5 * nu, 0.5
        log_x = -_log1p_sq(z[far], nu)
        x = np.exp(log_x)
        out[far] = (-np.log(2.0) + a * log_x + b * np.log1p(-x) + np.log(hyp2f1(a + b, 1.0, a + 1.0, x))
                    - np.log(a) - betaln(a, b))
    return out


def _log_norm(nu):
    """lgamma(nu/2) - lgamma((nu+1)/2) + log(nu pi)/2, the nll's constant.

    For nu >= 1e3 the lgamma difference cancels (1e-8 relative lost at nu = 1e8, all of it
    by 1e12, against mpmath at 80 digits); there the expansion
    log Gamma(x + 1/2) - log Gamma(x) = log(x)/2 - 1/(8x) + 1/(192 x^3) + O(x^-5) (recalled from
    memory; checked against mpmath) with x = nu/2 gives log(2 pi)/2 + 1/(4 nu) - 1/(24 nu^3).
    """
    if nu >= 1e3:
        inv = 1.0 / nu
        return 0.5 * np.log(2.0 * np.pi) + (0.25 * inv - inv * inv * inv / 24.0)
    return gammaln(0.5 * nu) - gammaln(0.5 * (nu + 1.0)) + 0.5 * np.log(nu * np.pi)


def _log_abs_diff(y, raw):
    """log|y - raw| without overflow (halved first where the difference exceeds float64)."""
    y, raw = np.broadcast_arrays(np.asarray(y, dtype=float), np.asarray(raw, dtype=float))
    with np.errstate(over="ignore", divide="ignore"):
        r = np.abs(y - raw)
        out = np.log(r)
        big = np.isinf(r)
        if np.any(big):
            out[big] = np.log(np.abs(0.5 * y[big] - 0.5 * raw[big])) + np.log(2.0)
    return out


def _log1p_u2(y, raw, nu, s):
    """log1p(u^2 / nu), u = (y - raw) / s, finite wherever u is (in log space where u^2 overflows)."""
    with np.errstate(over="ignore", under="ignore", invalid="ignore"):
        u = (y - raw) / s
        out = np.asarray(np.log1p(u * u / nu), dtype=float)
        far = ~np.isfinite(out)
        if np.any(far):
            x = 2.0 * (_log_abs_diff(y, raw)[far] - np.log(s)) - np.log(nu)  # log(u^2 / nu)
            out[far] = np.logaddexp(0.0, x)
    return out


class StudentTTails(TailLaw):
    """The standard t law with nu degrees of freedom in linear space, for the censored gradient
    and Hessian (lossfam.families._censored.TailLaw): cdf scipy.special.stdtr, the generic ratios
    f0 / S0; left(z) = right(-z)."""

    symmetric = True

    def __init__(self, nu):
        self.nu = float(nu)
        self.log_norm = float(_log_norm(self.nu))

    def pdf(self, z):
        nu = self.nu
        return np.exp(-0.5 * (nu + 1.0) * np.log1p(z * z / nu) - self.log_norm)

    def score(self, z):
        nu = self.nu
        return -(nu + 1.0) * z / (nu + z * z)

    def cdf(self, z):
        return stdtr(self.nu, z)

    def _hazard_curvature(self, z, w, r):
        """r + psi(z), psi = -(nu + 1) z w / nu the score (w = nu / (nu + z^2)), set to 0 where
        it is not above the rounding of its two terms (as the generic ratios do); ``w`` is
        overwritten."""
        psi = np.multiply(z, w, out=w)
        psi *= -(self.nu + 1.0) / self.nu
        ch = r + psi
        np.abs(psi, out=psi)
        psi += r
        psi *= ROUNDING
        np.copyto(ch, 0.0, where=~(ch > psi))
        return ch


#: the largest even df served in closed form (EvenStudentTTails; its cost grows with df / 2), and
#: the largest odd df (OddStudentTTails, whose direct form loses up to a factor 550 at df = 9)
INTEGER_DF_MAX = 60
ODD_DF_MAX = 9


class EvenStudentTTails(StudentTTails):
    r"""The standard t law at an even integer nu = 2m in closed form, with no special function
    (``stdtr`` costs about 240 ns a value).  With w = nu / (nu + z^2), c = sqrt(w) and
    s = |z| / sqrt(nu + z^2), so that s^2 = 1 - w:

        f0(z)   = K w^m c,                 K = Gamma(m + 1/2) / (Gamma(m) sqrt(nu pi))
        S0(|z|) = (1 - s P(w)) / 2,        P(w) = sum_{j<m} C(2j, j) (w / 4)^j

    (P(|T| <= |z|) = s P(w) at even nu: Abramowitz and Stegun, Handbook of Mathematical
    Functions, eq. 26.7.4, recalled from memory; checked against scipy.stats.t in the tests).
    1 - s P loses every digit in the far tail, where s P -> 1.  With 1 - s P =
    (1 - s^2 P^2) / (1 + s P), the numerator Q(w) = 1 - (1 - w) P(w)^2 is a polynomial whose
    terms below w^m cancel exactly (P is the series of (1 - w)^(-1/2) cut after w^(m-1), and
    (1 - w) (1 - w)^(-1) = 1), so Q = w^m R(w) with R of degree m - 1, its coefficients exact
    rationals computed once (all positive):

        S0(|z|) = w^m R(w) / (2 B),   B = 1 + s P(w)        (no cancellation anywhere)

    The hazard of a right-censored row (TailLaw.right) is then

        z >= 0:  r = f0 / S0 = 2 K c B / R(w)                 (no w^m: nothing underflows)
        z <  0:  r = K w^m c / (1 - S0(|z|))                  (S0(|z|) <= 1/2)

    and c = r + psi with psi = -(nu + 1) z w / nu; left(z) = right(-z).
    """

    defers = False

    def __init__(self, nu):
        super().__init__(nu)
        m = int(round(nu)) // 2
        self.m = m
        self.p_coef, self.r_coef = _even_t_polynomials(m)
        self.k = float(np.exp(-self.log_norm))
        self.root_nu = float(np.sqrt(nu))

    def _parts(self, z):
        """(c, w, w^m, B, R(w)) at z."""
        c, s, w = _angles(self.nu, self.root_nu, z)
        p = _horner(self.p_coef, w)
        p *= s
        p += 1.0
        return c, w, _int_power(w, self.m), p, _horner(self.r_coef, w)

    def pdf(self, z):
        c, w, wm, b, r = self._parts(z)
        return self.k * wm * c

    def cdf(self, z):
        c, w, wm, b, r = self._parts(z)
        t = wm * r / (2.0 * b)  # S0(|z|)
        return np.where(z <= 0, t, 1.0 - t)

    def tail_pdf(self, z, upper):
        return self.tail_pdf_score(z, upper)[:2]

    def tail_pdf_score(self, z, upper):
        # F0(z) = S0(|z|) for z <= 0, S0(z) = S0(|z|) for z >= 0; the other cases 1 - S0(|z|)
        c, w, wm, b, r = self._parts(z)
        r *= wm
        b *= 2.0
        r /= b  # S0(|z|)
        small = z <= 0
        small ^= upper  # where the tail asked for is S0(|z|) (both are 1/2 at z = 0)
        tail = np.subtract(1.0, r, out=b)
        np.copyto(tail, r, where=small)
        wm *= c
        wm *= self.k
        psi = np.multiply(z, w, out=w)
        psi *= -(self.nu + 1.0) / self.nu
        return tail, wm, psi

    def right(self, z):
        c, w, wm, b, rw = self._parts(z)
        b *= 2.0
        pos = b / rw  # 2 B / R
        neg = wm * rw  # w^m / (1 - w^m R / (2 B))
        neg /= b
        np.subtract(1.0, neg, out=neg)
        np.divide(wm, neg, out=neg)
        r = np.where(z >= 0, pos, neg)
        r *= c
        r *= self.k
        return r, self._hazard_curvature(z, w, r)


class OddStudentTTails(StudentTTails):
    r"""The standard t law at an odd integer nu = 2m + 1 with one arctangent and no incomplete
    beta function.  With w, c, s as in EvenStudentTTails and phi = atan2(sqrt(nu), |z|) (the
    angle whose sine is c and cosine is s):

        f0(z)       = K w^(m+1)
        pi S0(|z|)  = phi - s c sum_{j<m} b_j w^j,   b_j = (2 4 ... 2j) / (3 5 ... (2j+1))

    (Abramowitz and Stegun, Handbook of Mathematical Functions, eq. 26.7.3, recalled from memory;
    checked against scipy.stats.t in the tests).  The difference loses digits as S0 falls; but
    phi = s c sum_{j>=0} b_j w^j (the series of arcsin(c) / sqrt(1 - c^2), whose coefficients are
    the b_j), so where w <= 1/4 the same value is the tail of that series,

        pi S0(|z|) = s c w^m sum_{i<N} b_(m+i) w^i

    (all terms positive; cut at N = 28 terms, each at most w times the one before: 4^-28 < 2e-17).
    Where w > 1/4, i.e. |z| < sqrt(3 nu), S0 is above S0(sqrt(3 nu)) (0.17 at nu = 1, 3e-4 at
    nu = 9) and the difference loses at most a factor phi / (pi S0) <= 550 (1.2e-13) for
    nu <= 9; larger odd nu would need the series where it converges slowly (w near 1), so they
    keep scipy's ``stdtr`` (``ODD_DF_MAX``).
    The hazard at z >= 0 in the tail form is r = pi K c / (s sum), with no w^m; the rest as in
    EvenStudentTTails (z < 0: r = f0 / (1 - S0(|z|))).
    """

    defers = False
    W_TAIL = 0.25
    TERMS = 28

    def __init__(self, nu):
        super().__init__(nu)
        m = (int(round(nu)) - 1) // 2
        self.m = m
        b = [1.0]
        for j in range(1, m + self.TERMS):
            b.append(b[-1] * (2.0 * j) / (2.0 * j + 1.0))
        self.p_coef = tuple(b[:m]) if m else (0.0,)
        self.tail_coef = tuple(b[m:])
        self.k = float(np.exp(-self.log_norm))
        self.root_nu = float(np.sqrt(nu))

    def _parts(self, z):
        """(c, s, w, pi S0(|z|), tail rows or None, their s c sum)."""
        c, s, w = _angles(self.nu, self.root_nu, z)
        phi = np.arctan2(self.root_nu, np.abs(z))
        sc = s * c
        p = _horner(self.p_coef, w)
        p *= sc
        ps = np.subtract(phi, p, out=phi)  # pi S0, direct
        tail = w <= self.W_TAIL
        if tail.any():
            scs = sc[tail] * _horner(self.tail_coef, w[tail])  # s c sum: pi S0 = w^m scs
            ps[tail] = _int_power(w[tail], self.m) * scs if self.m else scs
            return c, s, w, ps, tail, scs
        return c, s, w, ps, None, None

    def pdf(self, z):
        c, s, w, ps, tail, scs = self._parts(z)
        return self.k * _int_power(w, self.m + 1)

    def cdf(self, z):
        c, s, w, ps, tail, scs = self._parts(z)
        ps /= np.pi
        return np.where(z <= 0, ps, 1.0 - ps)

    def tail_pdf(self, z, upper):
        u = np.where(upper, np.negative(z), z)
        c, s, w, ps, tail, scs = self._parts(u)
        ps /= np.pi  # S0(|u|)
        out = np.subtract(1.0, ps)
        np.copyto(out, ps, where=u <= 0)
        f = _int_power(w, self.m + 1)
        f *= self.k
        return out, f

    def right(self, z):
        c, s, w, ps, tail, scs = self._parts(z)
        f = _int_power(w, self.m + 1)
        f *= self.k
        ps *= 1.0 / np.pi  # S0(|z|)
        np.copyto(ps, 1.0 - ps, where=z < 0)
        r = np.divide(f, ps, out=f)
        if tail is not None:  # z >= 0 there: the form without w^m
            up = z[tail] >= 0
            if up.any():
                rt = (np.pi * self.k) * w[tail][up] / scs[up]  # scs = s c sum
                idx = np.flatnonzero(tail)[up]
                r[idx] = rt
        return r, self._hazard_curvature(z, w, r)


def _angles(nu, root_nu, z):
    """(c, s, w) = (sqrt(w), |z| / sqrt(nu + z^2), nu / (nu + z^2)) at z: from z^2 + nu (one
    square root, no hypot: ``np.hypot`` costs about 20 ns a value), or from
    hypot(sqrt(nu), z) where z^2 overflows (|z| > 1e154)."""
    a = np.abs(z)
    w = a * a
    w += nu
    if not np.isfinite(w.max(initial=0.0)):
        h = np.hypot(root_nu, a)
        np.divide(1.0, h, out=h)
        a *= h
        h *= root_nu
        return h, a, h * h
    np.divide(nu, w, out=w)
    c = np.sqrt(w)
    a *= c
    a *= 1.0 / root_nu
    return c, a, w


@functools.lru_cache(maxsize=None)
def _even_t_polynomials(m):
    """(P, R) of EvenStudentTTails at nu = 2m, coefficients lowest degree first, from exact
    rational arithmetic: P_j = C(2j, j) / 4^j (j < m) and R the quotient Q(w) / w^m."""
    a = [Fraction(math.comb(2 * j, j), 4 ** j) for j in range(m)]
    p2 = [Fraction(0)] * (2 * m - 1)
    for i in range(m):
        for j in range(m):
            p2[i + j] += a[i] * a[j]
    q = [Fraction(0)] * (2 * m)
    q[0] = Fraction(1)
    for i, v in enumerate(p2):  # Q = 1 - (1 - w) P^2
        q[i] -= v
        q[i + 1] += v
    if any(q[:m]) or not all(v > 0 for v in q[m:]):  # pragma: no cover - a property of the series
        raise AssertionError(f"student_t: the tail polynomial at df = {2 * m} is not w^m times a positive one")
    return tuple(float(v) for v in a), tuple(float(v) for v in q[m:])


@functools.lru_cache(maxsize=64)
def _tails_for(nu):
    if nu == round(nu) and 1 <= nu <= INTEGER_DF_MAX:
        if int(round(nu)) % 2 == 0:
            return EvenStudentTTails(nu)
        if nu <= ODD_DF_MAX:
            return OddStudentTTails(nu)
    return StudentTTails(nu)


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
    support_edges = (-np.inf, np.inf)
    censored_fit = ("scale",)

    def __post_init__(self):
        super().__post_init__()
        v = self.estimate_df
        # 0 and 1 as numbers are taken as False and True (a switch read back from JSON or a table)
        if not (isinstance(v, (bool, np.bool_)) or (isinstance(v, (int, float, np.integer, np.floating))
                                                     and v in (0, 1))):
            raise ValueError(f"student_t: parameter estimate_df must be True or False, got {v!r}")
        object.__setattr__(self, "estimate_df", bool(self.estimate_df))

    def _nll(self, y, raw):
        nu, s = self.df, self.scale
        with np.errstate(over="ignore"):  # (nu+1)/2 log1p(.) beyond float64: +inf, as it should
            return 0.5 * (nu + 1.0) * _log1p_u2(y, raw, nu, s) + (np.log(s) + _log_norm(nu))

    def _grad_hess(self, y, raw):
        nu, s = self.df, self.scale
        r = np.subtract(raw, y)
        nu_s2 = nu * s * s
        if not (1e-290 < nu_s2 < 1e290 and (nu + 1.0) / nu_s2 < 1e290):  # so that h below is finite
            return self._grad_hess_scaled(r)
        with np.errstate(over="ignore", invalid="ignore"):
            h = np.multiply(r, r)
            h += nu_s2
            np.divide(nu + 1.0, h, out=h)
            g = np.multiply(r, h)
        # with nu s^2 in range, only rows where r^2 overflowed (h = 0, g = 0 * inf) need care
        bad = h == 0
        if np.any(bad):
            g[bad], h[bad] = self._grad_hess_scaled(r[bad])
        return g, h

    def _grad_hess_scaled(self, r):
        """Gradient and Hessian surrogate with no overflow or underflow that the true values do
        not have.  With u = r / s (r = raw - y):

            |u| >= 1:  g = (nu+1) / (r + nu s / u),  h = g / r
                       (for nu >= 1 as ((nu+1)/nu) / (r / nu + s / u), so nu s cannot overflow)
            |u| <  1:  g = ((nu+1) / (nu + u^2)) (u / s),  h = ((nu+1) / (nu + u^2)) / s / s

        the same (nu+1) r / (nu s^2 + r^2) and (nu+1) / (nu s^2 + r^2), since s / u = s^2 / r.
        """
        nu, s = self.df, self.scale
        with np.errstate(over="ignore", under="ignore", invalid="ignore", divide="ignore"):
            u = r / s
            far = np.abs(u) >= 1.0
            s_u = np.where(far, s / np.where(far, u, 1.0), 0.0)
            if nu >= 1.0:
                g_far = ((nu + 1.0) / nu) / (r / nu + s_u)
            else:
                g_far = (nu + 1.0) / (r + nu * s_u)
            h_far = g_far / np.where(far, r, 1.0)
            ratio = (nu + 1.0) / (nu + u * u)
            g_near = np.where(u == 0, 0.0, ratio * (u / s))
            h_near = ratio / s / s
            return np.where(far, g_far, g_near), np.where(far, h_far, h_near)

    def _deviance(self, y, raw):
        nu, s = self.df, self.scale
        L = _log1p_u2(y, raw, nu, s)
        with np.errstate(over="ignore", under="ignore", divide="ignore", invalid="ignore"):
            out = np.asarray((nu + 1.0) * s * s * L, dtype=float)
            # where s^2 or the product left float64's normal range, or log1p lost u^2/nu to underflow:
            # exp(log(nu+1) + 2 log s + log L), or ((nu+1)/nu) r^2 log1p(x)/x for small x = u^2/nu
            redo = ~np.isfinite(out) | ~(out > 1e-290) | (not 1e-290 < s * s < 1e290)
            if np.any(redo):
                r = np.abs(np.broadcast_to(y - raw, out.shape)[redo])
                Lr = L[redo]
                x = (r / s) ** 2 / nu
                small = ~(Lr >= 1e-3)
                ratio = np.where(x > 0, Lr / np.where(x > 0, x, 1.0), 1.0)
                near = np.where(r == 0, 0.0, ((nu + 1.0) / nu) * (r * r) * ratio)
                logd = np.log(nu + 1.0) + 2.0 * np.log(s) + np.log(Lr)
                out[redo] = np.where(small, near, np.exp(logd))
        return out

    def _baseline(self, y, w, offset):
        # in halves: t = (y - offset) / 2 cannot overflow, and the EM weights only see (t - c) / s
        t = 0.5 * y if offset is None else 0.5 * y - 0.5 * offset
        nu, s = self.df, 0.5 * self.scale
        c = weighted_quantile(t, w, 0.5)
        size = max(0.5, float(np.max(np.abs(t))))
        used = w > 0
        t, lw = t[used], np.log(w[used])
        for _ in range(10000):
            # EM weights w (nu+1) / (nu s^2 + (t-c)^2), in logs and divided by their largest:
            # log w - log(nu + d^2), d = (t - c) / s
            log_d2 = 2.0 * (_log_abs_diff(t, c) - np.log(s))
            lh = lw - np.logaddexp(np.log(nu), log_d2)
            h = np.exp(lh - lh.max())
            new = float(np.dot(h / h.sum(), t))  # a convex combination of values below 9e307
            if abs(new - c) <= 1e-15 * size:
                return 2.0 * new
            c = new
        return 2.0 * c

    def _fit_scale(self, nu, log_r, w):
        """s^ from log|r| (-inf for zero residuals): the root in log s of

            mean_w (nu+1) u^2 / (nu + u^2) - 1 = mean_w (nu+1) expit(log(u^2 / nu)) - 1,
            log(u^2 / nu) = 2 (log|r| - log s) - log nu,

        a form that neither overflows nor divides inf by inf; it falls monotonically in log s
        from (nu+1) times the weight share of nonzero residuals, minus 1, to -1.
        """
        sw = w.sum()
        nonzero = np.isfinite(log_r)
        if not np.dot(w, nonzero) > sw * nu / (nu + 1.0):
            raise ValueError(
                "student_t: too many residuals are exactly zero, so the likelihood rises without bound "
                "as the scale shrinks (no maximum-likelihood scale)"
            )
        keep = nonzero & (w > 0)
        lr, wn = log_r[keep], w[keep] / sw
        log_nu = np.log(nu)

        def excess(log_s):
            return float(np.dot(wn, expit(2.0 * (lr - log_s) - log_nu))) * (nu + 1.0) - 1.0

        # at log s = max log|r| + log(nu+1)/2 + 1 each term is below (nu+1) e^-2 / (nu+1): negative
        hi = float(lr.max()) + 0.5 * np.log1p(nu) + 1.0
        lo, step = min(float(lr.min()) - 0.5 * log_nu - 1.0, hi - 1.0), 1.0
        while excess(lo) <= 0:
            lo, step = lo - step, 2.0 * step
            if step > 1e5:
                raise ValueError("student_t: no maximum-likelihood scale within float64's range "
                                 "(too few residuals other than zero)")
        log_s = optimize.brentq(excess, lo, hi, xtol=1e-14)
        with np.errstate(over="ignore", under="ignore"):
            scale = float(np.exp(log_s))
        if not 0.0 < scale < np.inf:
            raise ValueError(f"student_t: the maximum-likelihood scale e^{log_s:.6g} is outside float64's range")
        return scale

    def _fit_nuisance(self, y, raw, w):
        log_r = _log_abs_diff(y, raw)
        if not self.estimate_df:
            return {"scale": self._fit_scale(self.df, log_r, w)}
        sw = w.sum()
        used = w > 0

        def profile(log_nu):
            nu = float(np.exp(log_nu))
            s = self._fit_scale(nu, log_r, w)
            return float(np.dot(w[used], StudentT(df=nu, scale=s)._nll(y[used], raw[used])) / sw)

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
        return {"df": nu, "scale": self._fit_scale(nu, log_r, w)}

    def _tail_pieces(self, v, raw):
        nu, s = self.df, self.scale
        return location_scale_pieces(
            (v - raw) / s, s, lambda z: _log_t_tail(z, nu), lambda z: _log_t_tail(-z, nu),
            lambda z: -0.5 * (nu + 1.0) * _log1p_sq(z, nu) - _log_norm(nu),
            lambda z: _t_score(z, nu))

    def _tail_law(self):
        return _tails_for(float(self.df)), self.scale

    def _distribution(self, raw):
        return stats.t(df=self.df, loc=raw, scale=self.scale)
