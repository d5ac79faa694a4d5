r"""Poisson counts: the Poisson deviance.

With mean mu = e^raw (log link) and y = 0, 1, 2, ...:

    P(y) = mu^y e^(-mu) / y!

    nll      = e^raw - y raw + lgamma(y + 1)
    gradient = e^raw - y
    Hessian  = e^raw                              (exact)
    deviance = 2 (y log(y / mu) - y + mu) = 2 y (expm1(d) - d), d = raw - log y
               (2 mu where y = 0; the expm1 form avoids cancellation near mu = y)
    baseline = log(sum w y / sum w); with an offset o, log(sum w y / sum w e^o)

nll needs integer counts (it is a log-probability).  The gradient, Hessian,
deviance and baseline accept any y >= 0: a rate y per unit of exposure with
the exposure as weight gives the same gradients as the count model.
e^raw overflows beyond raw ~ 709.78: nll, gradient and Hessian are then +inf.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats
from scipy.special import gammaln

from .._checks import NONNEGATIVE, NONNEGATIVE_INTEGER
from ..links import LOG
from ._base import Family


@dataclass(frozen=True)
class Poisson(Family):
    name = "poisson"
    link_function = LOG
    target_domain = NONNEGATIVE
    nll_domain = NONNEGATIVE_INTEGER
    discrete = True
    # engine facts: both engines' built-in poisson multiply every Hessian by e^0.7 (LightGBM
    # poisson_max_delta_step, XGBoost max_delta_step, which also clips each leaf at 0.7); the
    # default step guard does the same, so the default is the built-in
    hessian_damping = 0.7
    native_twins = {"lightgbm": {"objective": "poisson", "poisson_max_delta_step": 0.7},
                    "xgboost": {"objective": "count:poisson", "max_delta_step": 0.7}}

    def _nll(self, y, raw):
        return np.exp(raw) - y * raw + gammaln(y + 1.0)

    def _grad_hess(self, y, raw):
        h = np.exp(raw)
        return h - y, h

    def _deviance(self, y, raw):
        mu = np.exp(raw)
        pos = y > 0
        d = raw - np.log(np.where(pos, y, 1.0))
        dev = np.where(pos, y * (np.expm1(d) - d), mu)
        return np.maximum(2.0 * dev, 0.0)

    def _baseline(self, y, w, offset):
        total = np.dot(w, y)
        if not total > 0:
            raise ValueError("poisson: every row with positive weight has count 0, so the best constant raw score is -inf")
        exposure = w.sum() if offset is None else np.dot(w, np.exp(offset))
        return np.log(total) - np.log(exposure)

    def _distribution(self, raw):
        with np.errstate(over="ignore"):
            return stats.poisson(np.exp(raw))
