r"""The step guard, gradient/Hessian assembly and target caching, shared by both engines.

Assembly
--------
For validated float64 targets ``y``, raw scores and weights ``w``::

    g, h = family gradient and Hessian (or surrogate) in the raw score
    g, h = u g, u h                      u = the family's dispersion unit
    h    = h e^damping                   damped guard (poisson's default)
    h    = max(h, |g| / step_limit)      per-row cap (step_limit a number)
    g, h = w g, w h

then checks: a NaN, infinite or negative value raises ValueError naming the
rows and their raw scores; a row with zero Hessian and non-zero gradient
(which LightGBM and XGBoost would ignore, or stop on) gets ``h = |g|``, a unit
Newton step.

The step guard (``step_limit``)
-------------------------------
One parameter, one default, the same in both engines:

``"auto"`` (default)
    The family's ``hessian_damping`` when it declares one: every Hessian times
    e^damping (poisson: e^0.7, exactly what both engines' built-in poisson
    objective does, so the default trains on the built-in), and its
    ``auto_step_limit`` when it declares one (the per-row cap below;
    weibull), otherwise off.
``None``
    Off: the family's Hessian as is.
a positive number ``s``
    The per-row cap: each row's Hessian is raised to ``|g| / s`` where it is
    smaller.  A leaf's Newton step ``-sum g / sum h`` is then a
    Hessian-weighted average of steps no longer than ``s``, so no leaf moves
    by more than ``s`` on the raw scale before the learning rate.  The gradient
    is untouched, so the fixed point is unchanged; only the path is damped.
    Stronger than the damping where a log-link mean sits far below its
    targets (a Newton step y / mu - 1 in the thousands).
"""
from __future__ import annotations

import dataclasses
import math
import warnings
import weakref

import numpy as np

from .. import _checks
from ..censoring import IntervalTarget
from ..families._censored import censored_grad_hess
from . import facts

#: the default of ``step_limit`` in both engines
STEP_LIMIT_DEFAULT = "auto"


@dataclasses.dataclass(frozen=True)
class Guard:
    """The resolved step guard: a per-row cap and/or a Hessian damping (log factor)."""

    limit: float | None = None
    damping: float | None = None

    @property
    def is_off(self) -> bool:
        return self.limit is None and self.damping is None


def resolve_guard(fam, step_limit) -> Guard:
    """The guard that ``step_limit`` means for ``fam`` (module docstring)."""
    if isinstance(step_limit, str):
        if step_limit != "auto":
            raise ValueError(f"step_limit must be 'auto', None or a positive number, got {step_limit!r}")
        return Guard(limit=getattr(fam, "auto_step_limit", None), damping=fam.hessian_damping)
    if step_limit is None:
        return Guard()
    try:
        v = float(step_limit)
    except (TypeError, ValueError):
        raise ValueError(f"step_limit must be 'auto', None or a positive number, got {step_limit!r}") from None
    if not (v > 0 and math.isfinite(v)):
        raise ValueError(f"step_limit must be 'auto', None or a positive finite number, got {step_limit!r}")
    return Guard(limit=v)


class Gradients:
    """Assembles the weighted, unit-scaled, guarded and checked gradient and Hessian of a family.

    ``engine_buffers=True`` (for the engines' training loops): the result goes, row block by
    row block, into two float32 arrays that are reused from call to call (LightGBM and
    XGBoost take float32 gradients; the values are those of the float64 result rounded as the
    engines round them, so nothing changes but the time and the memory).  The caller must
    hand them to the engine before the next call.
    """

    _BLOCK = 1 << 16  # rows per block of the cap's scratch array, and of the engine buffers

    def __init__(self, fam, guard: Guard, *, engine_buffers=False):
        self.family = fam
        self.guard = guard
        self.unit = facts.dispersion_unit(fam)
        self.factor = math.exp(guard.damping) if guard.damping is not None else 1.0
        self.engine_buffers = engine_buffers
        self._tmp = None
        self._out = None

    def __call__(self, y, raw, w):
        """(g, h) at validated float64 ``y`` (float32 with ``engine_buffers``), ``raw`` (float64) and
        ``w`` (or None)."""
        if self.engine_buffers and not isinstance(y, IntervalTarget) and y.ndim == 1 and y.size > 0:
            return self._into_buffers(y, raw, w)
        g, h = self._assemble(y, raw, w)
        if not _plausible(g, h):
            self._repair(g, h, raw)
        return g, h

    def _assemble(self, y, raw, w):
        """float64 (g, h) with unit, guard and weights applied, not yet checked."""
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            if isinstance(y, IntervalTarget):  # censored rows (lossfam.censoring): the interval likelihood
                g, h = censored_grad_hess(self.family, y, raw)
            else:
                g, h = self.family._grad_hess(y, raw)
        if self.unit != 1.0:
            g *= self.unit
            h *= self.unit
        if self.factor != 1.0:
            h *= self.factor
        if self.guard.limit is not None:
            inv = 1.0 / self.guard.limit
            n = min(g.size, self._BLOCK)
            if self._tmp is None or self._tmp.size != n:
                self._tmp = np.empty(n)
            for i in range(0, g.size, self._BLOCK):
                gb, hb = g[i:i + self._BLOCK], h[i:i + self._BLOCK]
                a = np.abs(gb, out=self._tmp[:gb.size])
                a *= inv
                np.maximum(hb, a, out=hb)  # NaN propagates and is caught below
        if w is not None:
            g *= w
            h *= w
        return g, h

    def _into_buffers(self, y, raw, w):
        n = y.size
        if self._out is None or self._out[0].size != n:
            self._out = (np.empty(n, dtype=np.float32), np.empty(n, dtype=np.float32))
        g32, h32 = self._out
        for i in range(0, n, self._BLOCK):
            rows = slice(i, i + self._BLOCK)
            g, h = self._assemble(y[rows].astype(np.float64, copy=False), raw[rows], None if w is None else w[rows])
            if not _plausible(g, h):
                if _invalid(g, h).any():
                    # the error names rows of the whole set: let the whole-array path raise it
                    whole_g, whole_h = self._assemble(np.asarray(y, dtype=np.float64), raw, w)
                    self._repair(whole_g, whole_h, raw)
                self._repair(g, h, raw[rows])  # rows with h = 0 only
            g32[rows] = g
            h32[rows] = h
        return g32, h32

    def _repair(self, g, h, raw):
        bad = _invalid(g, h)
        if bad.any():
            raise ValueError(
                f"{self.family.name}: the gradient or Hessian is NaN, infinite or negative at "
                f"{_checks._describe_rows(bad, raw).replace(' outside', '')} (raw scores); the raw scores have "
                "left the range where the nll is finite: use a smaller learning rate, or a step_limit"
            )
        dead = (h == 0) & (g != 0)
        if dead.any():
            h[dead] = np.abs(g[dead])

    def __getstate__(self):
        return {"family": self.family, "guard": self.guard, "engine_buffers": self.engine_buffers}

    def __setstate__(self, state):
        self.__init__(state["family"], state["guard"], engine_buffers=state.get("engine_buffers", False))


def _plausible(g, h):
    """One pass each, no masks: True when every h > 0 and every g, h finite (a finite sum proves it)."""
    return bool(h.min() > 0 and np.isfinite(h.max()) and np.isfinite(g.sum()))


def _invalid(g, h):
    """Rows whose gradient or Hessian is NaN, infinite or negative."""
    with np.errstate(invalid="ignore"):
        return ~(np.isfinite(g) & np.isfinite(h)) | (h < 0)


def growth_gradients(rule, level, y, raw, w):
    """The gradient a median / quantile tree is grown on, with a unit Hessian (times the weights).

    Exactly what the engines' built-in twins hand their tree learner (LightGBM
    and XGBoost alike; measured: with it the custom path grows the native
    path's trees, every leaf the same, on integer-valued targets with many
    ties too):

    ``"median"`` (the absolute-error objectives)
        ``sign(raw - y)``, 0 at a tie;
    ``"quantile"`` at level tau (the quantile objectives)
        ``1 - tau`` where ``raw >= y`` (a tie counts as above), ``-tau``
        below, in float32 arithmetic with tau rounded to float32 first, as the
        engines compute it (``1 - float32(0.9)`` is 0.10000002, not
        ``float32(0.1)``; that last digit decides near-tied splits).

    The leaf values come from the leaf table afterwards.
    """
    if rule == "median":
        g = np.sign(raw - y)
    else:
        t = np.float32(level)
        g = np.where(raw >= y, np.float32(1.0) - t, -t).astype(np.float64)
    if w is None:
        return g, np.ones_like(g)
    g *= w
    return g, np.array(w, dtype=np.float64)


class TargetCache:
    """Validated float64 targets and weights, re-validated only when their source changes.

    ``get(fam, keys, read)``: ``keys`` are the objects whose identity marks the
    same targets (a Dataset or DMatrix, or the label and weight arrays);
    ``read()`` returns the unvalidated ``(y, w)``.  Nothing here is needed for
    correctness: a deep or pickled copy starts empty.
    """

    def __init__(self):
        self._refs = None
        self._y = self._w = None

    def get(self, fam, keys, read, *, for_nll, narrow=False):
        """``narrow=True``: float32 targets are validated in float64 but kept in float32 (half the
        memory; widening them again is exact), for ``Gradients(engine_buffers=True)``."""
        if self._refs is not None and len(self._refs) == len(keys) and all(
                r() is k for r, k in zip(self._refs, keys)):
            return self._y, self._w
        y, w = read()
        if isinstance(y, IntervalTarget):
            y = fam.check_target(y)
            rows = y.lower
        else:
            single = np.asarray(y).reshape(-1) if narrow else None
            y = rows = fam.check_target(np.asarray(y, dtype=np.float64).reshape(-1), for_nll=for_nll)
            if single is not None and single.dtype == np.float32 and single.shape == y.shape:
                y = rows = single
        w = None if w is None or np.size(w) == 0 else _checks.check_weight(np.asarray(w).reshape(-1), rows, fam.name)
        try:
            self._refs = [_ref(k) for k in keys]
        except TypeError:  # lists and the like cannot be weakly referenced: no caching
            self._refs = None
            return y, w
        self._y, self._w = y, w
        return y, w

    def __deepcopy__(self, memo):
        return TargetCache()

    def __getstate__(self):
        return {}

    def __setstate__(self, state):
        self.__init__()


def _none():
    return None


def _ref(obj):
    return _none if obj is None else weakref.ref(obj)


class FarStartWarning(UserWarning):
    """The bare objective was started far from the family's baseline."""


def warn_if_far_from_baseline(fam, y, w, raw, engine):
    """Warn when every raw score is one constant that lies outside the bulk of the targets.

    Built-in objectives start from the targets' average; a custom objective
    starts wherever the engine puts it (raw score 0 without an init score or
    base margin).  When that constant is beyond all but 1% of the rows'
    gradient signs, the first trees spend themselves moving the constant (or,
    with a constant Hessian floor, find no gain and stop).
    """
    if raw.size == 0 or not np.all(raw == raw[0]) or isinstance(y, IntervalTarget):
        return
    try:
        base = fam.baseline(y, w)
    except ValueError:
        return
    if abs(base - raw[0]) <= 1e-6 * max(1.0, abs(base)):
        return
    with np.errstate(over="ignore", invalid="ignore"):
        g, _ = fam._grad_hess(y, np.full_like(y, raw[0]))
    wt = np.ones_like(y) if w is None else w
    total = wt.sum()
    if not total > 0:
        return
    pos = float(wt[g > 0].sum()) / total
    neg = float(wt[g < 0].sum()) / total
    if min(pos, neg) < 0.01:
        hint = ("pass init_score=np.full(n, b) (and the same for eval sets) to lgb.Dataset or fit()"
                if engine == "lightgbm" else
                "pass base_score=b to the parameters (or base_margin=b + offset per row)")
        warnings.warn(
            f"{fam.name} objective: every raw score is {float(raw[0]):g} on the first call, but the "
            f"family's baseline is {base:.6g}: training starts far from the targets and may stall "
            f"(e.g. one tree, a constant model).  Start from the baseline: b = lossfam.family({fam.name!r})"
            f".baseline(y, weight); {hint}; lossfam.{engine}.train does this for you.",
            FarStartWarning, stacklevel=3,
        )
