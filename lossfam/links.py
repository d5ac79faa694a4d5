"""Link functions: the map between the response-scale prediction and the raw score.

A link ``g`` sends a prediction ``mu`` (a mean, or a location) to the raw score
``raw = g(mu)`` that a model adds up; ``g^{-1}`` maps back.  Each link also
gives ``d mu / d raw`` and the interval of admissible predictions.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.special import expit, logit

from ._checks import POSITIVE, REAL, OPEN_UNIT, Domain, as_float_array


@dataclass(frozen=True)
class Link:
    name: str
    prediction_domain: Domain

    def __call__(self, mu):
        """raw = g(mu); refuses predictions outside the link's domain."""
        mu = as_float_array(mu, "prediction", f"{self.name} link")
        self.prediction_domain.check(mu, "the prediction", f"{self.name} link")
        return self._forward(mu)

    def inverse(self, raw):
        """mu = g^{-1}(raw)."""
        raw = as_float_array(raw, "raw", f"{self.name} link")
        with np.errstate(over="ignore"):
            return self._inverse(raw)


class _Identity(Link):
    """g(mu) = mu; d mu/d raw = 1."""

    def _forward(self, mu):
        return mu.copy()

    def _inverse(self, raw):
        return raw.copy()

    def dmu_draw(self, raw):
        return np.ones_like(np.asarray(raw, dtype=float))


class _Log(Link):
    """g(mu) = log(mu) for mu > 0; mu = e^raw, d mu/d raw = e^raw.

    e^raw overflows to +inf beyond raw ~ 709.78 (no warning is raised).
    """

    def _forward(self, mu):
        return np.log(mu)

    def _inverse(self, raw):
        return np.exp(raw)

    def dmu_draw(self, raw):
        with np.errstate(over="ignore"):
            return np.exp(np.asarray(raw, dtype=float))


class _Logit(Link):
    """g(p) = log(p / (1 - p)) for p in (0, 1); p = expit(raw), dp/draw = p(1 - p).

    expit is evaluated by scipy.special so that it saturates cleanly at 0 and 1.
    """

    def _forward(self, mu):
        return logit(mu)

    def _inverse(self, raw):
        return expit(raw)

    def dmu_draw(self, raw):
        raw = np.asarray(raw, dtype=float)
        return expit(raw) * expit(-raw)


IDENTITY = _Identity("identity", REAL)
LOG = _Log("log", POSITIVE)
LOGIT = _Logit("logit", OPEN_UNIT)
