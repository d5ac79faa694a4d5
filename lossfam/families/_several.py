r"""Families with several raw scores per row: a location and its own scale (or shape), or K classes.

A :class:`SeveralScoreFamily` gives each of its ``k`` distribution parameters its own raw score
and link, so a row's raw score is a k-vector and ``raw`` has shape (n, k).  Column 0 is always
the location (the mean, the median or the tau-quantile); the other columns are the parameters
that a one-score family holds constant for the whole data set (sigma, b, shape, alpha, s), each
through a log link, so that they may vary with the features.  The multinomial family instead has
one raw score per class (its module docstring gives its identifiability choice).

Shapes and conventions
----------------------
=========================  ====================================================================
method                     returns
=========================  ====================================================================
``nll(y, raw)``            (n,) per-row negative log-likelihood in nats, every constant kept
``gradient(y, raw, w)``    (n, k): d nll / d raw_j (times the row weight)
``hessian(y, raw, w)``     (n, k, k): the exact second derivatives d^2 nll / d raw_i d raw_j
``fisher(raw, w)``         (n, k, k): the expected information E_y[hessian] at raw (closed form)
``grad_hess(y, raw, w,     (gradient (n, k), diagonal curvature (n, k)) for the engines, see below
  curvature=...)``
``baseline(y, w, offset)`` (k,) the constant raw-score vector minimising the weighted mean nll
``parameters(raw)``        (n, k) the distribution parameters g_j^{-1}(raw_j)
``location(raw)``          (n,) the response-scale prediction (column 0 through its link)
``distribution(raw)``      the predictive law per row (a frozen scipy.stats law with per-row
                           arguments)
``constant_scale()``       the one-score family with the same law and constant nuisance
                           parameters (for the ranking), or None
=========================  ====================================================================

The engines' curvature
----------------------
The engines grow one tree per raw score and round (LightGBM's and XGBoost's multi-output custom
objectives take one gradient and one Hessian value per row and output), so they need a diagonal.
``grad_hess(..., curvature=)`` chooses it, the same way in every engine; without one, the family's
``default_curvature`` (declared once on the family) applies:

``"newton"``            the diagonal of the exact Hessian where it is positive; where a diagonal
                        entry is not positive (e.g. gaussian log sigma at a zero residual, where
                        d^2 nll / d log sigma^2 = 2 z^2 = 0), the family's positive surrogate,
                        the diagonal of the Fisher information (documented per family in
                        ``_newton_diagonal``).
``"fisher"``            the diagonal of the expected information (Fisher scoring): positive, and
                        free of the row's noise.
``"natural"``           the natural gradient (Amari 1998, "Natural gradient works efficiently in
                        learning", Neural Computation 10, 251-276): the gradient premultiplied by
                        the inverse Fisher matrix per row, F^{-1} g, with a unit curvature, so a
                        tree leaf takes the mean natural gradient of its rows.  A family whose
                        Fisher matrix is diagonal in its raw scores declares it
                        (``fisher_diagonal = True``, with ``_fisher_diagonal``): the natural
                        gradient is then g / diag(F), the same numbers without a k x k solve.

Kinks.  Where the nll has a kink in a raw score (laplace and asymmetric laplace in the location)
the family lists that column in ``kinked_scores``: its exact second derivative is 0 almost
everywhere, its gradient is a subgradient (0 at the kink), and a minimiser (the baseline) only
brackets 0 between the one-sided derivatives there instead of zeroing the gradient.

Families with one raw score keep their own interface (:class:`lossfam.Family`); the two kinds
share the registry (``lossfam.available(scores="several")`` lists these).
"""
from __future__ import annotations

import dataclasses
import warnings
from typing import ClassVar

import numpy as np
from scipy import optimize

from .. import _checks
from .._checks import Domain
from ..links import Link
from ._base import Family
from .student_t import _log_abs_diff

CURVATURES = ("newton", "fisher", "natural")


def scaled_residual(y, loc, log_scale, power=1.0):
    r"""(y - loc) e^{-power log_scale} for a log-scale raw score, without NaN.

    The plain product is exact to rounding wherever the difference and e^{-power log_scale} are
    both finite and the product is finite and not 0 (or the difference is 0).  Elsewhere (the
    difference overflows, e^{-power log_scale} overflows or underflows, so 0 * inf or inf * 0
    could arise, or a finite exact value would round to +-inf or 0 in the product) it is

        sign(y - loc) exp(log|y - loc| - power log_scale),

    with log|y - loc| = log 2 + log|y/2 - loc/2| where the difference overflows: +-inf only where
    the exact value is beyond float64, 0 only where it is below the smallest subnormal or the
    difference is 0."""
    with np.errstate(over="ignore", under="ignore", invalid="ignore", divide="ignore"):
        d = y - loc
        out = d * np.exp(-power * log_scale)
        # fast exit (engines call this every round): every product finite, and 0 only where d is
        if np.isfinite(np.sum(out)) and np.count_nonzero(out) == np.count_nonzero(d):
            return out
        redo = ~np.isfinite(out) | ((out == 0) & (d != 0))
        if np.any(redo):
            out[redo] = np.sign(d[redo]) * np.exp(_log_abs_diff(y[redo], loc[redo]) - power * log_scale[redo])
    return out


@dataclasses.dataclass(frozen=True)
class SeveralScoreFamily:
    """Base class of the noise models with k raw scores per row.

    Subclasses are frozen dataclasses whose fields are the parameters held fixed (e.g. the
    quantile level tau, Student's degrees of freedom, the number of classes), validated on
    construction through ``param_domains``."""

    name: ClassVar[str] = "several_score_family"
    #: one name per raw score, column order (column 0: the location)
    score_names: ClassVar[tuple] = ()
    #: one link per raw score, column order
    links: ClassVar[tuple] = ()
    target_domain: ClassVar[Domain]
    #: admissible targets for nll (stricter for count laws); None: target_domain
    nll_domain: ClassVar[Domain | None] = None
    param_domains: ClassVar[dict] = {}
    discrete: ClassVar[bool] = False
    #: what location(raw) is: "mean", "median" or "quantile"
    prediction_kind: ClassVar[str] = "mean"
    #: {engine: {engine parameter: value}}: built-in objectives equal to this loss (e.g. softmax)
    native_twins: ClassVar[dict] = {}
    #: True when adding one constant to every raw score of a row changes nothing (softmax): the
    #: Hessian and Fisher matrices are then singular along (1, ..., 1)
    raw_shift_invariant: ClassVar[bool] = False
    #: True when the law is over ordered values (it has a cdf, quantiles and central intervals, so
    #: PIT values, quantile residuals and interval coverage exist); False for unordered class labels
    ordered_values: ClassVar[bool] = True
    #: the engines' curvature when the user gives none ("newton", "fisher" or "natural"): families
    #: with a cheap closed-form Fisher matrix declare "natural" (measured steadier on the scale
    #: columns; README, "Several raw scores per row")
    default_curvature: ClassVar[str] = "newton"
    #: True when the Fisher matrix is diagonal in the raw scores (the natural gradient divides)
    fisher_diagonal: ClassVar[bool] = False
    #: raw-score columns in which the nll has a kink (module docstring)
    kinked_scores: ClassVar[tuple] = ()
    #: the nuisance parameter of ``constant_scale()`` that raw score 1 models through a log link
    #: (the generic ``_start`` is then the one-score baseline and log of that parameter's MLE)
    constant_param: ClassVar[str | None] = None
    #: True when the location's constant MLE does not depend on the other raw scores (mean,
    #: median, quantile): without an offset on the other columns ``_start`` is then the baseline
    start_is_baseline: ClassVar[bool] = False

    # the fixed parameters are validated, listed and replaced as a one-score family's are
    __post_init__ = Family.__post_init__
    params = Family.params
    with_params = Family.with_params

    # ------------------------------------------------------------------ info
    @property
    def n_scores(self) -> int:
        """k, the number of raw scores per row."""
        return len(self.score_names)

    def constant_scale(self):
        """The one-score family of the same law with constant nuisance parameters, or None."""
        return None

    # ------------------------------------------------------------------ checks
    def check_target(self, y, *, for_nll: bool = True) -> np.ndarray:
        dom = (self.nll_domain or self.target_domain) if for_nll else self.target_domain
        return _checks.check_target(y, dom, self.name)

    def check_raw(self, raw, y=None) -> np.ndarray:
        """raw as a finite float64 (n, k) array with one row per target row."""
        raw = _checks.as_float_array(raw, "raw", self.name)
        k = self.n_scores
        if raw.ndim != 2 or raw.shape[1] != k:
            raise ValueError(f"{self.name}: raw must have shape (n, {k}), one column per raw score "
                             f"{self.score_names}; got shape {raw.shape}")
        if y is not None and raw.shape[0] != np.shape(y)[0]:
            raise ValueError(f"{self.name}: raw has {raw.shape[0]} rows but y has {np.shape(y)[0]}")
        bad = ~np.isfinite(raw).all(axis=1)
        if bad.any():
            rows = np.flatnonzero(bad)
            raise ValueError(f"{self.name}: raw scores must be finite; {bad.sum()} row(s) are not "
                             f"(rows {rows[:10].tolist()}{' ...' if rows.size > 10 else ''})")
        return raw

    def _inputs(self, y, raw, weight=None, *, for_nll: bool):
        y = self.check_target(y, for_nll=for_nll)
        if y.ndim != 1:
            raise ValueError(f"{self.name}: y must be one-dimensional, got shape {y.shape}")
        raw = self.check_raw(raw, y)
        w = _checks.check_weight(weight, y, self.name)
        return y, raw, w

    # ------------------------------------------------------------------ public math
    def nll(self, y, raw) -> np.ndarray:
        """(n,) per-row negative log-likelihood in nats."""
        y, raw, _ = self._inputs(y, raw, for_nll=True)
        with np.errstate(over="ignore"):
            return self._nll(y, raw)

    def gradient(self, y, raw, weight=None) -> np.ndarray:
        """(n, k): d (weight * nll) / d raw."""
        y, raw, w = self._inputs(y, raw, weight, for_nll=False)
        with np.errstate(over="ignore"):  # +-inf only where the exact value is beyond float64
            g = self._gradient(y, raw)
            return g if w is None else g * w[:, None]

    def hessian(self, y, raw, weight=None) -> np.ndarray:
        """(n, k, k): the exact matrix of second derivatives of weight * nll in raw."""
        y, raw, w = self._inputs(y, raw, weight, for_nll=False)
        with np.errstate(over="ignore"):
            h = self._hessian(y, raw)
            return h if w is None else h * w[:, None, None]

    def fisher(self, raw, weight=None) -> np.ndarray:
        """(n, k, k): the expected information E_y[d^2 nll / d raw d raw^T] at raw."""
        raw = self.check_raw(raw)
        w = None if weight is None else _checks.check_weight(weight, raw[:, 0], self.name)
        with np.errstate(over="ignore"):
            f = self._fisher(raw)
            return f if w is None else f * w[:, None, None]

    def grad_hess(self, y, raw, weight=None, *, curvature: str | None = None):
        """(gradient (n, k), diagonal curvature (n, k)) of weight * nll, as the engines use them.

        ``curvature`` is "newton", "fisher" or "natural" (module docstring); None: the family's
        ``default_curvature``."""
        if curvature is None:
            curvature = self.default_curvature
        if curvature not in CURVATURES:
            raise ValueError(f"{self.name}: curvature must be one of {CURVATURES}, got {curvature!r}")
        y, raw, w = self._inputs(y, raw, weight, for_nll=False)
        with np.errstate(over="ignore", divide="ignore"):
            if curvature == "natural":
                g = self._natural_direction(y, raw)
                d = np.ones_like(g)
            elif curvature == "newton":
                g, d = self._gradient(y, raw), self._newton_diagonal(y, raw)
            else:
                g, d = self._gradient(y, raw), self._fisher_diagonal(raw)
        if w is not None:
            with np.errstate(over="ignore"):
                g = g * w[:, None]
                d = d * w[:, None]
        return g, d

    def baseline(self, y, weight=None, *, offset=None) -> np.ndarray:
        """(k,) the constant raw-score vector c minimising sum_i w_i nll(y_i, c + offset_i).

        ``offset``: None, (n,) added to the location column, or (n, k)."""
        y = self.check_target(y, for_nll=False)
        _checks.check_nonempty(y, self.name)
        w = _checks.unit_weight(weight, y, self.name)
        o = self._offset_matrix(offset, y.shape[0])
        with np.errstate(over="ignore"):
            c = np.asarray(self._baseline(y, w, o), dtype=float)
        if c.shape != (self.n_scores,) or not np.isfinite(c).all():
            raise ValueError(f"{self.name}: no finite constant raw scores minimise the nll for these targets")
        return c

    def _offset_matrix(self, offset, n):
        if offset is None:
            return None
        o = _checks.as_float_array(offset, "offset", self.name)
        if o.ndim == 1:
            if o.shape[0] != n:
                raise ValueError(f"{self.name}: offset has {o.shape[0]} rows but y has {n}")
            full = np.zeros((n, self.n_scores))
            full[:, 0] = o
            o = full
        return self.check_raw(o, np.empty(n))

    def parameters(self, raw) -> np.ndarray:
        """(n, k): the distribution parameters, each raw score through its own inverse link."""
        raw = self.check_raw(raw)
        out = np.empty_like(raw)
        for j, link in enumerate(self.links):
            out[:, j] = link.inverse(raw[:, j])
        return out

    def location(self, raw) -> np.ndarray:
        """(n,) the response-scale prediction: the location column through its inverse link."""
        raw = self.check_raw(raw)
        return self.links[0].inverse(raw[:, 0])

    def distribution(self, raw):
        """The predictive law per row (a frozen scipy.stats law with per-row arguments)."""
        return self._distribution(self.check_raw(raw))

    def sample(self, raw, random_state=None) -> np.ndarray:
        """(n,) one target drawn from each row's predictive law (simulation, predictive checks)."""
        return self._sample(self.check_raw(raw), np.random.default_rng(random_state))

    # ------------------------------------------------------------------ hooks
    def _nll(self, y, raw):  # pragma: no cover - abstract
        raise NotImplementedError(f"{type(self).__name__} must implement _nll")

    def _gradient(self, y, raw):  # pragma: no cover - abstract
        raise NotImplementedError(f"{type(self).__name__} must implement _gradient")

    def _hessian(self, y, raw):  # pragma: no cover - abstract
        raise NotImplementedError(f"{type(self).__name__} must implement _hessian")

    def _fisher(self, raw):
        """(n, k, k): from ``_fisher_diagonal`` when ``fisher_diagonal``; else subclasses implement it."""
        if not self.fisher_diagonal or type(self)._fisher_diagonal is SeveralScoreFamily._fisher_diagonal:
            raise NotImplementedError(f"{type(self).__name__} must implement _fisher (or declare "
                                      "fisher_diagonal and implement _fisher_diagonal)")
        d = self._fisher_diagonal(raw)
        f = np.zeros(d.shape + (d.shape[1],))
        idx = np.arange(d.shape[1])
        f[:, idx, idx] = d
        return f

    def _fisher_diagonal(self, raw):
        """(n, k): the diagonal of the Fisher information (a family may compute it directly)."""
        return np.diagonal(self._fisher(raw), axis1=1, axis2=2).copy()

    def _newton_diagonal(self, y, raw):
        """The exact Hessian's diagonal where positive, else the Fisher information's diagonal."""
        d = np.diagonal(self._hessian(y, raw), axis1=1, axis2=2).copy()
        bad = ~(d > 0)
        rows = bad.any(axis=1)
        if rows.any():  # the Fisher diagonal of those rows only (it may be costly to compute)
            d[rows] = np.where(bad[rows], self._fisher_diagonal(raw[rows]), d[rows])
        return d

    def _natural_direction(self, y, raw):
        """(n, k) F^{-1} g at (y, raw): the gradient divided by the Fisher diagonal when that matrix
        is diagonal, else ``_natural_gradient``; families with a closed form override this."""
        g = self._gradient(y, raw)
        if self.fisher_diagonal:
            return g / self._fisher_diagonal(raw)
        return self._natural_gradient(y, raw, g)

    def _natural_gradient(self, y, raw, g):
        """(n, k) F^{-1} g per row (a k x k solve; families with a closed form override this)."""
        return np.linalg.solve(self._fisher(raw), g[:, :, None])[:, :, 0]

    def _sample(self, raw, rng):
        return np.asarray(self._distribution(raw).rvs(random_state=rng), dtype=float)

    def _start(self, y, w, offset):
        """A starting raw-score vector for the baseline search: with ``constant_param``, the
        one-score family's baseline and the log of its nuisance MLE there; else zeros."""
        if self.constant_param is None:
            return np.zeros(self.n_scores)
        one = self.constant_scale()
        o0 = None if offset is None else offset[:, 0]
        c0 = one._baseline(y, w, o0)
        fitted = np.full(y.shape, c0) if o0 is None else c0 + o0
        try:
            p = one._fit_nuisance(y, fitted, w)[self.constant_param]
        except ValueError as err:  # e.g. every residual zero: the likelihood has no finite maximum
            raise ValueError(f"{self.name}: {err}") from None
        return np.array([c0, np.log(p)])

    def _baseline(self, y, w, offset):
        """Generic: minimise the weighted mean nll over a constant k-vector (scipy's BFGS with the
        analytic gradient), from ``_start``; ``start_is_baseline`` families without an offset on
        the other columns take ``_start`` itself; subclasses with a closed form override this."""
        if self.start_is_baseline and (offset is None or not np.any(offset[:, 1:])):
            return self._start(y, w, offset)
        o = 0.0 if offset is None else offset
        sw = w.sum()
        n = y.shape[0]

        def value_grad(c):
            raw = np.broadcast_to(c, (n, self.n_scores)) + o
            f = float(np.dot(w, self._nll(y, raw)) / sw)
            g = (w @ self._gradient(y, np.ascontiguousarray(raw))) / sw
            if not (np.isfinite(f) and np.isfinite(g).all()):  # a trial point whose nll leaves float64
                return np.inf, np.zeros_like(c)
            return f, g

        start = self._start(y, w, offset)
        # far offsets can put the search's trial points where the nll is beyond float64: those are
        # rejected (infinite value) without warnings, and the answer is checked below
        with np.errstate(all="ignore"), warnings.catch_warnings():
            warnings.simplefilter("ignore")
            res = optimize.minimize(value_grad, start, jac=True, method="BFGS", options={"gtol": 1e-10})
            f_end = value_grad(res.x)[0]
        if not np.isfinite(f_end):
            raise ValueError(f"{self.name}: no constant raw scores give a finite nll with these offsets")
        return res.x

    def _distribution(self, raw):  # pragma: no cover - abstract
        raise NotImplementedError(f"{type(self).__name__} has no predictive distribution")
