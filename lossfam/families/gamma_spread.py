r"""Gamma errors whose shape varies with the features: raw scores (log mu, log shape).

Raw scores r = (r0, r1): mean mu = e^{r0}, shape k = e^{r1} (log links); y > 0.  The law is the
one-score ``gamma`` family's (scale mu / k, coefficient of variation 1 / sqrt(k)):
p(y) = y^(k-1) e^(-k y / mu) / (Gamma(k) (mu / k)^k).  With l = log y - r0 (so y / mu = e^l):

    nll = k (e^l - 1 - l) + log y + c(k),     c(k) = k + lgamma(k) - k log k

    gradient   d/dr0 = k (1 - e^l)
               d/dr1 = k (e^l - 1 - l) - m(k),            m(k) = k (log k - digamma(k))
               (d/dk of k (e^l - l) + lgamma(k) - k log k is e^l - l + digamma(k) - log k - 1;
               times dk/dr1 = k)
    Hessian    d2/dr0^2 = k e^l  (> 0)        d2/dr0 dr1 = k (1 - e^l)
               d2/dr1^2 = d/dr1 + f(k),                   f(k) = k (k trigamma(k) - 1)
               (d/dr1 of m(k) is k (log k - digamma(k)) + k (1 - k trigamma(k)))
    Fisher     E[e^l] = 1 and E[d/dr1] = 0 (the score has mean 0), so
               E[d2/dr0^2] = k,  E[d2/dr0 dr1] = 0,  E[d2/dr1^2] = f(k) = k^2 trigamma(k) - k > 0:
               diagonal (mean and shape are orthogonal), so the natural gradient is g / diag(F).
               f(k) falls from 1 (k -> 0) to 1/2 (k -> inf).

Accuracy (each quantity is a small difference of large terms somewhere):
  * e^l - 1 - l from the one-score family's Taylor form near l = 0 (``_expm1_minus``);
  * m(k): for k < 1, 1 + k (r1 - digamma(k + 1)) (digamma(k) = digamma(k + 1) - 1/k), which tends
    to 1 without forming 1/k; for k >= 1, k times the one-score family's log k - digamma(k)
    (its asymptotic series for k >= 16);
  * f(k): for k < 16, k^2 trigamma(k + 1) + 1 - k (trigamma(k) = trigamma(k + 1) + 1/k^2); for
    k >= 16 the series k trigamma(k) - 1 = 1/(2k) + 1/(6k^2) - 1/(30k^4) + 1/(42k^6) - 1/(30k^8)
    + 5/(66k^10) (Abramowitz and Stegun, Handbook of Mathematical Functions, eq. 6.4.12, with the
    Bernoulli numbers; truncation below 1e-13 relative at k = 16), times k;
  * c(k): for k < 1, k + lgamma(k + 1) - r1 - k r1; for 1 <= k < 16 as written; for k >= 16
    Stirling's series c(k) = (log(2 pi) - r1) / 2 + 1/(12k) - 1/(360k^3) + 1/(1260k^5)
    - 1/(1680k^7) (A&S eq. 6.1.41; truncation ~1e-14 absolute at k = 16), so a huge shape does
    not lose the nll to the cancellation of lgamma(k) and k log k.
Where e^{+-raw} leaves float64 the values are +-inf, never NaN (0 * inf is taken in logs): m(k)
is 1/2 where k = e^{r1} overflows; the natural gradient's mean column is -expm1(l) (k cancelled);
the Fisher entry k (and Newton's k e^l) underflows to 0 for r1 below about -745.

Newton's diagonal: the base rule (d2/dr1^2 may be negative for rows near the mean; then f(k)).
Baseline: r0 = the one-score gamma baseline, log(sum w y e^{-o0} / sum w) (the r0-score
k sum w (1 - y e^{-o0 - r0}) = 0 whatever k), r1 = log of the one-score family's fitted shape
at that mean (its root of log k - digamma(k) = mean_w(y/mu - 1 - log(y/mu))): the joint maximum
in closed form up to that root.  With an offset on the shape column, the generic search (BFGS)
from there.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats
from scipy.special import digamma, gammaln, polygamma

from .._checks import POSITIVE
from ..links import LOG
from ._several import SeveralScoreFamily
from .gamma import Gamma, _expm1_minus, _log_minus_digamma

_HALF_LOG_2PI = 0.5 * float(np.log(2.0 * np.pi))


def _m(k, r1):
    """m(k) = k (log k - digamma(k)) (module docstring), r1 = log k; 1/2 where k overflows (the
    series m(k) = 1/2 + 1/(12k) - ..., with 1/(12k) below 1e-309 there)."""
    small = k < 1.0
    ks = np.where(small, k, 0.5)
    kb = np.where(small | np.isinf(k), 1.0, k)
    return np.where(small, 1.0 + ks * (r1 - digamma(ks + 1.0)),
                    np.where(np.isinf(k), 0.5, kb * _log_minus_digamma(kb)))


def _f(k):
    """f(k) = k (k trigamma(k) - 1) > 0 (module docstring)."""
    big = k >= 16.0
    kb = np.where(big, k, 16.0)
    r = 1.0 / (kb * kb)
    series = 0.5 + (1.0 / 6.0 + r * (-1.0 / 30.0 + r * (1.0 / 42.0 + r * (-1.0 / 30.0 + r * 5.0 / 66.0)))) / kb
    ks = np.where(big, 1.0, k)
    near = ks * ks * polygamma(1, ks + 1.0) + 1.0 - ks
    return np.where(big, series, near)


def _c(k, r1):
    """c(k) = k + lgamma(k) - k log k (module docstring), r1 = log k."""
    big = k >= 16.0
    kb = np.where(big, k, 16.0)
    r = 1.0 / (kb * kb)
    stirling = 0.5 * (2.0 * _HALF_LOG_2PI - np.where(big, r1, 0.0)) + (
        1.0 / 12.0 + r * (-1.0 / 360.0 + r * (1.0 / 1260.0 - r / 1680.0))) / kb
    ks = np.where(big, 1.0, k)
    rs = np.where(big, 0.0, r1)
    near = np.where(ks < 1.0, ks + gammaln(ks + 1.0) - rs - ks * rs, ks + gammaln(ks) - ks * rs)
    return np.where(big, stirling, near)


@dataclass(frozen=True)
class GammaSpread(SeveralScoreFamily):
    name = "gamma_spread"
    score_names = ("log_mean", "log_shape")
    links = (LOG, LOG)
    target_domain = POSITIVE
    prediction_kind = "mean"
    fisher_diagonal = True
    constant_param = "shape"
    start_is_baseline = True
    default_curvature = "natural"

    def constant_scale(self):
        return Gamma()

    @staticmethod
    def _times_k(r1, x, log_x):
        """k x for x >= 0 (or x <= 0 with log|x|), taken as e^{r1 + log|x|} where k x is 0 * inf."""
        with np.errstate(over="ignore", invalid="ignore", under="ignore"):
            out = np.exp(r1) * x
            bad = np.isnan(out)
            if np.any(bad):  # 0 where x = 0 (k x = 0 for every finite k, its limit as k -> inf)
                out[bad] = np.where(x[bad] == 0, 0.0, np.sign(x[bad]) * np.exp(r1[bad] + log_x[bad]))
        return out

    def _pieces(self, y, raw):
        r1 = raw[:, 1]
        with np.errstate(over="ignore", divide="ignore"):
            log_y = np.log(y)
            l = log_y - raw[:, 0]
            el = np.exp(l)
            excess = _expm1_minus(l)  # e^l - 1 - l >= 0
            k_excess = self._times_k(r1, excess, np.where(l > 1.0, l, 0.0))  # log(e^l - 1 - l) ~ l far out
            k_gap = self._times_k(r1, -np.expm1(l), np.where(l > 1.0, l, 0.0))  # k (1 - e^l)
        return log_y, el, k_excess, k_gap

    def _nll(self, y, raw):
        k = np.exp(raw[:, 1])
        log_y, _, k_excess, _ = self._pieces(y, raw)
        return k_excess + log_y + _c(k, raw[:, 1])

    def _gradient(self, y, raw):
        k = np.exp(raw[:, 1])
        _, _, k_excess, k_gap = self._pieces(y, raw)
        return np.column_stack([k_gap, k_excess - _m(k, raw[:, 1])])

    def _hessian(self, y, raw):
        r1 = raw[:, 1]
        k = np.exp(r1)
        _, el, k_excess, k_gap = self._pieces(y, raw)
        h = np.empty((y.shape[0], 2, 2))
        h[:, 0, 0] = self._times_k(r1, el, np.log(y) - raw[:, 0])
        h[:, 0, 1] = h[:, 1, 0] = k_gap
        h[:, 1, 1] = k_excess - _m(k, r1) + _f(k)
        return h

    def _fisher_diagonal(self, raw):
        with np.errstate(over="ignore"):
            k = np.exp(raw[:, 1])
        return np.column_stack([k, _f(k)])

    def _natural_direction(self, y, raw):
        # g / diag(F) with the shape cancelled in the mean column: k (1 - e^l) / k = -expm1(l)
        # (no 0 / 0 or inf / inf where k = e^{r1} underflows or overflows); g1 / f(k), f in [1/2, 1]
        g = self._gradient(y, raw)
        with np.errstate(over="ignore"):
            k = np.exp(raw[:, 1])
            g[:, 0] = -np.expm1(np.log(y) - raw[:, 0])
        g[:, 1] /= _f(k)
        return g

    def _distribution(self, raw):
        with np.errstate(over="ignore"):
            k = np.exp(raw[:, 1])
            return stats.gamma(a=k, scale=np.exp(raw[:, 0]) / k)
