r"""Negative binomial (NB2) counts whose dispersion varies with the features: raw scores (log mu, log alpha).

Raw scores r = (r0, r1): mean mu = e^{r0}, dispersion alpha = e^{r1} (log links), Var = mu +
alpha mu^2, size r = 1/alpha: the one-score ``negative_binomial`` family's law and alpha
convention, P(y) = Gamma(y + r) / (Gamma(r) y!) (r / (r + mu))^r (mu / (r + mu))^y.  With
t = r0 + r1 = log(alpha mu), q = expit(t) = alpha mu / (1 + alpha mu), L = log(1 + alpha mu),
D = digamma(y + r) - digamma(r) and T = trigamma(r) - trigamma(y + r):

    nll = -log C(y, r) + (y + r) L - y t        (the one-score family's form, per-row alpha)

    gradient   d/dr0 = (y + r) q - y = (mu - y) / (1 + alpha mu)
               d/dr1 = r (D - L) + d/dr0
               (dr/dr1 = -r, dt/dr1 = 1: -r [digamma(r) - digamma(y + r) + L] + (y + r) q - y)
    Hessian    d2/dr0^2   = (y + r) q (1 - q)
               d2/dr0 dr1 = -r q + (y + r) q (1 - q)
               d2/dr1^2   = -r (D - L) + r^2 T - 2 r q + (y + r) q (1 - q)
               (d(rD)/dr1 = -r D + r^2 T, d(rL)/dr1 = -r L + r q)
    Fisher     E[d2/dr0^2] = (mu + r) q (1 - q) = mu / (1 + alpha mu)
               E[d2/dr0 dr1] = -r q + mu / (1 + alpha mu) = 0   (r q = mu / (1 + alpha mu)):
               mean and dispersion are orthogonal, the matrix is diagonal and the natural
               gradient is g / diag(F).
               E[d2/dr1^2] = r^2 E[T(Y)] - mu / (1 + alpha mu)   (E[D] = L since the score has
               mean 0): no closed form.  Since r^2 T(y) = sum_{j<y} (1 + alpha j)^-2 and
               mu / (1 + alpha mu) = E[Y] / (1 + alpha mu), it is E[C(Y)] with
                   C(y) = sum_{j<y} c(j),
                   c(j) = (1 + alpha j)^-2 - (1 + alpha mu)^-1
                        = alpha (mu - 2 j - alpha j^2) / ((1 + alpha j)^2 (1 + alpha mu)),
               a sum of terms of order one (no difference of two sums of size mu, which would lose
               the digits of a result of order one at large means), tending to alpha^2 mu^2 / 2 as
               alpha -> 0 (the Poisson limit) and to r (r trigamma(r) - 1) as mu -> inf (the gamma
               law of the mixing mean).

How E[C(Y)] is computed (per row, vectorised over rows).  The mass outside the window
[lo, hi], lo = max(0, floor(mu - 10 sd)), hi = ceil(mu + 10 sd + 40 / log(1/q)) (sd^2 = mu (1 +
alpha mu); the upper tail falls at least like q^y times a power of y), is below ~e^-40 and is
left out.  Within the window:
  * rows with at most 4096 counts in the window: the exact sum over the law's mass,
    log P(y + 1) = log P(y) + log((y + r) / (y + 1)) + log q from log P(lo) = -nll(lo), and
    C(y + 1) = C(y) + c(y) from C(lo) = r^2 T(lo) - lo / (1 + alpha mu);
  * wider rows: the exact sum over the first 4096 counts, then over the rest the trapezoidal rule
    with an integer step h (1024 panels) and the Euler-Maclaurin terms of the difference between
    the integer sum and the h-trapezoid, extrapolated in h (Richardson, from the same nodes at
    step 2h) (``_wide_window``); the summand phi = P C is smooth there (it varies on the scale
    of the law's spread and of r + y).  This is a documented approximation: against the exact
    sum, measured 2e-8 relative at most on rows with windows of 1e4 to 6e5 counts (the tests
    check 1e-6).
  * where that step exceeds (a + r) / 4 (a the first count after the exact part: C varies on
    the scale r + y, so the trapezoid would step over its change; windows beyond ~4e6 counts
    at r of order one, e.g. mean 1e13, or alpha far above any fitted value): the mixing-law
    value q^2 r (r trigamma(r) - 1), which has the right limits for large means (mu -> inf: the
    gamma law of the mixing mean; r -> inf: q^2 / 2) but is not derived in between, and is only
    a positive, finite stand-in where the mean is small and alpha huge (mean 1, alpha 1e13: 1,
    where the information is far smaller): a rough value for extreme rows only.
    Cost: about 0.08 ms per narrow row (mean 20, alpha 1) and 2.5 ms per wide row (mean 200,
    alpha 1), measured on a shared, loaded machine: fine for the baseline and tests, heavy for
    an engine's every round on large data with wide laws (curvature "newton" asks for the
    Fisher entry only where the exact second derivative is not positive).
  * rows with mu >= 3e4 and r >= 1e4 (nearly normal laws; there the sums above lose digits to
    the cancellation of C(y), of size alpha y |mu - y| ~ q sd, in E[C(Y)] of order q^2): the
    expansion  E[C(Y)] = q^2 / 2 + q^2 (2q/3 - 1/2) / r + ...,  whose leading term is the
    information about log alpha of a normal law with the NB2 mean and variance,
    (d Var / d log alpha)^2 / (2 Var^2) = q^2 / 2, and whose 1/r term was matched to the known
    limits (q -> 1: r (r trigamma(r) - 1) = 1/2 + 1/(6r) + ...) and to the exact sum at q = 1/2,
    then checked against the exact sums at other rows (agreement 1e-10 to 1e-8 relative at
    mu in [3e4, 1e6], r in [1e4, 1e6], q from 1/4 to 0.99; in the nearly Poisson corner,
    q ~ 0.01, the two differ by ~1e-7 and the sum is itself losing digits there); a working
    expansion, not derived further here.
D and T: scipy's digamma / polygamma(1, .) for r < 20; for r >= 20 their asymptotic series in
differences, D = log1p(y/r) + d1/2 + d2/12 - d4/120 + d6/252 - d8/240 and
T = d1 + d2/2 + d3/6 - d5/30 + d7/42 - d9/30 with d_m = r^-m - (y + r)^-m = -r^-m expm1(-m
log1p(y/r)) (Abramowitz and Stegun, Handbook of Mathematical Functions, eqs. 6.3.18 and 6.4.12):
the plain differences lose digits when r >> y (small alpha).  Checked against mpmath.

Predictive law: the one-score family's NegativeBinomialLaw with one dispersion per row: its mass
is exp(-nll) of the same form, its tails and quantiles hold for every mean and size, and rows with
alpha (1 + mu) <= 1e-20 get the Poisson law (the switch and its justification: that class).
scipy.stats.nbinom(n = r, p) is not used: it forms p = 1 / (1 + alpha mu) and its logpmf and cdf
lose every digit once r ~ 1e13 (log alpha = -37, mean 5: -logpmf 18.6 against the nll's 1.69).

Newton's diagonal: the base rule (d2/dr1^2 is negative for some rows; then the Fisher entry).
Baseline: r0 = the one-score baseline (log of the weighted mean count: the r0-score of a constant
row, sum w (mu - y) / (1 + alpha mu), does not involve alpha's value in its root), r1 = log of
the one-score family's maximum-likelihood dispersion at that mean (ValueError, as there, when the
counts are not overdispersed).  With offsets, the generic search (BFGS) from there.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats
from scipy.special import digamma, expit, polygamma

from .._checks import NONNEGATIVE, NONNEGATIVE_INTEGER
from ..links import LOG
from ._several import SeveralScoreFamily
from .gamma_spread import _f
from .negative_binomial import NegativeBinomial, NegativeBinomialLaw, log_binomial_term, nll_at

#: windows with at most this many counts are summed exactly
_EXACT_TERMS = 4096
#: wider windows: counts summed exactly at the start, then trapezoid panels
_HEAD_TERMS = 4096
_PANELS = 1024
#: wide rows per block (their nodes take _WIDE_BLOCK * (_PANELS + 1) floats per array)
_WIDE_BLOCK = 256
#: (mean, size) from which the expansion for nearly normal laws is used (module docstring)
_NEAR_NORMAL = (3e4, 1e4)


def digamma_trigamma_differences(y, r):
    """(D, T) = (digamma(y + r) - digamma(r), trigamma(r) - trigamma(y + r)) for y >= 0, r > 0,
    without the cancellation of the plain differences when r >> y (module docstring)."""
    y, r = np.broadcast_arrays(np.asarray(y, dtype=float), np.asarray(r, dtype=float))
    big = r >= 20.0
    with np.errstate(over="ignore", invalid="ignore", divide="ignore", under="ignore"):
        rb = np.where(big, r, 20.0)
        lp = np.log1p(np.where(big, y, 0.0) / rb)

        def d(m):
            return -rb ** (-m) * np.expm1(-m * lp)

        d_big = lp + d(1) / 2 + d(2) / 12 - d(4) / 120 + d(6) / 252 - d(8) / 240
        t_big = d(1) + d(2) / 2 + d(3) / 6 - d(5) / 30 + d(7) / 42 - d(9) / 30
        rs = np.where(big, 1.0, r)
        ys = np.where(big, 0.0, y)
        d_small = digamma(ys + rs) - digamma(rs)
        t_small = polygamma(1, rs) - polygamma(1, ys + rs)
    return np.where(big, d_big, d_small), np.where(big, t_big, t_small)


@dataclass(frozen=True)
class NegativeBinomialSpread(SeveralScoreFamily):
    name = "negative_binomial_spread"
    score_names = ("log_mean", "log_dispersion")
    links = (LOG, LOG)
    target_domain = NONNEGATIVE
    nll_domain = NONNEGATIVE_INTEGER
    discrete = True
    prediction_kind = "mean"
    fisher_diagonal = True

    def constant_scale(self):
        return NegativeBinomial()

    def _nll(self, y, raw):
        r1 = raw[:, 1]
        t = raw[:, 0] + r1
        with np.errstate(over="ignore"):
            size = np.exp(-r1)
        return nll_at(y, t, size)

    def _pieces(self, y, raw):
        t = raw[:, 0] + raw[:, 1]
        with np.errstate(over="ignore"):
            r = np.exp(-raw[:, 1])
        q, q1 = expit(t), expit(-t)
        g0 = (y + r) * q - y
        h00 = (y + r) * q * q1
        return t, r, q, g0, h00

    def _gradient(self, y, raw):
        t, r, q, g0, _ = self._pieces(y, raw)
        D, _ = digamma_trigamma_differences(y, r)
        L = np.logaddexp(0.0, t)
        return np.column_stack([g0, r * (D - L) + g0])

    def _hessian(self, y, raw):
        t, r, q, g0, h00 = self._pieces(y, raw)
        D, T = digamma_trigamma_differences(y, r)
        L = np.logaddexp(0.0, t)
        h = np.empty((y.shape[0], 2, 2))
        h[:, 0, 0] = h00
        h[:, 0, 1] = h[:, 1, 0] = h00 - r * q
        h[:, 1, 1] = -r * (D - L) + r * r * T - 2.0 * r * q + h00
        return h

    def _fisher_diagonal(self, raw):
        t = raw[:, 0] + raw[:, 1]
        with np.errstate(over="ignore"):
            mu = np.exp(raw[:, 0])
            r = np.exp(-raw[:, 1])
        f00 = r * expit(t)  # mu / (1 + alpha mu)
        return np.column_stack([f00, _expected_c(self, raw)])

    def _start(self, y, w, offset):
        one = self.constant_scale()
        o0 = None if offset is None else offset[:, 0]
        try:
            c0 = one._baseline(y, w, o0)
            fitted = np.full(y.shape, c0) if o0 is None else c0 + o0
            alpha = one._fit_nuisance(y, fitted, w)["dispersion"]
        except ValueError as err:
            raise ValueError(f"{self.name}: {err}") from None
        log_alpha = np.log(alpha) if offset is None else np.log(alpha) - np.average(offset[:, 1], weights=w)
        return np.array([c0, log_alpha])

    def _baseline(self, y, w, offset):
        start = self._start(y, w, offset)
        if offset is None:
            return start
        return super()._baseline(y, w, offset)

    def _distribution(self, raw):
        # the one-score family's law with one dispersion per row (its mass from the same nll, its
        # tails and quantiles accurate at every size, the Poisson law where alpha is negligible)
        return NegativeBinomialLaw(raw[:, 0], log_dispersion=raw[:, 1])


def _c_at(y, raw):
    """C(y) = r^2 T(y) - y / (1 + alpha mu) (module docstring), directly."""
    r = np.exp(-raw[:, 1])
    _, T = digamma_trigamma_differences(y, r)
    return r * r * T - y * expit(-(raw[:, 0] + raw[:, 1]))


def _log_mass(fam, y, raw):
    return -fam._nll(y, raw)


def _expected_c(fam, raw):
    """E[C(Y)] per row under the row's law (module docstring: window, exact sum, trapezoid)."""
    n = raw.shape[0]
    r1 = raw[:, 1]
    t = raw[:, 0] + r1
    with np.errstate(over="ignore"):
        mu = np.exp(raw[:, 0])
        alpha = np.exp(r1)
        r = np.exp(-r1)
        sd = np.sqrt(mu * (1.0 + alpha * mu))
        decay = 1.0 / np.logaddexp(0.0, -t)  # 1 / log(1/q)
        lo = np.floor(np.maximum(0.0, mu - 10.0 * sd))
        hi = np.ceil(mu + 10.0 * sd + 40.0 * decay)
    width = hi - lo + 1.0
    out = np.empty(n)
    near_normal = (mu >= _NEAR_NORMAL[0]) & (r >= _NEAR_NORMAL[1])
    if np.any(near_normal):
        q = expit(t[near_normal])
        out[near_normal] = q * q * (0.5 + (2.0 * q / 3.0 - 0.5) / r[near_normal])
    narrow = (width <= _EXACT_TERMS) & ~near_normal
    if np.any(narrow):
        out[narrow] = _exact_window(fam, raw[narrow], lo[narrow], width[narrow].astype(np.int64))[0]
    wide = ~narrow & ~near_normal
    if np.any(wide):
        out[wide] = _wide_window(fam, raw[wide], lo[wide], hi[wide])
    return out


def _exact_window(fam, raw, lo, terms):
    """(sum_{y=lo}^{lo+terms-1} P(y) C(y), and phi at the last two counts) per row, by the
    recursions of the module docstring, over rows sorted by their number of terms."""
    order = np.argsort(-terms, kind="stable")
    raw, lo, terms = raw[order], lo[order], terms[order]
    alpha = np.exp(raw[:, 1])
    r = np.exp(-raw[:, 1])
    t = raw[:, 0] + raw[:, 1]
    log_q = -np.logaddexp(0.0, -t)
    am1 = 1.0 + np.exp(t)  # 1 + alpha mu
    mu = np.exp(raw[:, 0])
    y = lo.copy()
    log_p = _log_mass(fam, y, raw)
    u = _c_at(y, raw)
    phi = np.exp(log_p) * u
    acc = phi.copy()
    prev = np.zeros_like(phi)
    active = terms.shape[0]
    for k in range(1, int(terms.max())):
        while active and terms[active - 1] <= k:
            active -= 1
        if not active:
            break
        s = slice(0, active)
        ys, a_s = y[s], alpha[s]
        ay1 = 1.0 + a_s * ys
        u[s] += a_s * (mu[s] - 2.0 * ys - a_s * ys * ys) / (ay1 * ay1 * am1[s])
        log_p[s] += np.log((y[s] + r[s]) / (y[s] + 1.0)) + log_q[s]
        y[s] += 1.0
        prev[s] = phi[s]
        phi[s] = np.exp(log_p[s]) * u[s]
        acc[s] += phi[s]
    back = np.empty_like(order)
    back[order] = np.arange(order.shape[0])
    return acc[back], prev[back], phi[back]


def _wide_window(fam, raw, lo, hi):
    """Exact sum over the first _HEAD_TERMS counts, then the h-trapezoid with Euler-Maclaurin
    endpoint terms over [a, b] (a = lo + _HEAD_TERMS - 1, b = a + _PANELS h >= hi):

        sum_{y=a}^{b} phi(y) = T_h + (phi(a) + phi(b)) / 2 - (h^2 - 1) (phi'(b) - phi'(a)) / 12
                               + O(h^4 phi^(3))

    (the Euler-Maclaurin expansions of the integer sum and of the h-trapezoid share the integral),
    extrapolated in h against the same nodes at step 2h (Richardson); phi(b) and phi'(b) are
    negligible at the window's end, phi'(a) is the central difference of the exact terms around a.
    Rows whose step h exceeds (a + r) / 4 (the scale on which C varies near a) get the mixing-law
    value q^2 r (r trigamma(r) - 1) instead (module docstring)."""
    n = raw.shape[0]
    head, before, at_a = _exact_window(fam, raw, lo, np.full(n, _HEAD_TERMS, dtype=np.int64))
    a = lo + _HEAD_TERMS - 1.0
    h = np.ceil((hi - a) / _PANELS)
    after = np.exp(_log_mass(fam, a + 1.0, raw)) * _c_at(a + 1.0, raw)
    dphi_a = 0.5 * (after - before)
    tail = np.empty(n)
    steps = np.arange(_PANELS + 1)[None, :]
    for start in range(0, n, _WIDE_BLOCK):  # (rows x panels) nodes at a time
        s = slice(start, start + _WIDE_BLOCK)
        m = raw[s].shape[0]
        yy = (a[s, None] + h[s, None] * steps).ravel()
        rep = np.repeat(raw[s], _PANELS + 1, axis=0)
        phi = (np.exp(_log_mass(fam, yy, rep)) * _c_at(yy, rep)).reshape(m, _PANELS + 1)
        ends = 0.5 * (phi[:, 0] + phi[:, -1])
        hs = h[s]
        fine = hs * (phi.sum(axis=1) - ends) + ends + (hs * hs - 1.0) * dphi_a[s] / 12.0
        h2 = 2.0 * hs  # every other node: the same sum with step 2h
        coarse = h2 * (phi[:, ::2].sum(axis=1) - ends) + ends + (h2 * h2 - 1.0) * dphi_a[s] / 12.0
        tail[s] = (16.0 * fine - coarse) / 15.0  # Richardson: the h^4 terms cancel
    out = head - at_a + tail
    r = np.exp(-raw[:, 1])
    coarse_rows = h > (a + r) / 4.0
    if np.any(coarse_rows):
        q = expit(raw[coarse_rows, 0] + raw[coarse_rows, 1])
        rr = r[coarse_rows]
        out[coarse_rows] = q * q * _f(rr)
    return out
