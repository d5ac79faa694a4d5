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
               sum w (mu_i - y_i) / (1 + alpha mu_i) (brentq; increasing in the constant)
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
The predictive law is scipy.stats.nbinom(n = r, p = 1 / (1 + alpha mu)).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import optimize, stats
from scipy.special import betaln, digamma, expit

from .._checks import NONNEGATIVE, NONNEGATIVE_INTEGER, POSITIVE
from ..links import LOG
from ._base import Family, by_row_blocks


#: the dispersion search stops here (see the module docstring)
_LOG_ALPHA_MIN = float(np.log(1e-6))


def log_binomial_term(y, size):
    """log Gamma(y + r) / (Gamma(r) Gamma(y + 1)) without cancellation (0 at y = 0)."""
    pos = y > 0
    safe = np.where(pos, y, 1.0)
    return np.where(pos, -np.log(safe) - betaln(safe, size), 0.0)


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
        la = np.log(alpha)
        t = raw + la
        # (y + r) log(1 + e^t) - y t = y log(1 + e^-t) + r log(1 + e^t): two terms >= 0, no inf - inf
        return -log_binomial_term(y, 1.0 / alpha) + y * np.logaddexp(0.0, -t) + np.logaddexp(0.0, t) / alpha

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
        total = np.dot(w, y)
        if not total > 0:
            raise ValueError("negative_binomial: every row with positive weight has count 0, "
                             "so the best constant raw score is -inf")
        c0 = np.log(total) - np.log(w.sum())
        if offset is None:
            return c0

        def score(c):
            return float(np.dot(w, self._grad_hess(y, c + offset)[0]))

        lo, hi = c0 - np.max(offset) - 1.0, c0 - np.min(offset) + 1.0
        while score(lo) > 0:
            lo -= 2.0 * (hi - lo)
        while score(hi) < 0:
            hi += 2.0 * (hi - lo)
        # maxiter: at extreme dispersion one side of the score is flat near 1e-300 and Brent creeps
        return optimize.brentq(score, lo, hi, xtol=1e-13, maxiter=2000)

    def _fit_nuisance(self, y, raw, w):
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
        alpha = self.dispersion
        with np.errstate(over="ignore"):
            return stats.nbinom(n=1.0 / alpha, p=expit(-(raw + np.log(alpha))))
