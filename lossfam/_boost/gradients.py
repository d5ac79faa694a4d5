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
from concurrent.futures import ThreadPoolExecutor

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
    XGBoost take float32 gradients): each block is assembled in float64 by the same operations
    as the whole arrays, while it is in cache, then rounded into the buffers, so the values are
    those of the float64 result rounded as the engines round them, bit for bit.  The checks
    apply to the values the engine receives: one that is finite in float64 but beyond float32's
    range counts as infinite.  The caller must hand the buffers to the engine before the next
    call.

    ``workers`` (engine buffers only): with more than one, the row blocks of a large call are
    shared among that many threads (the caller's and ``workers - 1`` pooled ones; numpy releases
    the GIL inside each operation), so that the objective uses the cores the engine uses.  Every
    row is computed by the same operations whichever thread takes it, so the result does not
    depend on ``workers``.  The family's ``_grad_hess`` is then called on different row blocks
    at once: it must keep no state between calls.  The engine adapters use one worker: two were
    not measured faster on a shared, loaded 2-core machine (benchmarks/objective_call.py).
    """

    _BLOCK = 1 << 15  # rows per block of the engine buffers (a few float64 blocks stay in L2)
    _MIN_BLOCKS_PER_WORKER = 2  # fewer rows than this many blocks per worker: one thread

    def __init__(self, fam, guard: Guard, *, engine_buffers=False, workers=1):
        self.family = fam
        self.guard = guard
        self.unit = facts.dispersion_unit(fam)
        self.factor = math.exp(guard.damping) if guard.damping is not None else 1.0
        self.engine_buffers = engine_buffers
        self.workers = max(1, int(workers))
        self._out = None
        self._scratch = {}
        self._pool = None

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
        return self._scaled(g, h, w)

    def _scaled(self, g, h, w):
        """The family's (g, h) times the unit, guarded and weighted, in place."""
        if self.unit != 1.0:
            g *= self.unit
            h *= self.unit
        if self.factor != 1.0:
            h *= self.factor
        if self.guard.limit is not None:
            inv = 1.0 / self.guard.limit
            tmp = np.empty(min(g.size, self._BLOCK))  # |g| / limit, a block at a time
            for i in range(0, g.size, self._BLOCK):
                gb, hb = g[i:i + self._BLOCK], h[i:i + self._BLOCK]
                a = np.abs(gb, out=tmp[:gb.size])
                a *= inv
                np.maximum(hb, a, out=hb)  # NaN propagates and is caught below
        if w is not None:
            g *= w
            h *= w
        return g, h

    # ------------------------------------------------------------------ engine buffers
    def _into_buffers(self, y, raw, w):
        n = y.size
        if self._out is None or self._out[0].shape[1] != n:
            # one array holds the gradient row and the Hessian row (each contiguous), so that one
            # reduction checks both; the row views are what the engine receives
            both = np.empty((2, n), dtype=np.float32)
            self._out = (both, both[0], both[1])
        block = self._BLOCK
        if n <= block:  # one block: no slicing (this runs once per round, and matters on small data)
            with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
                mask = self._fill_block(y, raw, w, *self._out, 0)
            bad = [] if mask is None else [(0, mask)]
        else:
            k = min(self.workers, n // (block * self._MIN_BLOCKS_PER_WORKER))
            blocks = -(-n // block)
            cut = [blocks * j // max(k, 1) * block for j in range(max(k, 1))] + [n]  # contiguous runs of blocks
            jobs = [self._worker_pool().submit(self._fill_rows, y, raw, w, cut[j], cut[j + 1], j)
                    for j in range(1, k)]
            bad = self._fill_rows(y, raw, w, 0, cut[1], 0)
            for job in jobs:
                bad += job.result()
        if bad:
            rows = np.zeros(n, dtype=bool)
            for start, mask in bad:
                rows[start:start + mask.size] = mask
            raise self._invalid_error(rows, raw)
        return self._out[1], self._out[2]

    def _fill_rows(self, y, raw, w, lo, hi, slot):
        """Fill the engine buffers on rows lo:hi, block by block; the (start, mask) of each block with
        invalid rows."""
        both, g32, h32 = self._out
        block = self._BLOCK
        bad = []
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            for i in range(lo, hi, block):
                j = min(i + block, hi)
                mask = self._fill_block(y[i:j], raw[i:j], None if w is None else w[i:j], both[:, i:j], g32[i:j],
                                        h32[i:j], slot)
                if mask is not None:
                    bad.append((i, mask))
        return bad

    def _fill_block(self, y, raw, w, both, g32, h32, slot):
        """One block of rows into the buffers (``both`` = the block's gradient and Hessian rows), in
        the caller's error state; None, or the mask of the block's invalid rows.  Dead rows are
        repaired in place."""
        if y.dtype != np.float64:  # float32 labels: widened exactly into a reused array of the thread's
            y64 = self._scratch.get(slot)
            if y64 is None or y64.size < y.size:
                y64 = self._scratch[slot] = np.empty(max(y.size, min(self._BLOCK, 1 << 12)))
            y64 = y64[:y.size]
            y64[:] = y
            y = y64
        g, h = self._scaled(*self.family._grad_hess(y, raw), w)
        g32[:] = g
        h32[:] = h
        # quick check, two reductions: every h > 0, and a finite sum of g and h proves both finite
        if np.minimum.reduce(h32) > 0 and math.isfinite(np.add.reduce(both, axis=None)):
            return None
        return self._check_block(y, raw, w, g32, h32)

    def _check_block(self, y, raw, w, g32, h32):
        """The exact check of one block that failed the quick one: its float64 values recomputed and
        checked as ``_repair`` checks them, plus float32 overflow; the mask of invalid rows, or None
        after repairing the dead rows (h = 0, g != 0) in the buffers."""
        g, h = self._assemble(y, raw, w)
        bad = _invalid(g, h) | _invalid(g32, h32)
        if bad.any():
            return bad
        dead = (h32 == 0) & (g32 != 0)
        if dead.any():
            h32[dead] = np.abs(g32[dead])
        return None

    def _worker_pool(self):
        if self._pool is None:
            self._pool = ThreadPoolExecutor(max_workers=self.workers - 1, thread_name_prefix="lossfam-gradients")
        return self._pool

    # ------------------------------------------------------------------ checks
    def _invalid_error(self, bad, raw):
        return ValueError(
            f"{self.family.name}: the gradient or Hessian is NaN, infinite or negative at "
            f"{_checks._describe_rows(bad, raw).replace(' outside', '')} (raw scores); the raw scores have "
            "left the range where the nll is finite: use a smaller learning rate, or a step_limit"
        )

    def _repair(self, g, h, raw):
        bad = _invalid(g, h)
        if bad.any():
            raise self._invalid_error(bad, raw)
        dead = (h == 0) & (g != 0)
        if dead.any():
            h[dead] = np.abs(g[dead])

    def __getstate__(self):
        return {"family": self.family, "guard": self.guard, "engine_buffers": self.engine_buffers,
                "workers": self.workers}

    def __setstate__(self, state):
        self.__init__(state["family"], state["guard"], engine_buffers=state.get("engine_buffers", False),
                      workers=state.get("workers", 1))


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
        refs = self._refs
        if refs is not None and len(refs) == len(keys) and (
                refs[0]() is keys[0] if len(keys) == 1 else all(r() is k for r, k in zip(refs, keys))):
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
