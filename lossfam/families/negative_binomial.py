r"""Negative binomial counts (NB2): overdispersed counts, Var = mu + alpha mu^2.

With mean mu = e^raw (log link), dispersion alpha > 0, size r = 1/alpha and
y = 0, 1, 2, ... (the Poisson-gamma mixture: a Poisson count whose mean is
mu times a gamma(r, 1/r) frailty):

    P(y) = Gamma(y + r) / (Gamma(r) y!) (r / (r + mu))^r (mu / (r + mu))^y

Since mu / (r + mu) = alpha mu / (1 + alpha mu) and r / (r + mu) = 1 / (1 + alpha mu),

    nll      = -log C(y, r) + (y + r) log(1 + alpha e^raw) - y (raw + log alpha)
               log C(y, r) = lgamma(y + r) - lgamma(r) - lgamma(y + 1)
                           = -log y - betaln(y, r) for y > 0, 0 for y = 0
               (betaln keeps full accuracy when r >> y, where the lgamma difference cancels;
               log(1 + alpha e^raw) = logaddexp(0, raw + log alpha) never overflows)
    gradient = (y + r) q - y = (mu - y) / (1 + alpha mu),   q = expit(raw + log alpha)
    Hessian  = (y + r) q (1 - q) = mu (1 + alpha y) / (1 + alpha mu)^2     (exact; > 0)
    deviance = 2 (y log(y / mu) - (y + r) log((1 + alpha y) / (1 + alpha mu)))
               (2 r log(1 + alpha mu) at y = 0)
    baseline = log(sum w y / sum w) without an offset (the gradient of a constant
               model is (sum w (mu - y)) / (1 + alpha mu)); with an offset, the root of
               sum w (mu_i - y_i) / (1 + alpha mu_i) (increasing in the constant; brentq on
               asinh of the constant, bracketed from above at max(log y_i - offset_i) over rows
               with y > 0)
    alpha^   = root in log alpha of the score (d nll / d alpha, weighted sum)
               S(alpha) = sum w [(digamma(y + r) - digamma(r) - log(1 + alpha mu)) / alpha^2
                                 + (mu - y) / (alpha (1 + alpha mu))]
               found by scipy.optimize.brentq.  When the counts are not overdispersed
               (S > 0 at alpha -> 0), the likelihood rises towards the Poisson limit
               alpha = 0 and no maximum-likelihood alpha exists: ValueError.  The search
               stops at alpha = 1e-6: below it the digamma difference loses its digits to
               cancellation, and such counts are Poisson for every practical purpose.

The nll needs integer counts; gradient, Hessian, deviance and baseline accept any y >= 0.
As alpha -> 0 the law tends to the Poisson (tested), and alpha -> inf to a mass at 0.
The predictive law is :class:`NegativeBinomialLaw`: scipy.stats.nbinom(n = r, p = 1 / (1 + alpha mu))
for the mass function and moments, with tail probabilities and quantiles of its own that
return for every mean (scipy's nbinom.ppf can run without end, see the class).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import optimize, stats
from scipy import special
from scipy.optimize import elementwise
from scipy.special import betaln, digamma, expit

from .._checks import NONNEGATIVE, NONNEGATIVE_INTEGER, POSITIVE
from ..links import LOG
from ._base import Family, by_row_blocks


#: the dispersion search stops here (see the module docstring)
_LOG_ALPHA_MIN = float(np.log(1e-6))
#: integers above this are not all distinct in float64
_EXACT_INTEGERS = 2.0**53
_LOG_MAX = float(np.log(np.finfo(float).max))


def log_binomial_term(y, size):
    """log Gamma(y + r) / (Gamma(r) Gamma(y + 1)) without cancellation (0 at y = 0).

    -log y - log B(y, r).  scipy's betaln returns NaN when both arguments are huge (y >= 1e80
    at r = 1e300); there, with a = min(y, r) and b = max(y, r) >= 1e15, Stirling's series in
    differences gives log B(a, b) = lgamma(a) - a log b - (a + b - 1/2) log1p(a/b) + a + O(1/b).
    """
    pos = y > 0
    safe = np.where(pos, y, 1.0)
    with np.errstate(invalid="ignore"):
        lb = betaln(safe, size)
    bad = ~np.isfinite(lb)
    if np.any(bad):
        a, b = np.minimum(safe, size)[bad], np.maximum(safe, size)[bad]
        lb[bad] = special.gammaln(a) - a * np.log(b) - (a + b - 0.5) * np.log1p(a / b) + a
    return np.where(pos, -np.log(safe) - lb, 0.0)


def nll_at(y, t, size):
    """The nll at t = log(alpha mu) and size r = 1/alpha (scalars or arrays, broadcast):
    (y + r) log(1 + e^t) - y t - log C(y, r) = y log(1 + e^-t) + r log(1 + e^t) - log C(y, r),
    two terms >= 0 (no inf - inf)."""
    return -log_binomial_term(y, size) + y * np.logaddexp(0.0, -t) + np.logaddexp(0.0, t) * size


#: rows with alpha (1 + mu) at most this follow the Poisson law (NegativeBinomialLaw docstring)
POISSON_SWITCH = 1e-20


@dataclass(frozen=True)
class NegativeBinomial(Family):
    dispersion: float = 1.0

    name = "negative_binomial"
    link_function = LOG
    target_domain = NONNEGATIVE
    nll_domain = NONNEGATIVE_INTEGER
    param_domains = {"dispersion": POSITIVE}
    discrete = True
    location_needs_nuisance = True

    def _nll(self, y, raw):
        alpha = self.dispersion
        return nll_at(y, raw + np.log(alpha), 1.0 / alpha)

    def _grad_hess(self, y, raw):
        g, h = by_row_blocks(self._fill_grad_hess, (y, raw), n_out=2, n_scratch=1)
        return g, h

    def _fill_grad_hess(self, y, raw, q, h, yr):
        """Gradient into q and Hessian into h for one block of rows (yr: work array)."""
        alpha = self.dispersion
        np.add(raw, np.log(alpha), out=q)
        np.negative(q, out=h)
        expit(q, out=q)
        expit(h, out=h)  # 1 - q without cancellation
        np.add(y, 1.0 / alpha, out=yr)
        h *= q
        h *= yr
        q *= yr
        q -= y

    def _deviance(self, y, raw):
        alpha = self.dispersion
        r = 1.0 / alpha
        pos = y > 0
        ys = np.where(pos, y, 1.0)
        soft_mu = np.logaddexp(0.0, raw + np.log(alpha))  # log(1 + alpha mu)
        gap = np.log1p(alpha * y) - soft_mu
        # y (log y - raw - gap) - r gap: the logs are differenced before multiplying by y (no inf - inf)
        dev = y * (np.where(pos, np.log(ys) - raw, 0.0) - gap) - r * gap
        return np.maximum(2.0 * dev, 0.0)

    def _baseline(self, y, w, offset):
        pos = (y > 0) & (w > 0)
        if not np.any(pos):
            raise ValueError("negative_binomial: every row with positive weight has count 0, "
                             "so the best constant raw score is -inf")
        if offset is None:  # log(sum w y / sum w), as log-sum-exps: no overflow
            return float(special.logsumexp(np.log(y[pos]) + np.log(w[pos])) - special.logsumexp(np.log(w[w > 0])))

        def score(u):  # in u = asinh(c): brackets as wide as float64 take ~60 halvings, not ~1000
            return float(np.dot(w, self._grad_hess(y, np.sinh(u) + offset)[0]))

        # at c = max over rows with y > 0 of log y - offset (+1) every such row has mu >= y, so the
        # score is >= 0; below, the bracket widens by doubling steps (in u) until the score is
        # negative (it tends to -sum w y / sum w as c -> -inf)
        hi = float(np.arcsinh(np.max(np.log(y[pos]) - offset[pos]) + 1.0))
        lo, step = hi - 1.0, 1.0
        while score(lo) > 0:
            if lo <= -710.0:  # asinh(-1.8e308): the root lies below float64's range
                raise ValueError("negative_binomial: no finite constant raw score sets the summed gradient "
                                 "to zero with these offsets")
            lo, step = max(lo - step, -710.0), 2.0 * step
        return float(np.sinh(optimize.brentq(score, lo, hi, xtol=1e-15, maxiter=2000)))

    def _fit_nuisance(self, y, raw, w):
        used = w > 0  # the weights arrive rescaled; a subnormal one may be 0 now, and 0 * inf is NaN
        y, raw, w = y[used], raw[used], w[used]
        mu = np.exp(raw)
        sw = w.sum()

        def score(log_alpha):
            alpha = np.exp(log_alpha)
            r = 1.0 / alpha
            l1p = np.logaddexp(0.0, raw + log_alpha)
            with np.errstate(invalid="ignore"):  # mu = inf (raw > 709): the term's limit is 1 / alpha^2
                t = (mu - y) / (alpha * (1.0 + alpha * mu))
            t = np.where(np.isinf(mu), 1.0 / alpha**2, t)
            s = (digamma(y + r) - digamma(r) - l1p) / alpha**2 + t
            return float(np.dot(w, s) / sw)

        # moment estimate: sum (y - mu)^2 - y = alpha sum mu^2 (common practice as a start)
        with np.errstate(invalid="ignore", divide="ignore"):  # inf / inf when mu^2 overflows: no estimate
            excess = float(np.dot(w, (y - mu) ** 2 - y) / np.dot(w, mu * mu))
        start = max(np.log(excess) if 0 < excess < np.inf else np.log(1e-3), _LOG_ALPHA_MIN + 1.0)
        lo, hi = start - 1.0, start + 1.0
        while score(lo) > 0:
            if lo <= _LOG_ALPHA_MIN:
                raise ValueError(
                    "negative_binomial: the counts are not overdispersed about the predicted means "
                    "(the likelihood rises towards the Poisson limit: any maximum lies below dispersion = "
                    "1e-6), so there is no useful maximum-likelihood dispersion; use the poisson family"
                )
            lo = max(lo - 2.0, _LOG_ALPHA_MIN)
        while score(hi) < 0:
            hi += 2.0
            if hi > 60.0:
                raise ValueError("negative_binomial: the likelihood keeps rising as the dispersion grows; "
                                 "no maximum-likelihood dispersion")
        return {"dispersion": float(np.exp(optimize.brentq(score, lo, hi, xtol=1e-14)))}

    def _distribution(self, raw):
        return NegativeBinomialLaw(raw, self.dispersion)


def _log_beta(a, b):
    """log B(a, b) for a > 0 and an array b >= 1.

    lgamma(a) - log poch(b, a) (poch(b, a) = Gamma(b + a) / Gamma(b)) where that is finite:
    scipy's betaln loses ~1e-10 absolute to cancellation at a = 1e-3, b = 1e5 (against mpmath);
    else betaln, and lgamma(a) + lgamma(b) - lgamma(a + b) where betaln is not finite (it
    returns -inf at a = 1e100, b = 2e78).
    """
    with np.errstate(over="ignore", divide="ignore", invalid="ignore"):
        poch = special.poch(b, a)
        out = np.where(np.isfinite(poch) & (poch > 0), special.gammaln(a) - np.log(poch), special.betaln(a, b))
        return np.where(np.isfinite(out), out, special.gammaln(a) + special.gammaln(b) - special.gammaln(a + b))


def _tails(b, size, t):
    """(I_p(r, b), 1 - I_p(r, b)) for real b >= 1: P(Y <= b - 1) and P(Y >= b), p = 1 / (1 + e^t),
    t = log(alpha mu); NaN where none of the forms of :class:`NegativeBinomialLaw` holds."""
    b, t, r = np.broadcast_arrays(np.asarray(b, dtype=float), np.asarray(t, dtype=float),
                                  np.asarray(size, dtype=float))
    with np.errstate(over="ignore", under="ignore", divide="ignore", invalid="ignore"):
        log_p = -np.logaddexp(0.0, t)
        log_1mp = -np.logaddexp(0.0, -t)
        small_p = t > 0.0
        # the argument below 1/2 given to scipy: I_p(r, b) = 1 - I_(1-p)(b, r)
        lo_p = np.asarray(special.betainc(r, b, np.exp(log_p)), dtype=float)
        up_p = np.asarray(special.betaincc(r, b, np.exp(log_p)), dtype=float)
        up_q = np.asarray(special.betainc(b, r, np.exp(log_1mp)), dtype=float)
        lo_q = np.asarray(special.betaincc(b, r, np.exp(log_1mp)), dtype=float)
        lower = np.where(small_p, lo_p, lo_q)
        upper = np.where(small_p, up_p, up_q)
        # p below ~1e-300 (subnormal or 0): the leading term of the series in p
        tiny = (t > 700.0) & ((r + b) * np.exp(-t) < 1e-17)
        if np.any(tiny):
            rt = r[tiny]
            log_lower = rt * log_p[tiny] - np.log(rt) - _log_beta(rt, b[tiny])
            lower[tiny] = np.exp(log_lower)
            upper[tiny] = -np.expm1(log_lower)
        far = (b >= 1e20 * np.maximum(1.0, r)) & (~(np.isfinite(lower) & np.isfinite(upper)) | ((t > 700.0) & ~tiny))
        if np.any(far):
            x = np.exp(np.log(b[far]) - t[far])  # b s, s = p / (1 - p) = 1 / (alpha mu)
            lower[far] = special.gammainc(r[far], x)
            upper[far] = special.gammaincc(r[far], x)
    return lower, upper


def _gap(b, size, t, lower_q, upper_q, from_upper):
    """Increasing in b, >= 0 exactly where P(Y <= b - 1) >= lower_q (= 1 - upper_q), read on the
    tail that is below 1/2 there so that no probability near 1 is compared."""
    lower, upper = _tails(b, size, t)
    return np.where(from_upper, upper_q - upper, lower - lower_q)


class NegativeBinomialLaw:
    r"""The NB2 law per row (scipy.stats.nbinom(n = r, p = 1 / (1 + alpha mu))), with tail
    probabilities and quantiles that return, accurately, for every legal mean and size.

    Why not scipy's own: scipy.stats.nbinom.ppf (scipy 1.17, measured) runs without end for
    means from about 1e150, and already at mean 1e18 for size 1e6 at q = 0.5 or for q = 1 - 1e-10;
    its cdf and sf return NaN for counts from about 1e150.

    Tails.  With r = 1/alpha and p = 1/(1 + alpha mu), P(Y <= k) = I_p(r, k + 1), the regularised
    incomplete beta function, and P(Y > k) = 1 - I_p(r, k + 1) (the identity behind scipy's nbinom
    cdf), computed in one of three forms:

    * scipy.special.betainc / betaincc, given the smaller of p and 1 - p (I_p(r, b) =
      1 - I_(1-p)(b, r)), each formed as exp(-log(1 + e^(+-t))), t = log(alpha mu), so that
      neither rounds to 1 (scipy's nbinom forms 1 - p and loses digits when alpha mu is small);
    * where p < e^-700 (subnormal or 0) and (r + b) p < 1e-17, the leading term of the series
      I_p(r, b) = p^r (1 - p)^b / (r B(r, b)) [1 + O((r + b) p)] (Abramowitz and Stegun,
      Handbook of Mathematical Functions, eq. 26.5.4, the hypergeometric series of I_x(a, b),
      recalled from memory), in log space: log I = r log p - log r - log B(r, b);
    * where scipy returns NaN (measured, scipy 1.17: for b = k + 1 from about 1e150 at r = 4
      near the median) or p has underflowed, and b >= 1e20 max(1, r), the gamma limit: with
      X ~ Gamma(r), T ~ Gamma(b) independent, X / (X + T) ~ Beta(r, b), so

          I_p(r, b) = P(X <= T s) = E G_r(T s),   s = p / (1 - p) = 1 / (alpha mu),

      G_r the gamma(r) cdf.  Expanding around T = b (E T = b, Var T = b) the first-order term
      vanishes and the second is (1 / 2b) x g_r(x) (r - 1 - x) at x = b s, g_r the density: of
      order max(1, r) / b.  So I_p(r, b) = gammainc(r, b s), complement gammaincc(r, b s), to
      the accuracy of scipy's gammainc (tested against betainc where both return).

    Where none holds (scipy fails with b not far above r; seen only for r >= 1e20, i.e.
    dispersion <= 1e-20, far below any fitted one), tails and quantiles raise ValueError naming
    the rows.

    The Poisson rows.  The dispersion may be one number or one per row (broadcast against raw;
    ``negative_binomial_spread``).  Rows with alpha (1 + mu) <= ``POISSON_SWITCH`` = 1e-20
    (alpha that underflowed to 0 included) are given the Poisson(mu) law (scipy.stats.poisson).
    Why there: from P(y) = mu^y / y! prod_{j<y} (1 + alpha j) (1 + alpha mu)^-(r + y),

        log P_NB(y) - log P_Poisson(y) = sum_{j<y} log1p(alpha j) - (r + y) log1p(alpha mu) + mu
                                       = alpha ((y - mu)^2 - y) / 2 + O(alpha^2 (y + mu)^3),

    the higher terms smaller by factors alpha (y + mu) (below 1e-16 here).  On every count with
    (y - mu)^2 + y <= 1e4 (1 + mu) (about 100 standard deviations either side of the mean; the
    Poisson mass beyond is far below any probability float64 can add to 1) this is at most
    1e4 alpha (1 + mu) / 2 <= 5e-17, under half a unit in the last
    place of float64 (1.1e-16): the two laws give the same numbers.  The switch also covers
    alpha = 0 after underflow (log alpha below -745, r = inf), where the negative binomial forms
    are inf - inf.  Where alpha (1 + mu) is above it, the forms above apply.

    Quantiles.  ppf(q) is the smallest integer k >= 0 with P(Y <= k) >= q (scipy's convention
    for discrete laws: -1 at q = 0, inf at q = 1); isf(q) the smallest with P(Y > k) <= q.  The
    continuous root b* of I_p(r, b) = q is bracketed (b = 1 below, a bracket doubled in log b
    above) and found by scipy.optimize.elementwise.find_root, first in log b and then in b; then
    k = ceil(b*) - 1 is checked against its integer neighbours (above 2**53, where float64 has no
    neighbouring integers, against the neighbouring floats: k is then the smallest float with
    P(Y <= k) >= q).  A quantile beyond the largest float
    (mu near overflow) is inf.
    """

    def __init__(self, raw, dispersion=None, *, log_dispersion=None):
        """``dispersion`` (one number or one per row), or its log ``log_dispersion`` (then the size
        and log(alpha mu) are formed as a family with a log-dispersion raw score forms them)."""
        if (dispersion is None) == (log_dispersion is None):
            raise TypeError("NegativeBinomialLaw: give dispersion or log_dispersion")
        self.raw = np.asarray(raw, dtype=float)
        with np.errstate(over="ignore", under="ignore", divide="ignore"):
            if log_dispersion is None:
                d = np.asarray(dispersion, dtype=float)
                self.dispersion = float(d) if d.ndim == 0 else d  # one number, or one per row
                log_d = np.log(self.dispersion)
                self.size = 1.0 / self.dispersion
            else:
                log_d = np.asarray(log_dispersion, dtype=float)
                self.dispersion = np.exp(log_d)
                self.size = np.exp(-log_d)
            self._t = self.raw + log_d  # log(alpha mu)
            self.mu = np.exp(self.raw)
            self.p = np.exp(-np.logaddexp(0.0, self._t))  # 1 / (1 + alpha mu), subnormal rather than 0
            # alpha (1 + mu) <= POISSON_SWITCH, in logs (class docstring)
            pois = log_d + np.logaddexp(0.0, self.raw) <= np.log(POISSON_SWITCH)
        self._poisson = pois if np.any(pois) else None

    def _split(self, method, x):
        """``method`` at x, row by row: the Poisson law on the Poisson rows, this law elsewhere."""
        x, raw, log_d, pois = np.broadcast_arrays(np.asarray(x, dtype=float), self.raw, self._t - self.raw,
                                                  self._poisson)
        out = np.empty(x.shape)
        nb = ~pois
        if np.any(nb):
            out[nb] = getattr(NegativeBinomialLaw(raw[nb], log_dispersion=log_d[nb]), method)(x[nb])
        with np.errstate(over="ignore"):
            out[pois] = getattr(stats.poisson(np.exp(raw[pois])), method)(x[pois])
        return out[()]

    # ------------------------------------------------------------------ mass and moments
    def logpmf(self, k):
        """log P(Y = k) = -nll: the family's cancellation-free form (scipy's forms 1 - p, which
        loses digits when alpha mu is small); -inf off the non-negative integers."""
        if self._poisson is not None:
            return self._split("logpmf", k)
        k, t, size = np.broadcast_arrays(np.asarray(k, dtype=float), self._t, self.size)
        ok = (k >= 0) & (np.floor(k) == k)
        out = np.full(k.shape, -np.inf)
        with np.errstate(over="ignore", invalid="ignore"):
            out[ok] = -nll_at(k[ok], t[ok], size[ok])
        out[np.isnan(k)] = np.nan
        return out[()]

    def pmf(self, k):
        return np.exp(self.logpmf(k))

    def mean(self):
        return self.mu.copy()

    def var(self):
        with np.errstate(over="ignore"):
            return self.mu + self.dispersion * self.mu * self.mu

    def std(self):
        return np.sqrt(self.var())

    def rvs(self, size=None, random_state=None):
        """Draws as a Poisson count with gamma-distributed mean (numpy refuses means above ~1e19
        with a ValueError; its own negative_binomial would return an overflowed integer)."""
        rng = random_state if isinstance(random_state, np.random.Generator) else np.random.default_rng(random_state)
        shape = self.mu.shape if size is None else size
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            r, mu = np.broadcast_arrays(np.broadcast_to(self.size, shape), np.broadcast_to(self.mu, shape))
            pois = r == np.inf  # alpha = 0 after underflow: no frailty
            lam = np.where(pois, mu, rng.gamma(np.where(pois, 1.0, r), np.where(pois, 1.0, mu / r)))
        return rng.poisson(lam).astype(float)

    # ------------------------------------------------------------------ tails
    def _refuse(self, bad, what):
        rows = np.flatnonzero(bad)
        d = np.broadcast_to(self.dispersion, bad.shape)[bad] if np.ndim(self.dispersion) else self.dispersion
        at = f"{self.dispersion:g}" if np.ndim(d) == 0 else f"e.g. {np.unique(d)[:3].tolist()}"
        raise ValueError(
            f"negative_binomial: the law's {what} cannot be computed at dispersion {at} for "
            f"{rows.size} row(s), e.g. rows {rows[:5].tolist()}: scipy's incomplete beta function fails there "
            "and its gamma limit needs counts far above 1 / dispersion")

    def _both(self, k):
        if self._poisson is not None:
            return self._split("cdf", k), self._split("sf", k)
        k = np.floor(np.asarray(k, dtype=float))
        b = np.where(k < 0, 1.0, k + 1.0)
        lower, upper = _tails(b, self.size, self._t)
        neg = np.broadcast_to(k < 0, lower.shape)
        bad = np.isnan(lower) & ~np.isnan(np.broadcast_to(k, lower.shape))
        if np.any(bad):
            self._refuse(bad, "tail probabilities")
        return np.where(neg, 0.0, lower), np.where(neg, 1.0, upper)

    def cdf(self, k):
        return self._both(k)[0]

    def sf(self, k):
        return self._both(k)[1]

    def logcdf(self, k):
        lower, upper = self._both(k)
        with np.errstate(divide="ignore"):
            return np.where(lower < 0.5, np.log(lower), np.log1p(-upper))

    def logsf(self, k):
        lower, upper = self._both(k)
        with np.errstate(divide="ignore"):
            return np.where(upper < 0.5, np.log(upper), np.log1p(-lower))

    # ------------------------------------------------------------------ quantiles
    def ppf(self, q):
        if self._poisson is not None:
            return self._split("ppf", q)
        q = np.asarray(q, dtype=float)
        return self._quantile(q, np.where(q >= 0.5, 1.0 - q, np.nan), upper_given=False)

    def isf(self, q):
        if self._poisson is not None:
            return self._split("isf", q)
        q = np.asarray(q, dtype=float)
        return self._quantile(np.where(q >= 0.5, 1.0 - q, np.nan), q, upper_given=True)

    def median(self):
        return self.ppf(np.full(self.raw.shape, 0.5))

    def interval(self, confidence):
        c = np.asarray(confidence, dtype=float)
        if np.any((c < 0) | (c > 1)):
            raise ValueError("negative_binomial: confidence must be between 0 and 1 inclusive")
        return self.ppf((1.0 - c) / 2.0), self.ppf((1.0 + c) / 2.0)

    def _quantile(self, lower_q, upper_q, upper_given):
        """Smallest integer k >= 0 with P(Y <= k) >= lower_q, i.e. P(Y > k) <= upper_q; one of the
        two is given exactly, the other is its complement where that is exact (>= 1/2) else NaN."""
        given = upper_q if upper_given else lower_q
        given, t, lower_q, upper_q, size = np.broadcast_arrays(given, self._t, lower_q, upper_q, self.size)
        out = np.full(given.shape, np.nan)
        low_end, high_end = (1.0, 0.0) if upper_given else (0.0, 1.0)
        out[given == low_end] = -1.0
        out[given == high_end] = np.inf
        todo = (given > 0) & (given < 1)
        if not np.any(todo):
            return out[()]
        t, lq, uq, r = t[todo], lower_q[todo], upper_q[todo], size[todo]
        from_upper = uq < 0.5  # also where lq is NaN
        args = (r, t, lq, uq, from_upper)
        k = np.zeros(t.shape)
        up = _gap(1.0, *args) < 0  # k = 0 unless P(Y = 0) < q
        # upper end: the gamma-limit quantile b s = G_r^-1(q) times 2, plus 10, doubled in log b until past
        with np.errstate(divide="ignore", over="ignore"):
            guess = np.where(from_upper, special.gammainccinv(r, uq), special.gammaincinv(r, lq))
            log_hi = np.logaddexp(np.log(2.0 * guess) + t, np.log(10.0))
        log_hi = np.minimum(np.maximum(log_hi, np.log(2.0)), _LOG_MAX)
        short = up & (_gap(np.exp(log_hi), *args) < 0)
        while np.any(short & (log_hi < _LOG_MAX)):
            log_hi = np.where(short, np.minimum(2.0 * log_hi + 1.0, _LOG_MAX), log_hi)
            short = up & (_gap(np.exp(log_hi), *args) < 0)
        k[short] = np.inf  # beyond the largest float
        go = up & ~short
        if np.any(go):
            a = tuple(v[go] if np.ndim(v) else v for v in args)
            # find_root passes its own (shrinking) slices of the arrays in args
            res = elementwise.find_root(lambda x, *z: _gap(np.exp(x), *z), (np.zeros(int(go.sum())), log_hi[go]),
                                        args=a, tolerances={"xatol": 1e-3, "xrtol": 0.0})
            lo_b, hi_b = np.exp(res.bracket[0]), np.exp(res.bracket[1])
            res = elementwise.find_root(lambda x, *z: _gap(x, *z), (lo_b, np.maximum(hi_b, lo_b)),
                                        args=a, tolerances={"xatol": 0.25, "xrtol": 4.0 * np.finfo(float).eps})
            kk = np.maximum(np.ceil(res.x) - 1.0, 0.0)
            for _ in range(8):  # P(Y <= k) >= q > P(Y <= k'), k' the integer (float above 2**53) below k
                exact = kk < _EXACT_INTEGERS
                step_up = np.where(exact, kk + 1.0, np.nextafter(kk, np.inf))
                step_down = np.where(kk <= _EXACT_INTEGERS, kk - 1.0, np.nextafter(kk, -np.inf))
                low = _gap(kk + 1.0, *a) < 0
                high = ~low & (kk >= 1.0) & (_gap(step_down + 1.0, *a) >= 0)
                if not (np.any(low) or np.any(high)):
                    break
                kk = np.where(low, step_up, np.where(high, step_down, kk))
            k[go] = kk
        if np.any(np.isnan(k)):
            bad = np.zeros(given.shape, dtype=bool)
            bad[todo] = np.isnan(k)
            self._refuse(bad, "quantiles")
        out[todo] = k
        return out[()]
