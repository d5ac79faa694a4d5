r"""K-class targets: the multinomial (categorical) law with a softmax link, one raw score per class.

y is a class label in {0, ..., K - 1}; raw = (r_0, ..., r_{K-1}); p = softmax(raw),
p_j = e^{r_j} / sum_l e^{r_l}.

    nll      = logsumexp(raw) - r_y                      (= -log p_y)
    gradient = p - e_y                                   (e_y: the indicator vector of class y)
    Hessian  = diag(p) - p p^T                           (exact; free of y)
    Fisher   = diag(p) - p p^T                           (the Hessian does not depend on y)

Identifiability.  Adding the same constant to every raw score of a row changes no probability, so
the Hessian and Fisher matrices are singular along (1, ..., 1) (``raw_shift_invariant``).
* The engines keep all K raw scores, as their built-in softmax objectives do, and the baseline is
  centred to sum 0: c_j = log(m_j) - mean_l log(m_l), m_j the weighted share of class j.
* Linear models fix the raw score of the reference class 0 at 0 (the usual choice of multinomial
  logit regression), so the coefficients of class j are log-odds against class 0.

Engine curvature (lossfam.families._several): "newton" and "fisher" use the diagonal
p_j (1 - p_j), floored at 1e-16 where a probability rounds to 0 or 1.  "natural": the pseudo-inverse
solution of F x = g with sum x = 0; since sum g = 0, x = g / p - mean(g / p) solves it (F (g / p) =
g - p (1^T g) = g), i.e. x_j = 1 - [j = y] / p_y, centred.

The engines' built-in softmax objectives compute the same nll and gradient with the diagonal
Hessian times a constant factor (LightGBM ``multiclass``: K / (K - 1); XGBoost ``multi:softprob``:
2), which scales each Newton leaf value (like a learning-rate factor) and leaves the fixed point
unchanged; they are this family's native twins.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import special, stats

from .. import _checks
from .._checks import Domain
from ._base import FromParam
from ._several import SeveralScoreFamily

_PROB_FLOOR = 1e-16


def _any_label(arr):
    return np.isfinite(arr) & (arr >= 0) & (arr == np.floor(arr))


@dataclass(frozen=True)
class Multinomial(SeveralScoreFamily):
    n_classes: int = 3

    name = "multinomial"
    target_domain = Domain("a class label 0, 1, ..., K - 1", _any_label)
    param_domains = {}
    discrete = True
    prediction_kind = "probabilities"
    raw_shift_invariant = True
    ordered_values = False  # class labels: no cdf, PIT, quantile residual or interval
    native_twins = {"lightgbm": {"objective": "multiclass", "num_class": FromParam("n_classes")},
                    "xgboost": {"objective": "multi:softprob", "num_class": FromParam("n_classes")}}

    def __post_init__(self):
        k = self.n_classes
        if isinstance(k, bool) or not isinstance(k, (int, np.integer)) or k < 2:
            raise ValueError(f"multinomial: parameter n_classes must be an integer >= 2, got {k!r}")
        object.__setattr__(self, "n_classes", int(k))

    @property
    def n_scores(self) -> int:
        return self.n_classes

    @property
    def score_names(self) -> tuple:
        return tuple(f"class_{j}" for j in range(self.n_classes))

    def check_target(self, y, *, for_nll: bool = True) -> np.ndarray:
        y = _checks.check_target(y, self.target_domain, self.name)
        bad = y >= self.n_classes
        if bad.any():
            rows = np.flatnonzero(bad)
            raise ValueError(f"multinomial: y must be a class label below n_classes={self.n_classes}; "
                             f"{bad.sum()} row(s) are not (rows {rows[:10].tolist()}"
                             f"{' ...' if rows.size > 10 else ''}, e.g. {y[rows[0]]:g})")
        return y

    # ------------------------------------------------------------------ math
    @staticmethod
    def _probabilities(raw):
        return special.softmax(raw, axis=1)

    def _nll(self, y, raw):
        idx = y.astype(np.intp)
        return special.logsumexp(raw, axis=1) - raw[np.arange(raw.shape[0]), idx]

    def _gradient(self, y, raw):
        return self._minus_indicator(self._probabilities(raw), y)

    @staticmethod
    def _minus_indicator(p, y):
        """p - e_y, in place of p."""
        p[np.arange(p.shape[0]), y.astype(np.intp)] -= 1.0
        return p

    def _hessian(self, y, raw):
        return self._fisher(raw)

    def _fisher(self, raw):
        p = self._probabilities(raw)
        f = -p[:, :, None] * p[:, None, :]
        d = np.arange(p.shape[1])
        f[:, d, d] += p
        return f

    @staticmethod
    def _diagonal(p):
        """p_j (1 - p_j), floored (the Hessian's and the Fisher matrix's diagonal)."""
        return np.maximum(p * (1.0 - p), _PROB_FLOOR)

    def _newton_diagonal(self, y, raw):
        return self._diagonal(self._probabilities(raw))

    def _fisher_diagonal(self, raw):
        return self._diagonal(self._probabilities(raw))

    @staticmethod
    def _pseudo_inverse_times(g, p):
        """x = g / p - mean(g / p) per row, p floored (module docstring)."""
        x = g / np.maximum(p, _PROB_FLOOR)
        x -= x.mean(axis=1, keepdims=True)
        return x

    def _natural_gradient(self, y, raw, g):
        return self._pseudo_inverse_times(g, self._probabilities(raw))

    def _direction_curvature(self, y, raw, curvature):
        # one softmax for the direction and its curvature (the same numbers as the separate hooks)
        p = self._probabilities(raw)
        if curvature == "natural":
            return self._pseudo_inverse_times(self._minus_indicator(p.copy(), y), p), None
        d = self._diagonal(p)
        return self._minus_indicator(p, y), d

    def _baseline(self, y, w, offset):
        if offset is not None:
            c = super()._baseline(y, w, offset)
            return c - c.mean()
        share = np.bincount(y.astype(np.intp), weights=w, minlength=self.n_classes)
        empty = np.flatnonzero(share <= 0)
        if empty.size:
            raise ValueError(f"multinomial: class(es) {empty.tolist()} have no row with positive weight, "
                             "so their maximum-likelihood probability is 0 (raw score -inf)")
        logs = np.log(share / share.sum())
        return logs - logs.mean()

    def _start(self, y, w, offset):
        share = np.bincount(y.astype(np.intp), weights=w, minlength=self.n_classes) + 0.5
        logs = np.log(share / share.sum())
        return logs - logs.mean()

    # ------------------------------------------------------------------ predictions
    def parameters(self, raw) -> np.ndarray:
        """(n, K): the class probabilities."""
        return self._probabilities(self.check_raw(raw))

    def location(self, raw) -> np.ndarray:
        """(n, K): the class probabilities (the mean of the indicator vector)."""
        return self.parameters(raw)

    def _distribution(self, raw):
        return stats.multinomial(1, self._probabilities(raw))

    def _sample(self, raw, rng):
        cum = np.cumsum(self._probabilities(raw), axis=1)
        u = rng.uniform(size=(raw.shape[0], 1)) * cum[:, -1:]
        return (u > cum).sum(axis=1).astype(float)
