"""The family base class: what every noise model provides, and the checks around it.

A family is a noise model for a target ``y`` given a raw score ``raw`` (what a
linear model or a boosted ensemble adds up).  It is the composition of

* a **link** (``lossfam.links``) that maps the response-scale prediction
  ``mu`` to ``raw``, and
* a **kernel**: the negative log-likelihood per row, in nats with every
  constant kept, together with its first two derivatives in ``raw``.

The public methods (``nll``, ``grad_hess``, ``deviance``, ``baseline``,
``fit_nuisance``, ``distribution``) validate their input once and then call the
kernel hooks below, which assume valid float64 arrays:

=====================  ======================================================
hook                   returns
=====================  ======================================================
``_nll(y, raw)``       per-row nll (nats)
``_grad_hess(y, raw)`` (d nll / d raw, d^2 nll / d raw^2 or its surrogate)
``_deviance(y, raw)``  per-row unit deviance (default: 2 (nll - nll at mu = y))
``_baseline(y, w, o)`` the constant raw score minimising sum w nll(y, c + o)
``_fit_nuisance(y,r,w)`` dict of maximum-likelihood nuisance parameters
``_distribution(raw)`` the predictive law per row (frozen scipy.stats law)
=====================  ======================================================

A user family subclasses :class:`Family`, declares ``name``, ``link_function``,
``target_domain`` and its parameter domains, implements ``_nll`` and
``_grad_hess`` (the rest have generic numerical defaults), and is registered
with :func:`lossfam.register`.

Engine facts
------------
What the boosting engines (``lossfam.lightgbm``, ``lossfam.xgboost``, the
scikit-learn boosted wrappers, the ranking) need to know about a family is
declared here, once, as class attributes; engine code reads these and never
asks which family it holds.  The defaults suit a smooth family with an exact
Hessian, so a user family needs none of them unless it wants the treatment:

``dispersion_unit``   ``(parameter, power)`` or None.  The engines multiply
                      gradient and Hessian by ``parameter ** power`` (a
                      constant: Newton steps do not change), so the Hessian is
                      dimensionless and the engines' absolute thresholds
                      (``min_sum_hessian_in_leaf``, ``min_child_weight``,
                      ``lambda``) mean what they mean for the built-ins.
                      gaussian ``("scale", 2)`` gives exactly raw - y and 1.
``location_needs_nuisance``  True when the location minimiser depends on the
                      nuisance parameters (huber's threshold is delta * scale
                      in units of y): the engines then fit them at the
                      baseline before growing trees.
``leaf_value``        how a leaf's value is set after a tree is grown:
                      ``"newton"`` (the engine's -sum g / sum h), ``"median"``
                      or ``"quantile"`` (the tree is grown on the pinball
                      subgradient with a unit Hessian, then each leaf takes the
                      median / tau-quantile of its rows' residuals, by the
                      engine's own sample quantile definition so that the
                      custom path grows the native twin's trees
                      (``lossfam._boost.facts.renewal_definition``); tau is
                      the ``quantile`` parameter), or
                      ``"line_search"`` (each leaf takes the constant that
                      minimises its rows' nll, found by vectorised Newton /
                      IRLS iterations on the family's own Hessian).
``hessian_damping``   log of a factor applied to every Hessian by the default
                      step guard, or None (poisson: 0.7, the damping of both
                      engines' built-in poisson objective).
``auto_step_limit``   a per-row step cap (as ``step_limit=s``) that the default
                      guard ``"auto"`` applies, or None: for families whose
                      Hessian vanishes faster than their gradient in a tail,
                      so that one leaf of such rows would take an unbounded
                      Newton step (weibull: 1.0).  The fixed point is unchanged.
``native_twins``      ``{engine: {parameter: value}}``: the engine's built-in
                      objective whose loss, gradient, Hessian and leaf rule are
                      exactly this family's (in dispersion units, under the
                      default guard).  A value ``FromParam("quantile")`` is
                      replaced by the family's parameter.  The engines then
                      compute the gradients in C++; lossfam still supplies the
                      baseline, metric, nuisance fit and model file.
"""
from __future__ import annotations

import dataclasses
from typing import ClassVar

import numpy as np
from scipy import optimize

from .. import _checks
from .._checks import Domain
from ..censoring import IntervalTarget
from . import _censored
from ..links import Link


def scaled_mean(a: np.ndarray, w: np.ndarray, *, overwrite: bool = False) -> float:
    """sum w a / sum w for a >= 0, without overflowing the sum (a is divided by its largest value first).

    Rows of weight 0 take no part (not even in the largest value): their ``a`` may be inf.
    ``overwrite=True`` lets the division reuse ``a`` (no temporary array of a's size)."""
    if not np.min(w) > 0:
        pos = w > 0
        a, w = a[pos], w[pos]
    m = float(np.max(a))
    if not m > 0 or not np.isfinite(m):
        return m
    scaled = np.divide(a, m, out=a) if overwrite and isinstance(a, np.ndarray) else a / m
    return m * float(np.dot(w, scaled) / w.sum())


def residuals(y, raw) -> np.ndarray:
    """y - raw as a fresh float64 array that the caller may overwrite (0-d for scalar rows)."""
    r = np.subtract(y, raw)
    return r if isinstance(r, np.ndarray) else np.array(r)


#: rows per block in :func:`by_row_blocks`: a few block-sized float64 arrays (256 KiB each) fit in L2
BLOCK_ROWS = 1 << 15


def by_row_blocks(fill, inputs, n_out, n_scratch=0, rows=BLOCK_ROWS, out=None):
    """The outputs of an elementwise kernel, evaluated block by block so its intermediates stay in cache.

    ``fill(*in_blocks, *out_blocks, *scratch_blocks)`` computes each output row from the same
    row of the inputs only, and writes the results into ``out_blocks`` (``scratch_blocks`` are
    work arrays of the block's length with undefined contents).  Written as a sequence of
    whole-array numpy operations, a kernel makes one pass over main memory per operation; here
    each operation runs over a block of ``rows`` rows that stays in the L2 cache, so main memory
    is read once for the inputs and written once for the outputs.  numpy's elementwise loops
    give the same bits on a block as on the whole array, so the outputs equal those of one call
    on the whole arrays (tested in tests/test_families_blocks.py).

    Inputs that are not equally long one-dimensional float64 arrays get one call on the whole
    arrays (outputs and scratch of the broadcast shape and result type).  Returns the list of
    ``n_out`` fresh output arrays, or fills and returns ``out`` (a list of ``n_out`` float64
    arrays of the inputs' length, e.g. buffers reused across calls) when given.
    """
    first = inputs[0]
    shape = first.shape if isinstance(first, np.ndarray) else None
    same = shape is not None and len(shape) == 1
    for a in inputs:  # a plain loop: this runs once per boosting round, and a generator costs more
        if not (same and isinstance(a, np.ndarray) and a.dtype == np.float64 and a.shape == shape):
            same = False
            break
    if not same:
        shape = np.broadcast_shapes(*(np.shape(a) for a in inputs))
        dtype = np.result_type(*inputs, 1.0)
        outs = [np.empty(shape, dtype) for _ in range(n_out + n_scratch)] if out is None else (
            list(out) + [np.empty(shape, dtype) for _ in range(n_scratch)])
        fill(*inputs, *outs)
        return outs[:n_out]
    n = shape[0]
    outs = [np.empty(n) for _ in range(n_out)] if out is None else list(out)
    if n <= rows:
        if n_scratch:
            fill(*inputs, *outs, *(np.empty(n) for _ in range(n_scratch)))
        else:
            fill(*inputs, *outs)
        return outs
    scratch = [np.empty(rows) for _ in range(n_scratch)]
    for start in range(0, n, rows):
        block = slice(start, start + rows)
        k = min(rows, n - start)
        fill(*(a[block] for a in inputs), *(o[block] for o in outs), *(s[:k] for s in scratch))
    return outs


#: rows per block in :func:`sum_by_row_blocks`: at most 10,000, the length above which OpenBLAS
#: (numpy's BLAS) runs a dot product on several threads (measured on a loaded 2-core machine:
#: 2.5 us for 10,000 rows, 550 us for 10,001, the threads waiting for busy cores)
REDUCE_ROWS = 1 << 13


def sum_by_row_blocks(kernel, inputs, n_scratch=0, rows=REDUCE_ROWS):
    """Sums over all rows of the per-block sums of a reduction kernel, one pass over memory.

    ``kernel(*in_blocks, *scratch_blocks)`` returns a tuple of floats for one block of rows
    (``inputs`` are equally long one-dimensional arrays, or None: passed on as None); the
    result is the tuple of their sums over the blocks.  As in :func:`by_row_blocks`, every
    numpy operation of the kernel runs over a block that stays in cache, so main memory is
    read once per call however many operations the kernel makes, and the scratch arrays are
    block-sized: no row-sized temporaries.
    """
    first = next(a for a in inputs if a is not None)
    n = first.shape[0]
    k = min(n, rows)
    scratch = [np.empty(k) for _ in range(n_scratch)]
    totals = None
    for start in range(0, max(n, 1), rows):
        block = slice(start, start + rows)
        m = min(rows, n - start)
        part = kernel(*(None if a is None else a[block] for a in inputs), *(s[:m] for s in scratch))
        totals = list(part) if totals is None else [t + p for t, p in zip(totals, part)]
    return tuple(totals)


def _rows(y):
    """An array with one entry per row of y (the lower bounds of an IntervalTarget)."""
    return y.lower if isinstance(y, IntervalTarget) else y


@dataclasses.dataclass(frozen=True)
class FromParam:
    """In ``Family.native_twins``: the value of the family's parameter ``name``."""

    name: str


LEAF_VALUE_RULES = ("newton", "median", "quantile", "line_search")


@dataclasses.dataclass(frozen=True)
class Family:
    """Base class of all noise models.  Subclasses are frozen dataclasses whose
    fields are the nuisance parameters (keyword-only, validated on construction)."""

    name: ClassVar[str] = "family"
    link_function: ClassVar[Link]
    #: admissible targets for gradient, Hessian, deviance and baseline
    target_domain: ClassVar[Domain]
    #: admissible targets for nll (stricter for count laws); None: target_domain
    nll_domain: ClassVar[Domain | None] = None
    #: domain of every nuisance parameter, by field name
    param_domains: ClassVar[dict] = {}
    #: False when ``_grad_hess`` returns a surrogate (not the second derivative)
    exact_hessian: ClassVar[bool] = True
    #: True when y is a count or a label (the law has a mass function)
    discrete: ClassVar[bool] = False
    #: what the response-scale prediction ``inverse_link(raw)`` is
    prediction_kind: ClassVar[str] = "mean"

    # engine facts (module docstring, "Engine facts")
    #: (parameter, power): gradient and Hessian are multiplied by parameter ** power in the engines
    dispersion_unit: ClassVar[tuple | None] = None
    #: True when the location minimiser depends on the nuisance parameters (pre-fitted at the baseline)
    location_needs_nuisance: ClassVar[bool] = False
    #: leaf-value rule: "newton", "median", "quantile" or "line_search"
    leaf_value: ClassVar[str] = "newton"
    #: log of the factor the default step guard applies to every Hessian, or None
    hessian_damping: ClassVar[float | None] = None
    #: per-row step cap applied by the default step guard "auto", or None
    auto_step_limit: ClassVar[float | None] = None
    #: {engine: {engine parameter: value or FromParam(name)}}: built-in objectives equal to this loss
    native_twins: ClassVar[dict] = {}

    # censored and interval targets (lossfam.censoring; math in lossfam.families._censored)
    #: (a, b): the closure of the support, for the bounds of censored rows; None: no censored likelihood
    support_edges: ClassVar[tuple | None] = None
    #: nuisance parameters fitted by maximum likelihood when the target has censored rows
    censored_fit: ClassVar[tuple] = ()

    def __post_init__(self):
        for f in dataclasses.fields(self):
            dom = self.param_domains.get(f.name)
            if dom is not None:
                v = _checks.check_param(f.name, getattr(self, f.name), dom, self.name)
                object.__setattr__(self, f.name, v)

    # ------------------------------------------------------------------ info
    @property
    def params(self) -> dict:
        """The nuisance parameters as a plain dict (empty when there are none)."""
        return {f.name: getattr(self, f.name) for f in dataclasses.fields(self)}

    @property
    def prediction_level(self):
        """The cdf level at which the prediction ``inverse_link(raw)`` lies when it is a quantile of
        the predictive law, None for a mean: the ``quantile`` parameter where the family has one,
        else 0.5 (a median, or the centre of a symmetric law); families whose prediction is another
        quantile override this."""
        if self.prediction_kind == "mean":
            return None
        return float(self.params.get("quantile", 0.5))

    def with_params(self, **params) -> "Family":
        """A copy with some nuisance parameters replaced (validated)."""
        unknown = set(params) - set(self.params)
        if unknown:
            raise ValueError(
                f"{self.name}: unknown parameter(s) {sorted(unknown)}; "
                f"valid parameters: {sorted(self.params) or 'none'}"
            )
        return dataclasses.replace(self, **params)

    # ------------------------------------------------------------------ link
    def link(self, prediction):
        """raw = g(prediction), the raw score of a response-scale prediction."""
        return self.link_function(prediction)

    def inverse_link(self, raw):
        """prediction = g^{-1}(raw): the mean, or the location for location families."""
        raw = _checks.check_raw(raw, None, self.name)
        return self.link_function.inverse(raw)

    # ------------------------------------------------------------------ checks
    def check_target(self, y, *, for_nll: bool = True) -> np.ndarray:
        """Validate targets; ``for_nll`` applies the stricter support of the nll.

        An :class:`lossfam.censoring.IntervalTarget` is checked against the
        family's support (bounds, exact rows) and returned as is."""
        if isinstance(y, IntervalTarget):
            _censored.check_interval_support(self, y, self.name)
            return y
        dom = (self.nll_domain or self.target_domain) if for_nll else self.target_domain
        return _checks.check_target(y, dom, self.name)

    def _inputs(self, y, raw, *, for_nll: bool):
        y = self.check_target(y, for_nll=for_nll)
        raw = _checks.check_raw(raw, y, self.name)
        return y, raw

    # ------------------------------------------------------------------ public math
    def nll(self, y, raw) -> np.ndarray:
        """Per-row negative log-likelihood in nats, every constant included."""
        y, raw = self._inputs(y, raw, for_nll=True)
        if isinstance(y, IntervalTarget):
            with np.errstate(over="ignore"):
                return _censored.censored_nll(self, y, raw)
        scalar = y.ndim == 0
        if scalar:  # kernels may index or assign rows: give them one row
            y, raw = y.reshape(1), raw.reshape(1)
        with np.errstate(over="ignore"):
            out = self._nll(y, raw)
        return out[0] if scalar else out

    def grad_hess(self, y, raw, weight=None):
        """(gradient, Hessian) of weight * nll with respect to the raw score.

        The Hessian is exact unless ``exact_hessian`` is False, in which case it
        is the family's documented positive surrogate.
        """
        y, raw = self._inputs(y, raw, for_nll=False)
        w = _checks.check_weight(weight, _rows(y), self.name)
        if isinstance(y, IntervalTarget):
            with np.errstate(over="ignore", divide="ignore"):
                g, h = _censored.censored_grad_hess(self, y, raw)
            return (g, h) if w is None else (g * w, h * w)
        scalar = y.ndim == 0
        if scalar:  # the kernels work in place on arrays: give them one row
            y, raw = y.reshape(1), raw.reshape(1)
            w = None if w is None else w.reshape(1)
        with np.errstate(over="ignore", divide="ignore"):
            g, h = self._grad_hess(y, raw)
            if w is not None:
                g = np.multiply(g, w, out=g if g.shape == w.shape else None)
                h = np.multiply(h, w, out=h if h.shape == w.shape else None)
        if scalar:
            return g[0], h[0]
        return g, h

    def deviance(self, y, raw) -> np.ndarray:
        """Per-row unit deviance: >= 0, and 0 where the prediction equals y."""
        y, raw = self._inputs(y, raw, for_nll=False)
        if isinstance(y, IntervalTarget):
            if not y.exact.all():
                raise ValueError(f"{self.name}: the unit deviance is not defined for censored rows "
                                 f"({int((~y.exact).sum())} here); score them by the nll")
            y = y.lower
        with np.errstate(over="ignore"):
            return self._deviance(y, raw)

    def baseline(self, y, weight=None, *, offset=None) -> float:
        """The constant raw score c minimising the weighted mean of nll(y, c + offset).

        ``offset`` is an optional per-row raw-scale offset (e.g. log exposure).
        Raises ValueError when no finite minimiser exists (e.g. all labels equal).
        Only relative weights matter, so they are rescaled first by a power of
        two that brings the largest into [1/2, 1) (weights near 1e308 then do
        not overflow their sum, nor subnormal ones underflow products).
        """
        y = self.check_target(y, for_nll=False)
        _checks.check_nonempty(y, self.name)
        w = _checks.unit_weight(weight, _rows(y), self.name)
        o = None if offset is None else _checks.check_raw(offset, y, self.name + " offset")
        with np.errstate(over="ignore"):
            if isinstance(y, IntervalTarget):
                c = float(self._baseline(y.lower, w, o) if y.exact.all()
                          else _censored.censored_baseline(self, y, w, o))
            else:
                c = float(self._baseline(y, w, o))
        if not np.isfinite(c):
            raise ValueError(f"{self.name}: no finite constant raw score minimises the nll for these targets")
        return c

    def fit_nuisance(self, y, raw, weight=None) -> "Family":
        """A copy with the nuisance parameters at their maximum-likelihood values given raw."""
        if not self.params:
            return self
        y, raw = self._inputs(y, raw, for_nll=False)
        _checks.check_nonempty(y, self.name)
        w = _checks.unit_weight(weight, _rows(y), self.name)
        with np.errstate(over="ignore"):
            if isinstance(y, IntervalTarget):
                new = (self._fit_nuisance(y.lower, raw, w) if y.exact.all()
                       else _censored.censored_fit_nuisance(self, y, raw, w))
            else:
                new = self._fit_nuisance(y, raw, w)
        return dataclasses.replace(self, **new)

    def distribution(self, raw):
        """The predictive law per row: a frozen scipy.stats distribution where scipy has it."""
        raw = _checks.check_raw(raw, None, self.name)
        return self._distribution(raw)

    # ------------------------------------------------------------------ generic hooks
    def _nll(self, y, raw):  # pragma: no cover - abstract
        raise NotImplementedError(f"{type(self).__name__} must implement _nll")

    def _grad_hess(self, y, raw):  # pragma: no cover - abstract
        raise NotImplementedError(f"{type(self).__name__} must implement _grad_hess")

    def _deviance(self, y, raw):
        """Generic unit deviance 2 (nll(y, raw) - nll(y, g(y))), the saturated model."""
        sat = self.link_function._forward(y)
        return np.maximum(2.0 * (self._nll(y, raw) - self._nll(y, sat)), 0.0)

    def _baseline(self, y, w, offset):
        """Generic: minimise the weighted mean nll over a scalar with scipy's Brent method."""
        o = 0.0 if offset is None else offset
        sw = w.sum()

        def mean_nll(c):
            return float(np.dot(w, self._nll(y, c + o)) / sw)

        res = optimize.minimize_scalar(mean_nll)
        return res.x

    def _fit_nuisance(self, y, raw, w):
        """Generic: maximise the weighted log-likelihood over the log of each parameter."""
        names = list(self.params)
        start = np.log([self.params[n] for n in names])
        sw = w.sum()

        def objective(logp):
            fam = dataclasses.replace(self, **dict(zip(names, np.exp(logp))))
            return float(np.dot(w, fam._nll(y, raw)) / sw)

        res = optimize.minimize(objective, start, method="Nelder-Mead")
        return dict(zip(names, np.exp(res.x)))

    def _tail_pieces(self, v, raw):  # pragma: no cover - abstract
        """(log F, log S, log D, E) at finite bounds v inside the support (lossfam.families._censored)."""
        raise NotImplementedError(f"{type(self).__name__} has no censored likelihood")

    def _tail_law(self):
        """(TailLaw, scale) for the fast censored gradient and Hessian (lossfam.families._censored),
        or None: the log-space ``_tail_pieces`` then serve every censored row."""
        return None

    def _distribution(self, raw):  # pragma: no cover - abstract
        raise NotImplementedError(f"{type(self).__name__} has no predictive distribution")
