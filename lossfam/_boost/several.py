"""The engine-neutral core for families with several raw scores per row (``SeveralScoreFamily``).

Both engines grow one tree per raw score and round (LightGBM ``num_class = k``, XGBoost
``num_target = k``) from a custom objective that receives the raw scores as an (n, k) array and
returns a gradient and a diagonal curvature of the same shape.  What they share is decided here:

``several_plan``
    the start: the family's k-vector baseline given the weights and the offset (an (n,) offset on
    the location column or an (n, k) offset), rounded to the engine's precision, and the
    starting scores ``baseline + offset`` (n, k);
``SeveralGradients``
    the family's ``grad_hess(..., curvature=)`` as float32 engine buffers, checked (finite
    gradient, positive finite curvature; rows named otherwise);
``SeveralScorer``
    the weighted mean nll of the rows (the metric both engines report);
``check_trained_several``
    the trained raw scores are finite.

The curvature is one ``train`` argument of the same name in both engines ("newton", "fisher",
"natural"; None, the default, takes the family's ``default_curvature``; ``lossfam.families._several``).  Nothing here imports an engine.
"""
from __future__ import annotations

import dataclasses

import numpy as np

from .. import _checks
from ..families._several import CURVATURES, SeveralScoreFamily


def is_several(fam) -> bool:
    return isinstance(fam, SeveralScoreFamily)


def check_curvature(fam, curvature):
    """The curvature to use: ``curvature``, or the family's ``default_curvature`` when None."""
    if curvature is None:
        curvature = fam.default_curvature
    if curvature not in CURVATURES:
        raise ValueError(f"{fam.name}: curvature must be one of {CURVATURES}, got {curvature!r}")
    return curvature


def offset_matrix(fam, offset, n, what="offset"):
    """None, or the offset as an (n, k) float64 array: an (n,) offset goes to the location column.

    An offset given as a flat array of n * k values (an engine field holding an (n, k) matrix)
    is read in row-major order, as the engines store it."""
    if offset is None:
        return None
    o = _checks.as_float_array(offset, what, fam.name)
    k = fam.n_scores
    if o.ndim == 1 and o.size == n * k and k > 1 and o.size != n:
        o = o.reshape(n, k)
    if o.ndim == 1:
        if o.size != n:
            raise ValueError(f"{fam.name}: {what} has {o.size} values for {n} rows (give one per row for the "
                             f"location, or an (n, {k}) array)")
        full = np.zeros((n, k))
        full[:, 0] = o
        o = full
    if o.shape != (n, k):
        raise ValueError(f"{fam.name}: {what} must have shape ({n},) or ({n}, {k}), got {o.shape}")
    bad = ~np.isfinite(o).all(axis=1)
    if bad.any():
        rows = np.flatnonzero(bad)
        raise ValueError(f"{fam.name}: {what} must be finite; {bad.sum()} row(s) are not "
                         f"(rows {rows[:10].tolist()}{' ...' if rows.size > 10 else ''})")
    return o


@dataclasses.dataclass
class SeveralPlan:
    """Where training starts: ``baseline`` (k,) and the starting scores ``start`` (n, k)."""

    family: SeveralScoreFamily
    baseline: np.ndarray
    start: np.ndarray
    offset: np.ndarray | None

    def start_for(self, n, offset=None, what="offset"):
        """Starting raw scores (n, k) of other rows (a validation set): baseline + their offset."""
        s = np.tile(self.baseline, (n, 1))
        o = offset_matrix(self.family, offset, n, what)
        return s if o is None else s + o


def several_plan(fam, y, w, offset=None, *, precision=np.float64) -> SeveralPlan:
    """The family's k-vector baseline given weights and offset (rounded to ``precision``), and the
    starting scores of the training rows."""
    o = offset_matrix(fam, offset, y.shape[0])
    baseline = fam.baseline(y, w, offset=o).astype(precision).astype(np.float64)
    start = np.tile(baseline, (y.shape[0], 1))
    if o is not None:
        start += o
    return SeveralPlan(fam, baseline, start, o)


class SeveralGradients:
    """The family's direction and diagonal curvature at the engine's raw scores, as the engines'
    float32 (n, k) buffers, checked.

    The values are those of ``fam.grad_hess(y, raw, w, curvature=)`` rounded to float32 (the same
    numpy operations, through the family's ``_direction_curvature``), computed

    * without validating the targets and weights again (the caller validated them once, before
      training) nor the raw scores (the engine's own; a raw score that ran off shows up as a
      gradient that is not finite, which is checked);
    * block by block of rows, so that the family's intermediates stay in cache and main memory
      is read once for the inputs and written once for the outputs;
    * straight into two float32 buffers reused from round to round, in the layout the engine
      reads: ``order="F"`` (LightGBM reads its multi-score gradients one score column after
      another, so it takes the buffers without a copy) or "C" (XGBoost's (n, k) rows);
    * the natural gradient's curvature, the row weight (1 without weights), only once.

    A gradient that is not finite, or a curvature that is not finite and positive, at a row of
    positive weight raises ValueError naming the rows.  Rows of zero weight count for nothing:
    their gradient and curvature are 0 (a value that is not finite there would otherwise reach
    the engine as inf times 0).  The caller hands the buffers to the engine before the next call.
    """

    #: values (rows x k) per block: a few float64 blocks of the family's intermediates fit in L2
    BLOCK_VALUES = 1 << 15

    def __init__(self, fam, curvature=None, order="C"):
        self.family = fam
        self.curvature = check_curvature(fam, curvature)
        self.order = order
        self._out = None
        self._unit_written = False

    def _buffers(self, n, k, w):
        if self._out is None or self._out[0].shape != (n, k):
            self._out = tuple(np.empty((n, k), dtype=np.float32, order=self.order) for _ in range(2))
            self._unit_written = False
        if self.curvature == "natural" and not self._unit_written:
            self._out[1][...] = 1.0 if w is None else np.asarray(w)[:, None]
            self._unit_written = True
        return self._out

    def __call__(self, y, raw, w):
        """(g, h) float32 (n, k) at validated float64 targets ``y`` (n,), the engine's raw scores
        (n, k) and validated weights ``w`` (n,) or None."""
        fam, curvature = self.family, self.curvature
        n, k = raw.shape
        g32, h32 = self._buffers(n, k, w)
        step = max(1, self.BLOCK_VALUES // k)
        bad_rows = []
        for i in range(0, n, step):
            rows = slice(i, i + step)
            r = raw[rows]
            if r.dtype != np.float64:  # XGBoost's float32 margins
                r = r.astype(np.float64)
            gb, hb = g32[rows], h32[rows]
            with np.errstate(over="ignore", divide="ignore", invalid="ignore"):  # checked below
                g, d = fam._direction_curvature(y[rows], r, curvature)
                if w is not None:
                    wb = w[rows, None]
                    g = g * wb
                    if d is not None:
                        d = d * wb
                gb[...] = g
                if d is not None:
                    hb[...] = d
                if np.isfinite(gb.sum()) and (d is None or (hb.min() > 0 and np.isfinite(hb.max()))):
                    continue
                bad = ~np.isfinite(gb).all(axis=1) | ~(np.isfinite(hb) & (hb > 0)).all(axis=1)
            if w is not None:
                idle = w[rows] == 0
                gb[idle] = 0.0
                hb[idle] = 0.0
                bad &= ~idle
            if bad.any():
                bad_rows.append(i + np.flatnonzero(bad))
        if bad_rows:
            rows = np.concatenate(bad_rows)
            raise ValueError(
                f"{fam.name}: the gradient or curvature ({curvature}) is not finite and positive at "
                f"{rows.size} row(s) (rows {rows[:10].tolist()}{' ...' if rows.size > 10 else ''}); the raw "
                "scores have run off (use a smaller learning rate)")
        return g32, h32


class SeveralScorer:
    """The weighted mean nll (nats per row) of a several-score family at raw scores (n, k)."""

    def __init__(self, fam):
        self.family = fam
        self.name = f"{fam.name}_nll"

    def value(self, y, raw, w):
        per_row = self.family.nll(y, raw)
        if w is None:
            return float(per_row.mean())
        sw = float(np.sum(w))
        return float(np.dot(w, per_row) / sw) if sw > 0 else float("nan")


def check_trained_several(fam, raw, what="the training rows"):
    """Refuse trained raw scores (n, k) that are not finite (a learning rate far too large)."""
    raw = np.asarray(raw)
    if not np.isfinite(raw).all():
        bad = ~np.isfinite(raw).all(axis=1)
        rows = np.flatnonzero(bad)
        raise ValueError(f"{fam.name}: training diverged: the raw scores of {what} are not finite at rows "
                         f"{rows[:10].tolist()}{' ...' if rows.size > 10 else ''}; use a smaller learning rate")


def targets(fam, y, w, what):
    """Checked float64 targets and weights (None when absent or all ones) of a data set."""
    if y is None:
        raise ValueError(f"{what}: the data has no label")
    y = fam.check_target(np.asarray(y, dtype=np.float64).reshape(-1), for_nll=False)
    _checks.check_nonempty(y, fam.name)
    if w is not None and np.size(w) == 0:
        w = None
    if w is not None:
        w = _checks.check_weight(np.asarray(w, dtype=np.float64).reshape(-1), y, fam.name, need_positive_sum=True)
        if np.all(w == 1.0):
            w = None
    return y, w


_TINY = np.finfo(np.float64).tiny


def raw_from_output(fam, out):
    """Raw scores (n, k) from a built-in softmax twin's output (the class probabilities, as the engines
    hand them to a metric and return them from ``predict``).

    Softmax families (``raw_shift_invariant``) are identified only up to one constant per row, so
    log p is their raw score (every probability, the nll and the gradient are unchanged).  A
    probability that rounded to 0 in the engine's output becomes the smallest positive float64
    (log = -708.4): a finite stand-in, so that such a row's nll reads 708 nats rather than inf."""
    if not getattr(fam, "raw_shift_invariant", False):
        raise ValueError(f"{fam.name}: a native twin's output can be read back only for softmax families")
    p = np.asarray(out, dtype=np.float64).reshape(-1, fam.n_scores)
    return np.log(np.maximum(p, _TINY))
