r"""Training on a Dask cluster: lossfam's own steps as reductions over partitions.

The engines (``lightgbm.dask``, ``xgboost.dask``) grow the trees on the
workers; this module does everything lossfam adds around them, on the workers
too, and brings to the client only sums of fixed size: O(1) per pass for the
baseline, the metric and the nuisance fit, O(number of partitions) values for
the quantile selection's pivots and at most ``SELECT_GATHER`` rows at its last
step.  Nothing here imports an engine; dask is imported on first use.

``ClusterData(X, y, weight=None, offset=None)``
    The rows of one data set as Dask collections, aligned by row partition.
    ``lossfam.lightgbm.train`` / ``lossfam.xgboost.train`` take it in place of
    a Dataset / DMatrix.

Passes (each one task per partition, then a tree of additions on the workers):

baseline, smooth families (leaf rule ``"newton"``)
    The root of ``G(c) = sum w g(y, c + o)`` (the family's gradient), by
    Newton steps on the summed Hessian (or the family's surrogate) kept inside
    a bracket where ``G`` changes sign (bisection when a step leaves it),
    until a step is below 4 ulp of ``c``.  For a family whose nll is convex in
    the raw score that root is the unique minimiser of the weighted nll, so it
    equals ``family.baseline`` up to the order of the floating-point sums
    (measured: relative difference below 1e-14 for poisson with an offset).
baseline, median / quantile families
    What local training starts from (``plan.start_plan``): the engine's own
    start (``facts.engine_start``: its sample quantile of ``y - o`` in single
    precision, from exact order statistics, ``engine_start``), or where the
    engine falls back to the family's baseline, the weighted tau-quantile by
    the midpoint definition of ``lossfam._boost.quantiles``
    (``weighted_quantile``); both by exact selection: the same number as on
    one machine.
nuisance parameters
    The parameters the family's own fit returns (run on one partition on a
    worker, which also gives the start), at maximum likelihood over all rows:
    Newton steps on their logs with central-difference derivatives of
    ``sum w nll / sum w``, every evaluation of one step in one pass (a
    difference step of 1e-2, then 1e-4; the O(h^2) error of the differences
    puts the maximum within about 1e-8 relative; measured against the
    families' own fits on 8000 rows: 2e-9 for asymmetric_laplace, gamma,
    student_t, negative_binomial and tweedie, in 4 passes after the start).
    Where the curvature is not positive, a derivative-free search (Brent,
    Nelder-Mead) with one pass per evaluation.
trained scores (check, nuisance fit)
    Where the engine's training left each worker's trained raw scores behind
    (LightGBM: ``lossfam._lightgbm_keep`` keeps them with ``keep_scores``),
    ``KeptRows`` runs the check and the nuisance passes as one task per worker
    on those arrays; otherwise, or when they do not cover every row of the
    final model, ``PartitionRows`` runs them per partition on predicted scores.
metric
    ``Scorer.sums`` per partition, added.
best round (LightGBM early stopping)
    ``round_curves``: the metric after every round from the rows' leaf indices,
    one pass per valid set; ``best_round`` replays LightGBM's stopping rule.
leaf refit (custom path, median / quantile leaves)
    ``leaf_quantiles``: per leaf, the exact residual quantile over the rows of
    all workers, inside the engine's rounds: a histogram per leaf cuts each
    leaf's rows down to one bucket that holds the answer (``leaf_cut``, no
    sort), then ``select_in_leaves`` (the selection below, vectorised over
    leaves) finishes on the rows of that bucket; three reductions per tree
    when the buckets are small, each of at most ``LEAF_NUMBERS`` numbers
    (and O(leaves x LEAF_PIVOTS x workers) per narrowing round).

Timing: ``timed`` adds each step's wall seconds to the plan's stats;
``cluster_info`` puts them in ``fit.info["cluster"]["seconds"]``.

Exact weighted quantile by selection (``weighted_quantile``).  The value
``x_lo`` is the smallest data value whose cumulative weight reaches ``q W``
(``x_hi`` the smallest whose cumulative weight exceeds it; both within
``TIE_TOL W``, as on one machine).  The search keeps an open bracket
``(lo, hi)`` of candidate values, with the cumulative weight at ``lo`` known
and ``hi`` known to qualify.  One pass asks each partition for its rows
inside the bracket: all of them when they are few, else their count and
``K`` evenly spaced order statistics.  If every partition sent its rows the
answer is found on the client (sort, cumulative sum); otherwise a second
pass counts the weight at or below each order statistic, and the bracket
shrinks to two neighbouring ones: between them each partition holds at most
about ``1/K`` of its bracket rows.  No approximation is involved; the
result is the number ``sample_quantile`` returns on the collected rows.
"""
from __future__ import annotations

import dataclasses
import math
import sys

import numpy as np

from .. import _checks
from . import facts
from .quantiles import TIE_TOL, single_precision_plan
from .scoring import Scorer

#: at most this many (value, weight) pairs come to the client in the selection's last step
SELECT_GATHER = 4096
#: order statistics per partition and pass in the selection (at least 8)
SELECT_PIVOTS = 1024
NEWTON_STEPS = 100

#: lossfam's own steps on a cluster, in the order they run (``fit.info["cluster"]["seconds"]``)
STEPS = ("data", "checks", "baseline", "starts", "prefit", "valid_starts", "model", "tree_range", "kept_scores",
         "trained_check", "nuisance", "refit", "valid_metrics", "best_round")


class timed:
    """``with timed(stats, step):`` adds the block's wall seconds to ``stats["seconds"][step]``."""

    def __init__(self, stats, step):
        self.stats, self.step = stats, step

    def __enter__(self):
        import time

        self.t0 = time.perf_counter()
        return self

    def __exit__(self, *exc):
        import time

        secs = self.stats.setdefault("seconds", {})
        secs[self.step] = secs.get(self.step, 0.0) + time.perf_counter() - self.t0
        return False


def _dask():
    try:
        import dask
        import dask.array as da
        import distributed
    except ImportError as exc:  # pragma: no cover - dask is an extra
        raise ImportError('training on a Dask cluster needs dask: pip install "lossfam[dask]"') from exc
    return dask, da, distributed


def is_dask_collection(obj) -> bool:
    """True for a Dask collection (without importing dask when nothing has: then nothing can be one)."""
    dask = sys.modules.get("dask")
    return dask is not None and dask.is_dask_collection(obj)


def _is_frame(obj) -> bool:
    return hasattr(obj, "map_partitions") and hasattr(obj, "npartitions") and hasattr(obj, "columns")


def get_client(client=None):
    """The given client, or the current ``dask.distributed`` client (with a clear error when none runs)."""
    _, _, distributed = _dask()
    if client is not None:
        return client
    try:
        return distributed.get_client()
    except ValueError:
        raise ValueError("no dask.distributed Client: start one (Client(LocalCluster(...)) or Client('tcp://scheduler:8786')) "
                         "or pass client=") from None


class ClusterData:
    """One data set as Dask collections: features ``X`` (array or DataFrame, partitioned by rows),
    targets ``y`` and optional ``weight`` and ``offset`` (raw-scale, e.g. log exposure), each a Dask
    array or Series (or a numpy array, split like X).

    ``lossfam.lightgbm.train`` and ``lossfam.xgboost.train`` take it in place of
    their engine's data object.  Nothing is computed on construction.
    """

    def __init__(self, X, y, weight=None, offset=None):
        if not is_dask_collection(X):
            raise TypeError(f"ClusterData: X must be a Dask array or DataFrame, got {type(X).__name__}")
        self.X, self.y, self.weight, self.offset = X, y, weight, offset
        self._aligned = None

    def aligned(self, client):
        """(X, y, w, o): X persisted, the others float64 Dask arrays chunked like X's row partitions."""
        if self._aligned is not None:
            return self._aligned
        _, da, _ = _dask()
        X = self.X
        if _is_frame(X):
            lengths = tuple(int(n) for n in client.compute(X.map_partitions(len)).result())
        else:
            if X.ndim != 2:
                raise ValueError(f"ClusterData: X must be two-dimensional, got shape {X.shape}")
            if X.numblocks[1] != 1:
                X = X.rechunk({1: -1})
            lengths = tuple(int(n) for n in X.chunks[0])
            if any(math.isnan(n) for n in X.chunks[0]):
                X = X.compute_chunk_sizes()
                lengths = tuple(int(n) for n in X.chunks[0])
        n = sum(lengths)

        def column(v, what):
            if v is None:
                return None
            if is_dask_collection(v):
                if hasattr(v, "to_dask_array"):
                    if getattr(v, "ndim", 1) != 1:
                        raise ValueError(f"ClusterData: {what} must be one column")
                    v = v.to_dask_array(lengths=True)
                v = v.astype(np.float64)
            else:
                v = da.from_array(np.asarray(v, dtype=np.float64), chunks=(lengths,))
            if v.ndim != 1 or v.shape[0] != n:
                raise ValueError(f"ClusterData: {what} has shape {v.shape}, X has {n} rows; pass one value per row")
            return v.rechunk((lengths,)) if tuple(v.chunks[0]) != lengths else v

        y, w, o = column(self.y, "y"), column(self.weight, "weight"), column(self.offset, "offset")
        parts = [v for v in (X, y, w, o) if v is not None]
        done = iter(client.persist(parts))
        self._aligned = tuple(None if v is None else next(done) for v in (X, y, w, o))
        return self._aligned

    @property
    def nrows(self):
        return None if self._aligned is None else int(self._aligned[1].shape[0])


# --------------------------------------------------------------------------- reductions
#: partial sums added per task in the reduction tree
FAN_IN = 8


def _add_all(*parts):
    total = parts[0]
    for p in parts[1:]:
        total = total + p
    return total


def _tree_add(dask, parts):
    """The sum of the per-partition vectors, by a tree of tasks on the workers (FAN_IN per task)."""
    add = dask.delayed(_add_all, pure=True)
    while len(parts) > 1:
        parts = [add(*parts[i:i + FAN_IN]) for i in range(0, len(parts), FAN_IN)]
    return parts[0]


def _blocks(arr, k):
    if arr is None:
        return [None] * k
    return list(arr.to_delayed()) if _is_frame(arr) else list(arr.to_delayed().ravel())


def _quiet(fn):
    """Run ``fn`` with dask's hint about computing graph- and expression-backed collections together
    silenced (a performance note about how our per-partition tasks are built, not about the result)."""
    import warnings

    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message="Computing mixed collections", category=UserWarning)
        return fn()


def _partition_calls(fn, arrays, extra):
    """(dask, one delayed ``fn(blocks..., start_row, *extra)`` per partition)."""
    dask, _, _ = _dask()
    first = next(a for a in arrays if a is not None)
    k = first.numblocks[0]
    starts = np.concatenate([[0], np.cumsum(first.chunks[0])[:-1]]).astype(int)
    call = dask.delayed(fn, pure=True)
    cols = [_blocks(a, k) for a in arrays]
    return dask, [call(*[c[i] for c in cols], int(starts[i]), *extra) for i in range(k)]


def partition_sums(client, fn, arrays, *extra):
    """sum over partitions of ``fn(block_0, block_1, ..., start_row, *extra)`` (equal-shape float
    vectors), added on the workers; only the sum comes back.  ``arrays``: Dask arrays (or None)
    with the same row chunks."""
    dask, parts = _partition_calls(fn, arrays, extra)
    total = _tree_add(dask, parts)
    return np.asarray(_quiet(lambda: client.compute(total).result()))


def partition_results(client, fn, arrays, *extra):
    """The list of ``fn(blocks..., start_row, *extra)`` per partition (small results only)."""
    _, parts = _partition_calls(fn, arrays, extra)
    return _quiet(lambda: client.gather(client.compute(parts)))


# --------------------------------------------------------------------------- checks
def _check_block(y, w, o, start, fam, for_nll):
    """Validate one partition: (a message naming global rows or None, its weight sum)."""
    try:
        y = fam.check_target(np.asarray(y, dtype=np.float64), for_nll=for_nll)
        if w is not None:
            w = _checks.check_weight(np.asarray(w, dtype=np.float64), y, fam.name)
        if o is not None:
            _checks.check_raw(np.asarray(o, dtype=np.float64), y, f"{fam.name} offset")
    except ValueError as exc:
        return f"rows {start}..{start + np.size(y) - 1} (rows below are counted from {start}): {exc}", np.zeros(7)
    wt = np.ones_like(y) if w is None else w
    pos = wt > 0
    # sums that later steps start from: sum w, sum w y, sum w o (positive-weight rows), n, rows with w != 1
    return None, np.array([wt.sum(), np.dot(wt[pos], y[pos]), 0.0 if o is None else np.dot(wt[pos], np.asarray(o)[pos]),
                           y.size, np.count_nonzero(wt != 1.0),
                           0.0 if o is None or not o.size else -np.min(o), 0.0 if o is None or not o.size else np.max(o)])


def check_rows(client, fam, y, w, o, what, for_nll=False):
    """Validate targets, weights and offsets on the workers, one pass (ValueError naming the rows).

    Returns (sum w, sum w y, sum w o, n, rows with w != 1, -min o, max o) over the rows (w = 1
    without weights, o = 0 without offsets)."""
    out = partition_results(client, _check_block, [y, w, o], fam, for_nll)
    msgs = [m for m, _ in out if m]
    if msgs:
        more = f" (and {len(msgs) - 1} more partitions)" if len(msgs) > 1 else ""
        raise ValueError(f"{what}: {msgs[0]}{more}")
    if int(y.shape[0]) == 0:
        raise ValueError(f"{fam.name}: y is empty; at least one row is needed")
    parts = np.array([t for _, t in out])
    sums = parts.sum(axis=0)
    sums[5:7] = parts[:, 5:7].max(axis=0)  # the offsets' range: -min and max, not sums
    if not sums[0] > 0:
        raise ValueError(f"{fam.name}: the weights sum to {sums[0]}; at least one row needs a positive weight")
    return sums


# --------------------------------------------------------------------------- baseline
def _gh_block(y, w, o, start, fam, c):
    raw = np.full(y.shape, c) if o is None else c + o
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        g, h = fam._grad_hess(np.asarray(y, dtype=np.float64), raw)
    if w is not None:
        g, h = g * w, h * w
    return np.array([g.sum(), h.sum()])


def _start_guess(client, fam, y, w, o, sums=None):
    """A first raw score: the link of the weighted mean target, minus the weighted mean offset
    (``sums``: ``check_rows``'s, else one pass)."""
    if sums is None:
        sums = check_rows(client, fam, y, w, o, "data")
    sw, sy, so = sums[0], sums[1], sums[2]
    with np.errstate(all="ignore"):
        c = float(fam.link_function._forward(np.float64(sy / sw))) - so / sw
    return c if math.isfinite(c) else 0.0


def smooth_baseline(client, fam, y, w, o, stats=None, sums=None):
    """The root of the summed gradient in the constant raw score (module docstring)."""
    stats = {"passes": 0} if stats is None else stats
    if sums is None:
        stats["passes"] += 1
    c = _start_guess(client, fam, y, w, o, sums)
    lo, hi = -math.inf, math.inf  # G(lo) < 0 < G(hi)
    last = None  # (c, H, step) of the previous pass
    for _ in range(NEWTON_STEPS):
        G, H = partition_sums(client, _gh_block, [y, w, o], fam, c)
        stats["passes"] += 1
        if not math.isfinite(G):
            raise ValueError(f"{fam.name}: the gradient is not finite at the raw score {c:g}; no baseline")
        if G == 0:
            return c
        if G < 0:
            lo = c
        else:
            hi = c
        newton = H > 0 and math.isfinite(H)
        step = -G / H if newton else -math.copysign(1.0, G)
        ulp4 = 4 * np.spacing(max(abs(c), 1e-300))
        if abs(step) <= ulp4:
            return c + step
        if newton and last is not None and last[2] != 0 and abs(step) < 1e-3 * abs(last[2]):
            # converging quadratically: the error left after this step is about |H'| step^2 / (2 H), H' the
            # slope of the summed Hessian between the last two points; when that is below 4 ulp, the
            # confirming pass would only move c by rounding (saves one pass of the usual 4-5)
            slope = abs(H - last[1]) / abs(c - last[0])
            if slope * step * step / (2 * H) <= ulp4 and lo < c + step < hi:
                return c + step
        last = (c, H, step) if newton else None
        new = c + step
        if not (lo < new < hi):
            if math.isinf(lo) or math.isinf(hi):  # expand towards the sign change
                new = c + math.copysign(max(1.0, 2 * abs(step) if math.isfinite(step) else 1.0), -G)
            else:
                new = 0.5 * (lo + hi)
        if abs(new - c) <= 4 * np.spacing(max(abs(c), 1e-300)) or (hi - lo) <= 4 * np.spacing(max(abs(lo), abs(hi))):
            return new
        c = new
    raise ValueError(f"{fam.name}: the baseline search did not converge in {NEWTON_STEPS} passes")


def _bracket_block(v, w, start, lo, hi, room, pivots):
    """Rows of one partition with lo < v < hi (positive weight): all of them if at most ``room``,
    else their count, their weight and ``pivots`` evenly spaced order statistics."""
    v = np.asarray(v, dtype=np.float64)
    keep = (v > lo) & (v < hi)
    if w is not None:
        keep &= w > 0
    vals = v[keep]
    wts = None if w is None else np.asarray(w)[keep]
    if vals.size <= room:
        return ("rows", vals, wts)
    s = np.sort(vals)
    idx = np.unique(np.linspace(0, s.size - 1, pivots).round().astype(int))
    return ("sketch", s[idx], vals.size)


def _below_block(v, w, start, points):
    """Weight of the partition's rows at or below each point (positive-weight rows only)."""
    v = np.asarray(v, dtype=np.float64)
    if w is None:
        s = np.sort(v)
        return np.searchsorted(s, points, side="right").astype(np.float64)
    keep = w > 0
    order = np.argsort(v[keep], kind="stable")
    s, cw = v[keep][order], np.concatenate([[0.0], np.cumsum(np.asarray(w)[keep][order])])
    return cw[np.searchsorted(s, points, side="right")]


def _select(client, v, w, pred, lo, f_lo, hi, stats):
    """The smallest data value x in (lo, hi) whose cumulative weight F(x) satisfies ``pred``, or
    ``hi`` when there is none (``hi`` qualifies; F(lo) = f_lo does not).  Returns (x, F(x))."""
    k = v.numblocks[0]
    f_hi = None
    while True:
        room = max(SELECT_GATHER // k, 1)
        out = partition_results(client, _bracket_block, [v, w], lo, hi, room, max(SELECT_PIVOTS // k, 8))
        stats["passes"] += 1
        if all(r[0] == "rows" for r in out):
            vals = np.concatenate([r[1] for r in out])
            wts = np.ones(vals.size) if w is None else np.concatenate([r[2] for r in out])
            stats["gathered"] = max(stats["gathered"], int(vals.size))
            if vals.size == 0:
                return hi, f_hi
            order = np.argsort(vals, kind="stable")
            vals, cw = vals[order], f_lo + np.cumsum(wts[order])
            # F at a value counts all its tied rows: the last cumulative weight of each run
            last = np.r_[vals[1:] != vals[:-1], True]
            uv, fv = vals[last], cw[last]
            ok = np.flatnonzero([pred(f) for f in fv])
            if ok.size == 0:
                return hi, f_hi
            return float(uv[ok[0]]), float(fv[ok[0]])
        points = np.unique(np.concatenate([r[1] for r in out]))
        below = partition_sums(client, _below_block, [v, w], points)
        stats["passes"] += 1
        good = np.flatnonzero([pred(f) for f in below])
        bad = np.flatnonzero([not pred(f) for f in below])
        if good.size:
            hi, f_hi = float(points[good[0]]), float(below[good[0]])
        bad = bad[points[bad] < hi]
        if bad.size:
            lo, f_lo = float(points[bad[-1]]), float(below[bad[-1]])


def weighted_quantile(client, v, w, q, stats=None, total=None):
    """The weighted q-quantile of the Dask array ``v`` (weights ``w`` or None, same chunks) by the
    midpoint definition of ``lossfam._boost.quantiles``, exactly (module docstring).  ``total``:
    the weight of the positive-weight rows when known (else one pass)."""
    stats = {"passes": 0, "gathered": 0} if stats is None else stats
    if total is None:
        total = float(partition_sums(client, lambda vb, wb, s: np.array([vb.size if wb is None else np.sum(wb[wb > 0])]),
                                     [v, w])[0])
        stats["passes"] += 1
    if not total > 0:
        raise ValueError("no row of positive weight")
    target, tol = q * total, TIE_TOL * total
    x_lo, f_lo = _select(client, v, w, lambda f: f >= target - tol, -math.inf, 0.0, math.inf, stats)
    if f_lo is not None and f_lo > target + tol:
        return x_lo
    x_hi, _ = _select(client, v, w, lambda f: f > target + tol, x_lo, f_lo, math.inf, stats)
    if x_hi is None or math.isinf(x_hi):  # no value beyond: as on one machine, the largest value
        x_hi = x_lo
    return 0.5 * (x_lo + x_hi)


def engine_start(client, fam, engine, y, w, o, stats, n):
    """``facts.engine_start`` on the cluster: where ``engine``'s built-in median / quantile objective
    starts (its sample quantile of ``y - o`` in single precision), from exact order statistics found
    by selection; None where the engine falls back to the family's baseline (or for other families).
    Both engines keep their labels in float32 (local training reads them back so): the targets are
    rounded to float32 before the offset is taken off, as on one machine."""
    level = facts.leaf_level(fam)
    if level is None or engine is None:
        return None
    definition = facts.renewal_definition(engine, weighted=w is not None)
    if definition == "midpoint":
        return None
    y32 = y.astype(np.float32).astype(np.float64)
    v = (y32 if o is None else y32 - o).astype(np.float32)
    inf = math.inf
    if definition == "lower":
        w32 = None if w is None else w.astype(np.float32).astype(np.float64)
        total = float(partition_sums(client, lambda vb, wb, s: np.array([vb.size if wb is None else np.sum(wb[wb > 0])]),
                                     [v, w32])[0])
        stats["passes"] += 1
        target = float(np.float32(level)) * total
        return _select(client, v, w32, lambda f: f >= target, -inf, 0.0, inf, stats)[0]
    ranks, combine = single_precision_plan(definition, n, level)
    values, lo, f_lo = {}, -inf, 0.0
    for r in sorted(set(ranks)):  # the (r + 1)-th smallest value: the first whose count reaches r + 1
        if lo > -inf and f_lo >= r + 1:
            values[r] = lo
            continue
        lo, f_lo = _select(client, v, None, lambda f, r=r: f >= r + 1, lo, f_lo, inf, stats)
        values[r] = lo
    return combine(*(np.float32(values[r]) for r in ranks))


def cluster_baseline(client, fam, y, w, o, level, stats, sums=None):
    """``family.baseline(y, w, offset=o)`` on the cluster: quantile by selection, else Newton
    (``sums``: ``check_rows``'s)."""
    if level is not None:
        v = y if o is None else y - o
        return weighted_quantile(client, v, w, level, stats, None if sums is None else float(sums[0]))
    return smooth_baseline(client, fam, y, w, o, stats, sums)


# --------------------------------------------------------------------------- nuisance fit, metric
def _local_fit_block(y, w, raw, start, fam):
    """The family's own fit on one partition: which parameters it fits, and a starting point."""
    y = np.asarray(y, dtype=np.float64)
    try:
        wt = np.ones_like(y) if w is None else np.asarray(w, dtype=np.float64)
        with np.errstate(all="ignore"):
            return dict(fam._fit_nuisance(y, np.asarray(raw, dtype=np.float64), wt))
    except (ValueError, FloatingPointError, ZeroDivisionError):
        return None


class PartitionRows:
    """The training rows as Dask arrays ``y``, ``w`` (or None), ``raw`` with the same row chunks:
    each pass is one task per partition (``partition_sums``)."""

    def __init__(self, client, y, w, raw):
        self.client, self.y, self.w, self.raw = client, y, w, raw

    def sums(self, fn, *extra):
        """sum over partitions of ``fn(y, w, raw, start_row, *extra)``."""
        return partition_sums(self.client, fn, [self.y, self.w, self.raw], *extra)

    @property
    def blocks(self):
        return self.y.numblocks[0]

    def own_fit(self, fam, i):
        """The family's own nuisance fit on partition ``i`` (None when it fails)."""
        dask, _, _ = _dask()
        blocks = [self.y.to_delayed().ravel()[i], _blocks(self.w, self.y.numblocks[0])[i],
                  self.raw.to_delayed().ravel()[i]]
        return self.client.compute(dask.delayed(_local_fit_block, pure=True)(*blocks, 0, fam)).result()


def fit_nuisance(client, fam, y, w, raw, stats=None, first=None, rows=None):
    """Maximum-likelihood nuisance parameters at the raw scores ``raw`` (Dask array), on the cluster.

    The parameters fitted are those the family's own fit returns (asymmetric
    laplace fits its scale, not its quantile level): that fit is run on one
    partition on a worker, which also gives the starting point.  Then the
    weighted mean nll over all partitions is minimised over their logs, one
    pass per evaluation.  Keeps the given parameters where no finite maximum
    exists (as ``fit_nuisance_or_keep``).  ``first``: that fit on the first partition when an
    earlier pass has run it (``check_trained``).  ``rows``: where the passes run, a
    ``PartitionRows`` (the default, from ``y``, ``w``, ``raw``) or the ``KeptRows`` of a training
    (then ``y``, ``w``, ``raw`` are not used)."""
    if not fam.params:
        return fam
    stats = {} if stats is None else stats
    stats.setdefault("nuisance_passes", 0)
    rows = PartitionRows(client, y, w, raw) if rows is None else rows
    local = first
    for i in range(1 if first else 0, min(rows.blocks, 4)):  # the first block where the family's own fit succeeds
        if local:
            break
        local = rows.own_fit(fam, i)
        stats["nuisance_passes"] += 1
    if not local:
        return fam
    names = sorted(local)
    start = np.array([math.log(float(local[n])) if float(local[n]) > 0 else math.log(float(fam.params[n]))
                      for n in names])

    best = _newton_fd(rows, fam, names, start, stats)
    if best is None:  # no convergence by Newton steps: a derivative-free search, one pass per evaluation
        best = _search(rows, fam, names, start, stats)
    if best is None or not np.all(np.isfinite(best)):
        return fam
    try:
        return fam.with_params(**dict(zip(names, np.exp(best))))
    except ValueError:
        return fam


def _nll_many_block(y, w, raw, start, fams):
    """Weighted nll sums of one partition for several parameter values (one pass, several points)."""
    y = np.asarray(y, dtype=np.float64)
    raw = np.asarray(raw, dtype=np.float64)
    keep = None if w is None else w > 0  # rows of weight 0 take no part (their term may be inf)
    out = np.empty(len(fams) + 1)
    for i, f in enumerate(fams):
        if f is None:
            out[i] = np.inf
            continue
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            per = f._nll(y, raw)
        out[i] = per.sum() if w is None else np.dot(w[keep], per[keep])
    out[-1] = y.size if w is None else np.sum(w[keep])
    return out


def _mean_nll_at(rows, fam, names, points, stats):
    """The weighted mean nll at several log-parameter points, in one pass over ``rows``."""
    fams = []
    for p in points:
        try:
            fams.append(fam.with_params(**dict(zip(names, np.exp(p)))))
        except ValueError:
            fams.append(None)
    sums = rows.sums(_nll_many_block, fams)
    stats["nuisance_passes"] += 1
    with np.errstate(invalid="ignore"):
        vals = sums[:-1] / sums[-1]
    return np.where(np.isfinite(vals), vals, np.inf)


#: finite-difference steps in the log-parameters: a first coarse one, then the fine one
FD_STEPS = (1e-2, 1e-4)
NUISANCE_TOL = 1e-9


def _newton_fd(rows, fam, names, start, stats, max_passes=30):
    """Newton steps on the log-parameters with central-difference derivatives of the mean nll; the
    1 + 2d + 2d(d-1) evaluations of one step take one pass.  The central differences are off by
    O(h^2) in the derivatives, so the fine step h = 1e-4 places the minimum to about 1e-8 in
    the log-parameters (1e-8 relative); a step that does not lower the nll is halved.  None when
    the curvature is not positive or it does not settle."""
    d = len(names)
    x = np.array(start, dtype=np.float64)
    eye = np.eye(d)
    f_x = None
    h_i = 0
    last_size = None
    for _ in range(max_passes):
        h = FD_STEPS[h_i]
        pts = [x]
        for i in range(d):
            pts += [x + h * eye[i], x - h * eye[i]]
        for i in range(d):
            for j in range(i + 1, d):
                for si, sj in ((1, 1), (1, -1), (-1, 1), (-1, -1)):
                    pts.append(x + h * (si * eye[i] + sj * eye[j]))
        v = _mean_nll_at(rows, fam, names, pts, stats)
        if f_x is not None and v[0] > f_x:  # the last step went uphill: go back half-way
            x = 0.5 * (x + x_prev)
            continue
        if not np.all(np.isfinite(v)):
            return None
        f_x = v[0]
        g = np.array([(v[1 + 2 * i] - v[2 + 2 * i]) / (2 * h) for i in range(d)])
        H = np.diag([(v[1 + 2 * i] - 2 * v[0] + v[2 + 2 * i]) / (h * h) for i in range(d)])
        k = 1 + 2 * d
        for i in range(d):
            for j in range(i + 1, d):
                pp, pm, mp, mm = v[k:k + 4]
                H[i, j] = H[j, i] = (pp - pm - mp + mm) / (4 * h * h)
                k += 4
        try:
            if np.linalg.eigvalsh(H).min() <= 0:
                return None
            step = -np.linalg.solve(H, g)
        except np.linalg.LinAlgError:
            return None
        step = np.clip(step, -1.0, 1.0)
        x_prev, x = x, x + step
        size = float(np.max(np.abs(step)))
        if h_i + 1 < len(FD_STEPS):
            if size < 10 * h:
                h_i += 1  # close: the fine difference step from here on
        elif size <= NUISANCE_TOL:
            return x
        elif last_size is not None and size < 1e-2 * last_size and size * size * size / (last_size * last_size) <= NUISANCE_TOL:
            # converging quadratically (error_k+1 ~ C error_k^2, C ~ size / last_size^2): the step left after
            # this one, about C size^2, is below the tolerance; the confirming pass is skipped
            return x
        last_size = size if h_i + 1 == len(FD_STEPS) else None
    return None


def _search(rows, fam, names, start, stats):
    from scipy import optimize

    def objective(logp):
        return float(_mean_nll_at(rows, fam, names, [np.atleast_1d(logp)], stats)[0])

    if len(names) == 1:
        res = optimize.minimize_scalar(lambda t: objective(np.array([t])), bracket=(start[0] - 0.1, start[0] + 0.1),
                                       method="brent", tol=1e-9)
        return np.array([res.x])
    res = optimize.minimize(objective, start, method="Nelder-Mead",
                            options={"xatol": 1e-8, "fatol": 1e-14, "maxiter": 2000})
    return res.x


def _metric_block(y, w, raw, start, scorer):
    return np.array(scorer.sums(np.asarray(y, dtype=np.float64), np.asarray(raw, dtype=np.float64),
                                None if w is None else np.asarray(w, dtype=np.float64)))


def mean_loss(client, fam, kind, y, w, raw):
    """The weighted mean nll (or unit deviance) of Dask arrays, summed on the workers."""
    num, den = partition_sums(client, _metric_block, [y, w, raw], Scorer(fam, kind))
    return float(num / den) if den > 0 else float("nan")


def _trained_block(raw, start, fam):
    raw = np.asarray(raw, dtype=np.float64)
    link = fam.link_function
    with np.errstate(over="ignore", invalid="ignore"):
        bad = ~np.isfinite(raw)
        if not bad.any():
            bad = ~link.prediction_domain.inside(link.inverse(raw))
    idx = np.flatnonzero(bad)
    return np.concatenate([[idx.size], (idx[:5] + start).astype(np.float64), np.full(5 - min(idx.size, 5), -1.0)])


def _trained_fit_block(raw, y, w, start, fam, fit_first):
    """``_trained_block``, and on the first partition (``fit_first``) the family's own nuisance fit there."""
    bad = _trained_block(raw, start, fam)
    return bad, (_local_fit_block(y, w, raw, start, fam) if fit_first and start == 0 else None)


def check_trained(client, fam, raw, y=None, w=None):
    """Refuse trained raw scores that are not finite or leave the link's range (rows named).

    Given ``y`` (and ``w``), the same pass also runs the family's own nuisance fit on the first
    partition and returns it (``fit_nuisance``'s ``first``); else returns None."""
    if y is None:
        out = partition_results(client, _trained_block, [raw], fam)
        first = None
    else:
        both = partition_results(client, _trained_fit_block, [raw, y, w], fam, True)
        out, first = [b for b, _ in both], both[0][1]
    count = int(sum(r[0] for r in out))
    if count:
        rows = [int(x) for r in out for x in r[1:] if x >= 0][:5]
        raise ValueError(f"{fam.name}: training diverged: the trained model's raw scores at {count} training rows "
                         f"(e.g. rows {rows}) are not finite or leave the {fam.link_function.name} link's range; "
                         "use a smaller learning rate (or a step_limit)")
    return first


# --------------------------------------------------------------------------- scores kept from the engine's training
#: per process: (training token, worker address) -> ``Kept``, filled on the workers during an engine's
#: training (``keep_scores``), read by ``KeptRows``' tasks, emptied by ``KeptRows.drop``.  The address
#: is part of the key: ``LocalCluster(processes=False)`` runs several workers in one process.
_KEPT = {}


@dataclasses.dataclass
class Kept:
    """One worker's training rows as its engine trained them, float64: the trained raw scores (start
    and offset included); the targets and weights handed to the engine (y None: not kept; w None:
    unweighted); the model rounds the scores include."""

    raw: np.ndarray
    y: object
    w: object
    rounds: int


def _worker_address():
    try:
        from distributed import get_worker

        return get_worker().address
    except (ImportError, ValueError):
        return None


def keep_scores(token, raw, y, w, rounds):
    """On a worker, inside the engine's training: keep its rows' trained raw scores (and ``y``, ``w``)
    under ``token``.  Returns False (nothing kept) outside a dask worker."""
    address = _worker_address()
    if address is None:
        return False
    _KEPT[(token, address)] = Kept(np.asarray(raw, dtype=np.float64), y, w, int(rounds))
    return True


def _kept_census(token, dask_worker=None):
    kept = _KEPT.get((token, dask_worker.address))
    return None if kept is None else (int(kept.raw.size), kept.rounds, kept.y is not None)


def _kept_drop(token, dask_worker=None):
    _KEPT.pop((token, dask_worker.address), None)


def _kept_arrays(token, lo, hi):
    kept = _KEPT.get((token, _worker_address()))
    if kept is None:  # (the census found it; only a restarted worker loses it)
        raise RuntimeError("the trained scores kept on this worker are gone")
    sl = slice(lo, hi)
    return (None if kept.y is None else kept.y[sl]), (None if kept.w is None else kept.w[sl]), kept.raw[sl]


def _kept_sums(token, fn, extra):
    y, w, raw = _kept_arrays(token, None, None)
    return np.asarray(fn(y, w, raw, 0, *extra), dtype=np.float64)


def _kept_fit(token, lo, hi, fam):
    y, w, raw = _kept_arrays(token, lo, hi)
    return _local_fit_block(y, w, raw, 0, fam)


def _kept_check(token, fam, fit_rows):
    """A worker's count of bad trained scores, and with ``fit_rows`` the family's own nuisance fit on
    its first ``fit_rows`` rows."""
    y, w, raw = _kept_arrays(token, None, None)
    bad = int(_trained_block(raw, 0, fam)[0])
    if not fit_rows or bad:
        return bad, None
    return bad, _local_fit_block(y[:fit_rows], None if w is None else w[:fit_rows], raw[:fit_rows], 0, fam)


class KeptRows:
    """The training rows as the engine's training left them on the workers (``keep_scores``): the
    trained raw scores with the float64 targets and weights, one array each per worker.  Used in
    place of ``PartitionRows`` with the raw scores predicted: a pass is one task per worker, pinned
    to it.  ``block_rows``: rows per block of the family's own nuisance fit (the first partition's
    length, as on the partition path).  ``drop`` empties the workers' store (always call it)."""

    def __init__(self, client, token, block_rows):
        self.client, self.token, self.block_rows = client, token, max(int(block_rows), 1)
        self.rounds = None  # the rounds of the final model (set by the engine adapter after training)
        self.unusable = None  # or why the adapter knows the kept scores do not fit the final model
        self.sizes = {}
        self.dropped = False

    def _submit(self, address, fn, *args):
        return self.client.submit(fn, self.token, *args, workers=[address], allow_other_workers=False, pure=False)

    def check(self, fam, n, need_targets, stats):
        """Check the kept scores of all ``n`` training rows (``check_trained``'s test) and, with
        ``need_targets``, run the family's own nuisance fit on the first worker's first block in
        the same pass.  Returns (True, that fit) when the kept rows can stand in for the predicted
        ones, else (False, None), with the reason in ``stats["kept"]``: ``unusable`` set by the
        adapter (e.g. early stopping cut the model); some worker lacks its kept rows or they belong
        to a model of other rounds ("incomplete"); a row is bad ("bad rows": the prediction pass
        then names the rows)."""
        if self.unusable is not None or self.rounds is None:
            stats["kept"] = self.unusable or "incomplete"
            return False, None
        census = self.client.run(_kept_census, self.token)
        held = {a: c for a, c in census.items() if c is not None and c[0] > 0}
        if (sum(c[0] for c in held.values()) != n
                or any(c[1] != self.rounds or (need_targets and not c[2]) for c in held.values())):
            stats["kept"] = "incomplete"
            return False, None
        self.sizes = {a: held[a][0] for a in sorted(held)}
        first = next(iter(self.sizes))
        futures = [self._submit(a, _kept_check, fam, self.block_rows if need_targets and a == first else 0)
                   for a in self.sizes]
        out = self.client.gather(futures)
        if sum(bad for bad, _ in out):
            stats["kept"] = "bad rows"
            return False, None
        stats["kept"] = "used"
        return True, out[0][1]

    @property
    def blocks(self):
        """Blocks of ``block_rows`` rows, over the workers in turn (``own_fit``)."""
        return sum(-(-size // self.block_rows) for size in self.sizes.values())

    def own_fit(self, fam, i):
        """The family's own nuisance fit on block ``i``: worker ``i % workers``, its rows
        ``[k m, (k + 1) m)`` with k = i // workers, m = ``block_rows`` (None when it fails or
        that worker has fewer rows)."""
        addresses = list(self.sizes)
        address, k = addresses[i % len(addresses)], i // len(addresses)
        lo = k * self.block_rows
        if lo >= self.sizes[address]:
            return None
        return self._submit(address, _kept_fit, lo, lo + self.block_rows, fam).result()

    def sums(self, fn, *extra):
        """sum over workers of ``fn(y, w, raw, 0, *extra)`` on each worker's kept rows."""
        parts = self.client.gather([self._submit(a, _kept_sums, fn, extra) for a in self.sizes])
        return np.sum(parts, axis=0)

    def drop(self):
        """Remove the kept arrays from every worker (once)."""
        if not self.dropped:
            self.client.run(_kept_drop, self.token)
            self.dropped = True


# --------------------------------------------------------------------------- the plan
@dataclasses.dataclass
class ClusterPlan:
    """The start of training on a cluster (the counterpart of ``plan.StartPlan``)."""

    client: object
    family: object
    baseline: float
    X: object
    y: object
    weight: object
    offset: object
    start: object  # Dask array: baseline + offset per row
    stats: dict
    offset_range: tuple = (0.0, 0.0)

    def start_for(self, data: ClusterData, what):
        """(X, y, w, o, start) of a validation set: its start is baseline + its offset."""
        with timed(self.stats, "valid_starts"):
            X, y, w, o = data.aligned(self.client)
            check_rows(self.client, self.family, y, w, o, what)
        if self.offset is not None and o is None:
            raise ValueError(f"training used an offset but {what} has none: its metric would score the rows without "
                             "their offset; give it one (zeros where there truly is none)")
        return X, y, w, o, starts_of(y, o, self.baseline)


def starts_of(y, o, baseline):
    return (y * 0.0 + baseline) if o is None else (o + baseline)


def cluster_path(fam, engine, engine_name, step_limit, native, params, refits=()):
    """(guard, twin) of a cluster training: the step guard, and the native twin's parameters or None;
    a family whose leaves need lossfam's refit (no twin used) is refused (``refuse_refit``) unless
    its leaf rule is in ``refits`` (the rules the engine adapter refits on the cluster)."""
    from .gradients import resolve_guard

    guard = resolve_guard(fam, step_limit)
    twin = facts.chosen_twin(fam, engine, engine_name, native=native,
                             guard_is_default=guard == resolve_guard(fam, "auto"), params=params)
    if twin is None and facts.leaf_rule(fam) != "newton" and facts.leaf_rule(fam) not in refits:
        refuse_refit(fam, engine_name)
    return guard, twin


def cluster_plan(client, fam, data: ClusterData, level, *, prefit=True, precision=np.float64, engine=None,
                 drop_unit_weights=False) -> ClusterPlan:
    """Baseline given offset and weights, starting scores and the pre-fit, computed on the workers
    (as ``plan.start_plan``: with ``engine``, a median / quantile family starts where that engine's
    built-in starts).  ``drop_unit_weights``: weights that are all 1 count as none (LightGBM's rule)."""
    stats = {"passes": 0, "gathered": 0, "seconds": {}}
    with timed(stats, "data"):
        X, y, w, o = data.aligned(client)
    with timed(stats, "checks"):
        sums = check_rows(client, fam, y, w, o, "data")
    if drop_unit_weights and w is not None and sums[4] == 0:
        w = None
    with timed(stats, "baseline"):
        own = engine_start(client, fam, engine, y, w, o, stats, int(sums[3]))
        baseline = float(precision(cluster_baseline(client, fam, y, w, o, level, stats, sums) if own is None else own))
    if not math.isfinite(baseline):
        raise ValueError(f"{fam.name}: no finite constant raw score minimises the nll for these targets")
    with timed(stats, "starts"):
        start = client.persist(starts_of(y, o, baseline))
    if prefit and fam.location_needs_nuisance and fam.params:
        with timed(stats, "prefit"):
            fam = fit_nuisance(client, fam, y, w, start, stats)
    return ClusterPlan(client, fam, baseline, X, y, w, o, start, stats, (-float(sums[5]), float(sums[6])))


# --------------------------------------------------------------------------- lazy predictions
def _predict_block(fit, xb, ob):
    return fit.predict_raw(xb, None if ob is None else np.asarray(ob, dtype=np.float64).reshape(-1))


def _predict_part(fit, part, ob):
    return _series(_predict_block(fit, part, ob), part.index)


def predict_raw(fit, X, offset=None, lengths=None):
    """Lazy raw scores of a Dask array (rows chunked) or DataFrame: the model goes to the workers
    once (one task every partition reads), each partition predicts its rows there.

    A Dask array gives a Dask array; a DataFrame a Dask Series (or, given the
    partition ``lengths``, a Dask array).  ``offset``: a Dask array or Series
    with one block per partition of X, or (for a Dask array X) numpy."""
    dask, da, _ = _dask()
    fitd = dask.delayed(fit, pure=True, traverse=False)
    frame = _is_frame(X)
    if frame:
        xs = list(X.to_delayed())
        sizes = lengths
    else:
        if X.ndim != 2:
            raise ValueError(f"X must be two-dimensional, got shape {X.shape}")
        if X.numblocks[1] != 1:
            X = X.rechunk({1: -1})
        xs = list(X.to_delayed().ravel())
        sizes = X.chunks[0]
    os_ = [None] * len(xs)
    if offset is not None:
        if not is_dask_collection(offset):
            if frame:
                raise TypeError("with a Dask DataFrame, give the offset as a Dask Series or array partitioned like it")
            offset = da.from_array(np.asarray(offset, dtype=np.float64).reshape(-1), chunks=(X.chunks[0],))
        if hasattr(offset, "to_dask_array") and not frame:
            offset = offset.to_dask_array(lengths=True)
        if not frame:
            if offset.shape[0] != X.shape[0]:
                raise ValueError(f"offset has {offset.shape[0]} rows but X has {X.shape[0]}")
            offset = offset.rechunk((X.chunks[0],))
        os_ = list(offset.to_delayed()) if hasattr(offset, "map_partitions") else list(offset.to_delayed().ravel())
        if len(os_) != len(xs):
            raise ValueError(f"the offset has {len(os_)} partitions, X has {len(xs)}: partition them alike")
    if frame and sizes is None:
        import dask.dataframe as dd

        call = dask.delayed(_predict_part, pure=True)
        return dd.from_delayed([call(fitd, xb, ob) for xb, ob in zip(xs, os_)], meta=_series(np.empty(0), None))
    call = dask.delayed(_predict_block, pure=True)
    parts = [da.from_delayed(call(fitd, xb, ob), shape=(int(n),), dtype=np.float64)
             for xb, ob, n in zip(xs, os_, sizes)]
    return da.concatenate(parts)


def _series(values, index):
    import pandas as pd

    return pd.Series(np.asarray(values, dtype=np.float64), index=index, name="raw")


def inverse_link_lazy(fam, raw):
    """The inverse link applied partition by partition (a Dask array or Series stays lazy)."""
    inv = fam.link_function.inverse
    if hasattr(raw, "map_partitions"):
        return raw.map_partitions(lambda s: s.__class__(inv(s.to_numpy()), index=s.index, name=s.name),
                                  meta=raw._meta)
    return raw.map_blocks(inv, dtype=np.float64)


# --------------------------------------------------------------------------- after the trees
def _range_is_fine(fam, plan, tree_range):
    """True when every raw score the model can give the training rows (baseline + offset + the
    trees' smallest to largest sums of leaves) is finite and inside the link's range."""
    lo = plan.baseline + plan.offset_range[0] + tree_range[0]
    hi = plan.baseline + plan.offset_range[1] + tree_range[1]
    if not (math.isfinite(lo) and math.isfinite(hi)):
        return False
    link = fam.link_function
    with np.errstate(over="ignore", invalid="ignore"):
        return bool(np.all(link.prediction_domain.inside(link.inverse(np.array([lo, hi])))))


def finish(plan: ClusterPlan, fit, valids, valid_names, nuisance_set, metric_kind, tree_range=None, kept=None):
    """Check the trained scores, fit the nuisance parameters (training rows, or the valid set
    ``nuisance_set``) and score the valid sets, all on the workers; sets ``fit.fitted_family`` and
    ``fit.info["cluster"]``.  ``valids``: list of ``ClusterPlan.start_for`` tuples.

    ``tree_range``: the smallest and largest sum of leaf values the trees can give a row (the
    engine adapter reads it from the model).  When no nuisance fit needs the training rows' raw
    scores and that range, plus the baseline and the offsets' range, stays finite and inside the
    link's range, no row can fail the check, and the pass that predicts every training row is
    skipped (local training checks the engine's own training output, which costs nothing).

    ``kept``: the ``KeptRows`` of this training (the engine's own trained scores left on the
    workers), used in place of predicting every training row when they cover all rows of the
    final model and pass the check (else the rows are predicted, and a bad row is named as
    always); dropped from the workers here, also on errors."""
    client, fam, stats = plan.client, plan.family, plan.stats
    need_rows = bool(fam.params) and nuisance_set is None
    try:
        rows = first = None
        if not need_rows and tree_range is not None and _range_is_fine(fam, plan, tree_range):
            with timed(stats, "trained_check"):
                stats["trained_check"] = "bounds"  # no row can be off: no pass over the rows needed
        else:
            if kept is not None:
                with timed(stats, "kept_scores"):
                    usable, first = kept.check(fam, int(plan.y.shape[0]), need_rows, stats)
                if usable:
                    rows, stats["trained_check"] = kept, "kept"
            if rows is None:
                with timed(stats, "trained_check"):
                    raw = client.persist(predict_raw(fit, plan.X, plan.offset, lengths=plan.y.chunks[0]))
                    first = check_trained(client, fam, raw, *((plan.y, plan.weight) if need_rows else ()))
                    stats["trained_check"] = "rows"
                rows = PartitionRows(client, plan.y, plan.weight, raw)
        with timed(stats, "nuisance"):
            if not fam.params:
                fitted = fam
            elif nuisance_set is None:
                fitted = fit_nuisance(client, fam, plan.y, plan.weight, None, stats, first=first, rows=rows)
            else:
                X, y, w, o, _ = valids[int(nuisance_set)]
                fitted = fit_nuisance(client, fam, y, w, predict_raw(fit, X, o, lengths=y.chunks[0]), stats)
    finally:
        if kept is not None:
            with timed(stats, "kept_scores"):
                kept.drop()
    fit.fitted_family = fitted
    metrics = stats.pop("valid_metrics", None)
    if metrics is None:  # (early stopping has scored them already, round by round)
        metrics = {}
        with timed(stats, "valid_metrics"):
            for (X, y, w, o, _), name in zip(valids, valid_names):
                metrics[name] = mean_loss(client, fam, metric_kind, y, w, predict_raw(fit, X, o, lengths=y.chunks[0]))
    fit.info["cluster"] = cluster_info(plan, client, metrics)
    return fit


# --------------------------------------------------------------------------- best round
#: rows per block when a partition's raw scores are built round by round
CURVE_ROWS = 8192


def _curve_block(y, w, start, X, row0, leaves, tables, scorer):
    """(sum w loss, sum w) after each round for one partition: ``leaves(X)`` gives the rows' leaf
    index in every tree (n, T), ``tables[t]`` tree t's leaf values; the raw score after round t is
    the start plus the cumulative sum of the rows' leaf values up to tree t."""
    L = np.asarray(leaves(X))
    y = np.asarray(y, dtype=np.float64)
    start = np.asarray(start, dtype=np.float64)
    T = len(tables)
    out = np.zeros((T, 2))
    for r0 in range(0, y.size, CURVE_ROWS):
        sl = slice(r0, r0 + CURVE_ROWS)
        raw = start[sl, None] + np.cumsum(np.column_stack([tables[t][L[sl, t]] for t in range(T)]), axis=1)
        wb = None if w is None else np.asarray(w, dtype=np.float64)[sl]
        for t in range(T):
            out[t] += scorer.sums(y[sl], raw[:, t], wb)
    return out.ravel()


def round_curves(client, fam, kind, valid, leaves, tables):
    """The weighted mean nll (or deviance) of a valid set (a ``ClusterPlan.start_for`` tuple) after
    each round, in one pass over its partitions: only 2 numbers per round come back."""
    dask, _, _ = _dask()
    X, y, w, _, start = valid
    leaves, tables = (dask.delayed(v, pure=True, traverse=False) for v in (leaves, tables))  # sent once, shared
    sums = partition_sums(client, _curve_block, [y, w, start, X], leaves, tables, Scorer(fam, kind)).reshape(-1, 2)
    with np.errstate(invalid="ignore", divide="ignore"):
        return sums[:, 0] / sums[:, 1]


def best_round(curves, stopping_rounds, min_delta=0.0):
    """The round LightGBM's ``early_stopping`` callback keeps (0-based), replayed on per-round metric
    curves (lower is better): per round and valid set in order, a score below the set's best minus
    ``min_delta`` becomes its best; the first set whose best is ``stopping_rounds`` rounds old stops
    training at its best; at the last round the first set's best is kept."""
    T = len(curves[0])
    best_score, best_iter = [None] * len(curves), [0] * len(curves)
    for it in range(T):
        for i, c in enumerate(curves):
            if best_score[i] is None or c[it] < best_score[i] - min_delta:
                best_score[i], best_iter[i] = c[it], it
            if it - best_iter[i] >= stopping_rounds or it == T - 1:
                return best_iter[i]
    return None


def cluster_info(plan, client, metrics):
    """``fit.info["cluster"]``: where the work went.

    ``seconds``: wall seconds of each of lossfam's own steps that ran (``STEPS``, in that order:
    aligning/persisting the data, checking the rows, the baseline, the starting scores, the
    nuisance pre-fit, the valid sets' checks and starts, fetching the model, reading the trees'
    leaf range, checking the trained scores, the nuisance fit, leaf refits, the valid metrics, the
    choice of the best round); ``lossfam_seconds`` their sum; ``engine_seconds`` the engine's
    training call (``lightgbm.dask`` / ``xgboost.dask``: the trees, and with a Python objective
    its gradients); ``overhead`` = lossfam_seconds / engine_seconds."""
    stats = plan.stats
    secs = stats.get("seconds", {})
    engine = float(secs.pop("trees", float("nan")))
    own = {k: round(float(secs[k]), 4) for k in STEPS if k in secs}
    total = float(sum(secs[k] for k in STEPS if k in secs))
    return {
        "partitions": int(plan.y.numblocks[0]), "workers": len(client.scheduler_info().get("workers", {})),
        "baseline_passes": int(stats.get("passes", 0)), "nuisance_passes": int(stats.get("nuisance_passes", 0)),
        "refit_passes": int(stats.get("refit_passes", 0)),
        **({"refit_detail": stats["refit_detail"]} if "refit_detail" in stats else {}),
        "gathered_rows": int(stats.get("gathered", 0)), "valid_metrics": metrics,
        "trained_check": stats.get("trained_check"), "kept_scores": stats.get("kept"),
        **({"valid_curves": stats["valid_curves"], "rounds_trained": stats["rounds_trained"]}
           if "valid_curves" in stats else {}),
        "lossfam_seconds": round(total, 4), "engine_seconds": round(engine, 4),
        "overhead": total / engine if engine > 0 else float("nan"),
        "seconds": own,
    }


def refuse_refit(fam, engine_name):
    """Leaves that lossfam would set in Python by a rule the engine adapter does not run across
    workers (the adapters refit median and quantile leaves there, ``_xgboost_refit`` and
    ``_lightgbm_refit``, but not ``"line_search"`` leaves) are refused on a cluster."""
    twin = bool((fam.native_twins or {}).get(engine_name.lower()))
    how = (f"train with native=True and the default step_limit ({engine_name}'s built-in twin renews the leaves "
           "on the workers)" if twin else f"{fam.name} has no {engine_name} twin")
    raise ValueError(
        f"{fam.name} would set its leaves by the {facts.leaf_rule(fam)!r} rule in Python (native=False, a non-default "
        f"step_limit or no native twin), which lossfam does not run on a {engine_name} Dask cluster (it refits median "
        f"and quantile leaves there): {how}")


# --------------------------------------------------------------------------- leaf refit across workers
class RefitTally:
    """One worker's figures of a cluster leaf refit (both engines' ``_xgboost_refit`` /
    ``_lightgbm_refit`` workers): seconds, of which in the reductions (waits for the other workers
    included), reductions, trees whose leaves were read by the engine's leaf prediction on every
    row, and rows of the other trees read by it (``leaves.leaves_from_scores``)."""

    def __init__(self):
        self.seconds = 0.0
        self.reduce_seconds = 0.0
        self.reductions = 0
        self.by_prediction = 0
        self.rows_by_prediction = 0

    def timed(self, reduce):
        """``reduce`` with its seconds added to ``reduce_seconds``."""
        import time

        def call(*args):
            t0 = time.perf_counter()
            try:
                return reduce(*args)
            finally:
                self.reduce_seconds += time.perf_counter() - t0
        return call

    def detail(self, reductions=None):
        """The figures as ``fit.info["cluster"]["refit_detail"]`` has them."""
        return {"seconds": self.seconds, "reductions": self.reductions if reductions is None else int(reductions),
                "reduce_seconds": self.reduce_seconds, "by_prediction": self.by_prediction,
                "rows_by_prediction": self.rows_by_prediction}


#: a query's bracket rows are gathered once at most this many remain over all workers (fewer when
#: the gather of all queries from all workers would pass ``LEAF_NUMBERS``)
LEAF_GATHER = 256
#: order statistics per worker, query and narrowing round
LEAF_PIVOTS = 16
#: the most numbers per reduction of the first cut (its histogram: two per bucket and leaf) and of
#: the gather (two per row slot, query and worker)
LEAF_NUMBERS = 1 << 16
#: the most buckets per leaf in the first cut
LEAF_CUT_BUCKETS = 1024


class LeafRows:
    """One worker's rows of one tree, sorted by (leaf, value): the local side of ``select_in_leaves``.
    Rows of zero weight take no part (as in ``leaves.leaf_table``)."""

    def __init__(self, leaf, v, w, n_leaves):
        leaf = np.asarray(leaf, dtype=np.intp).reshape(-1)
        v = np.asarray(v, dtype=np.float64).reshape(-1)
        if w is not None:
            w = np.asarray(w, dtype=np.float64).reshape(-1)
            keep = w > 0
            leaf, v, w = leaf[keep], v[keep], w[keep]
        order = np.lexsort((v, leaf))
        self.leaf, self.v = leaf[order], v[order]
        self.w = np.ones_like(self.v) if w is None else w[order]
        ids = np.arange(n_leaves)
        self.starts = np.searchsorted(self.leaf, ids, side="left")
        self.ends = np.searchsorted(self.leaf, ids, side="right")
        self.cw = np.concatenate([[0.0], np.cumsum(self.w)])  # cw[i]: weight of sorted rows before i
        self.n_leaves = n_leaves

    def totals(self):
        """(rows, weight) per leaf."""
        return (self.ends - self.starts).astype(np.float64), self.cw[self.ends] - self.cw[self.starts]

    def bounds(self, j, lo, hi):
        """Index range of leaf ``j``'s rows with lo < v < hi."""
        s, e = self.starts[j], self.ends[j]
        seg = self.v[s:e]
        return s + np.searchsorted(seg, lo, side="right"), s + np.searchsorted(seg, hi, side="left")

    def weight_at_most(self, j, points):
        """Weight of leaf ``j``'s rows with v <= each point."""
        s, e = self.starts[j], self.ends[j]
        return self.cw[s + np.searchsorted(self.v[s:e], points, side="right")] - self.cw[s]


def select_in_leaves(reduce, rank, world, rows: LeafRows, qleaf, target, strict, start=None):
    """Exact selection for many (leaf, target) queries at once, over the rows of all workers.

    Query k asks for the smallest value x among leaf ``qleaf[k]``'s rows whose cumulative weight
    F(x) (all rows of the leaf with value <= x, on every worker) is >= ``target[k]`` (> when
    ``strict[k]``); returns (x, F(x)) per query, (inf, nan) when no value qualifies.  The method
    is the module's baseline selection, vectorised over the queries: a bracket (lo, hi) per query;
    per round every worker sends, per query, all its rows in the bracket when at most
    ``LEAF_GATHER`` remain over all workers (fewer with many queries and workers: ``LEAF_NUMBERS``),
    else ``LEAF_PIVOTS`` evenly spaced order statistics
    of them; a second reduction counts the weight at or below each pivot, and the bracket shrinks
    to neighbouring pivots.  ``reduce(array)`` sums an array over the workers (every worker calls
    it with the same shapes, in the same order: the control flow depends on reduced values only);
    the data sent per round is O(queries x (gather + pivots) x workers), independent of the rows.

    ``start``: (weight below, rows over all workers, done) per query when ``rows`` holds, for each
    query, only the rows above a known cut (``leaf_cut``): F counts from the weight below, the
    first round needs no reduction for the counts, and done queries (no value qualifies) are
    skipped.  Returns (x, F(x), reductions)."""
    qleaf = np.asarray(qleaf, dtype=np.intp)
    target = np.asarray(target, dtype=np.float64)
    strict = np.asarray(strict, dtype=bool)
    m = qleaf.size
    lo, f_lo = np.full(m, -np.inf), np.zeros(m)
    hi, f_hi = np.full(m, np.inf), np.full(m, np.nan)
    x_out, f_out = np.full(m, np.inf), np.full(m, np.nan)
    done = np.zeros(m, dtype=bool)
    known = None
    if start is not None:
        f_lo, known, done = (np.array(a, dtype=t) for a, t in zip(start, (np.float64, np.float64, bool)))
    below_cut = f_lo.copy()  # the weight under the rows ``rows`` holds for each query
    G, K = max(1, min(LEAF_GATHER, LEAF_NUMBERS // (2 * world * max(m, 1)))), LEAF_PIVOTS

    def ok(f, k):
        return f > target[k] if strict[k] else f >= target[k]

    reductions = 0
    while not done.all():
        if np.all(np.isneginf(lo) & np.isposinf(hi)):  # (no bracket yet: every row of the leaf)
            ab = [(s, e) if not d else (0, 0) for s, e, d in zip(rows.starts[qleaf], rows.ends[qleaf], done)]
        else:
            ab = [rows.bounds(qleaf[k], lo[k], hi[k]) if not done[k] else (0, 0) for k in range(m)]
        if known is None:
            count = reduce(np.array([b - a for a, b in ab], dtype=np.float64))
            reductions += 1
        else:
            count, known = known, None
        small = ~done & (count <= G)
        big = ~done & ~small
        vals, wts, cnt = np.zeros((world, m, G)), np.zeros((world, m, G)), np.zeros((world, m))
        piv, pres = np.zeros((world, m, K)), np.zeros((world, m, K))
        a_all = np.array([a for a, _ in ab], dtype=np.intp)
        n_all = np.array([b - a for a, b in ab], dtype=np.intp)
        sk = np.flatnonzero(small)
        if sk.size:  # every small query's bracket rows, into its slots (vectorised over the queries)
            cnt[rank, sk] = n_all[sk]
            qk = np.repeat(sk, n_all[sk])
            pos = np.arange(qk.size) - np.repeat(np.cumsum(n_all[sk]) - n_all[sk], n_all[sk])
            src = np.repeat(a_all[sk], n_all[sk]) + pos
            vals[rank, qk, pos], wts[rank, qk, pos] = rows.v[src], rows.w[src]
        for k in np.flatnonzero(big):
            a, b = ab[k]
            if b > a:
                idx = np.unique(np.linspace(a, b - 1, K).round().astype(np.intp))
                piv[rank, k, :idx.size], pres[rank, k, :idx.size] = rows.v[idx], 1.0
        if big.any():
            sizes = [vals.size, wts.size, cnt.size, piv.size]
            got = reduce(np.concatenate([vals.ravel(), wts.ravel(), cnt.ravel(), piv.ravel(), pres.ravel()]))
            vals, wts, cnt, piv, pres = (part.reshape(shape) for part, shape in zip(
                np.split(got, np.cumsum(sizes)),
                [(world, m, G), (world, m, G), (world, m), (world, m, K), (world, m, K)]))
        else:  # (nothing to narrow: the pivots are not sent)
            sizes = [vals.size, wts.size]
            got = reduce(np.concatenate([vals.ravel(), wts.ravel(), cnt.ravel()]))
            vals, wts, cnt = (part.reshape(shape) for part, shape in zip(
                np.split(got, np.cumsum(sizes)), [(world, m, G), (world, m, G), (world, m)]))
        reductions += 1
        if sk.size:  # every bracket row of a small query is here: finish as on one machine
            c = cnt[:, sk].astype(np.intp)  # (world, queries)
            # per query, its rows from every worker in (worker, slot) order; empty slots last after sorting
            V = vals[:, sk, :].transpose(1, 0, 2).reshape(sk.size, world * G)
            Wt = wts[:, sk, :].transpose(1, 0, 2).reshape(sk.size, world * G)
            empty = (np.arange(G)[None, None, :] >= c.T[:, :, None]).reshape(sk.size, world * G)
            order = np.lexsort((empty, V), axis=-1)  # by value, then rows before empty slots, then position
            V, Wt, empty = (np.take_along_axis(a, order, axis=1) for a in (V, Wt, empty))
            cum = f_lo[sk, None] + np.cumsum(np.where(empty, 0.0, Wt), axis=1)
            last = ~empty & np.c_[(V[:, 1:] != V[:, :-1]) | empty[:, 1:], np.ones((sk.size, 1), dtype=bool)]
            good = last & np.where(strict[sk, None], cum > target[sk, None], cum >= target[sk, None])
            at = good.argmax(axis=1)
            found = good[np.arange(sk.size), at]
            x_out[sk] = np.where(found, V[np.arange(sk.size), at], hi[sk])
            f_out[sk] = np.where(found, cum[np.arange(sk.size), at], f_hi[sk])
            done[sk] = True
        if not big.any():
            break
        points = [np.unique(piv[:, k, :][pres[:, k, :] > 0]) if big[k] else np.zeros(0) for k in range(m)]
        width = max(p.size for p in points)
        below = np.zeros((m, width))
        for k in np.flatnonzero(big):
            below[k, :points[k].size] = rows.weight_at_most(qleaf[k], points[k])
        below = reduce(below.ravel()).reshape(m, width)
        reductions += 1
        for k in np.flatnonzero(big):
            p, f = points[k], below_cut[k] + below[k, :points[k].size]
            good = ok(f, k)
            if good.any():
                i = np.flatnonzero(good)[0]
                hi[k], f_hi[k] = p[i], f[i]
            bad = np.flatnonzero(~good & (p < hi[k]))
            if bad.size:
                lo[k], f_lo[k] = p[bad[-1]], f[bad[-1]]
    return x_out, f_out, reductions


def leaf_cut(reduce, leaf, v, w, n_leaves, moments, qleaf, target, strict):
    """The first step of the selection, on rows in any order: per leaf asked about, a histogram of
    its rows (weight and count per bucket, summed over the workers in one reduction) over a value
    range that holds its first query's target, and for each query the rows of the bucket where the
    cumulative weight reaches its target.

    Leaf l's buckets: ``floor((v - a_l) s_l)`` clipped to ``[0, B - 1]``, a non-decreasing function
    of v, so each bucket holds the rows of an interval of values and the answer lies in the first
    bucket whose cumulative weight qualifies.  The range ``[a_l, a_l + B / s_l]`` comes from the
    leaf's weighted mean mu and standard deviation sd (``moments``: rows, weight, sum w v and sum
    w v^2 per leaf, over all workers): at the level p = target / weight, Cantelli's inequality
    puts the p-quantile within ``[mu - sd sqrt((1 - p) / p), mu + sd sqrt(p / (1 - p))]``, widened
    by 1%.  The range decides only how few rows the chosen bucket keeps, never the answer: rows
    outside it fall into the end buckets.

    Returns (LeafRows of the chosen buckets' rows with the query as leaf, the ``select_in_leaves``
    start: weight below each chosen bucket, its rows over all workers, queries no value satisfies)."""
    _, w_l, s1, s2 = moments
    m = qleaf.size
    ul, first = np.unique(qleaf, return_index=True)
    nl = ul.size
    B = int(min(LEAF_CUT_BUCKETS, max(2, LEAF_NUMBERS // (2 * max(nl, 1)))))
    W = w_l[ul]
    with np.errstate(all="ignore"):
        mu = s1[ul] / W
        sd = np.sqrt(np.maximum(s2[ul] / W - mu * mu, 0.0))
        p = np.clip(target[first] / W, 1e-3, 1.0 - 1e-3)
        a, b = mu - sd * np.sqrt((1.0 - p) / p), mu + sd * np.sqrt(p / (1.0 - p))
        a, b = a - 0.01 * (b - a), b + 0.01 * (b - a)
        scale = B / (b - a)
    usable = np.isfinite(a) & np.isfinite(scale) & (scale > 0)
    a, scale = np.where(usable, a, 0.0), np.where(usable, scale, 0.0)  # else one bucket: all rows in bucket 0
    slot = np.full(n_leaves, -1, dtype=np.intp)
    slot[ul] = np.arange(nl)
    k = slot[leaf]
    if (k < 0).any():  # (rows of leaves nobody asks about)
        keep = np.flatnonzero(k >= 0)
        k, v, w = k[keep], v[keep], None if w is None else w[keep]
    with np.errstate(all="ignore"):
        x = (v - a[k]) * scale[k]
    np.clip(x, 0.0, B - 1.0, out=x)
    cell = k * B + x.astype(np.intp)
    hn = np.bincount(cell, minlength=nl * B).astype(np.float64)
    hw = hn if w is None else np.bincount(cell, weights=w, minlength=nl * B)
    got = reduce(np.concatenate([hw, hn]))
    hw, hn = got[:nl * B].reshape(nl, B), got[nl * B:].reshape(nl, B)
    cum = np.cumsum(hw, axis=1)
    j = slot[qleaf]  # each query's histogram
    good = np.where(strict[:, None], cum[j] > target[:, None], cum[j] >= target[:, None])
    found = good.any(axis=1)
    chosen = good.argmax(axis=1)
    below = np.where(chosen > 0, cum[j, np.maximum(chosen - 1, 0)], 0.0)
    count = np.where(found, hn[j, chosen], 0.0)
    # the rows of each query's chosen bucket, the queries of one leaf taken one at a time
    by_leaf = np.argsort(qleaf, kind="stable")
    sl = qleaf[by_leaf]
    copy = np.empty(m, dtype=np.intp)
    copy[by_leaf] = np.arange(m) - np.searchsorted(sl, sl, side="left")
    parts = []
    for c in range(int(copy.max()) + 1 if m else 0):
        qs = np.flatnonzero((copy == c) & found)
        want, query = np.full(nl, -1, dtype=np.intp), np.zeros(nl, dtype=np.intp)
        want[j[qs]], query[j[qs]] = j[qs] * B + chosen[qs], qs
        sel = np.flatnonzero(cell == want[k])
        parts.append((query[k[sel]], v[sel], None if w is None else w[sel]))
    qk = np.concatenate([p[0] for p in parts]) if parts else np.zeros(0, dtype=np.intp)
    vk = np.concatenate([p[1] for p in parts]) if parts else np.zeros(0)
    wk = None if w is None else (np.concatenate([p[2] for p in parts]) if parts else np.zeros(0))
    return LeafRows(qk, vk, wk, m), (below, count, ~found)


def leaf_quantiles(reduce, rank, world, leaf, v, w, n_leaves, q, definition):
    """Per leaf, the q-quantile of ``v`` over the rows of all workers by ``definition`` (the
    definitions of ``lossfam._boost.quantiles.grouped_quantile``, the same numbers), exactly:
    one reduction for the leaves' rows, weights and first two moments, the cut by histogram
    (``leaf_cut``, one reduction) and ``select_in_leaves`` on the rows it keeps (one reduction
    when they are few, as they are unless the values crowd into one bucket).  Returns (values,
    has_rows, reductions).  Leaves without rows of positive weight get 0 and has_rows False."""
    from .quantiles import DEFINITIONS, UNWEIGHTED_ONLY

    if definition not in DEFINITIONS:
        raise ValueError(f"unknown quantile definition {definition!r}; one of {DEFINITIONS}")
    calls = [0]

    def counted(a):
        calls[0] += 1
        return reduce(a)

    leaf = np.asarray(leaf, dtype=np.intp).reshape(-1)
    v = np.asarray(v, dtype=np.float64).reshape(-1)
    if w is not None:
        w = np.asarray(w, dtype=np.float64).reshape(-1)
        keep = w > 0
        if definition in UNWEIGHTED_ONLY:
            if counted(np.array([float(np.any(keep & (w != 1.0)))]))[0] > 0:
                raise ValueError(f"the {definition!r} quantile is defined for unit weights only")
        if not keep.all():
            leaf, v, w = leaf[keep], v[keep], w[keep]
        if definition in UNWEIGHTED_ONLY or not (w != 1.0).any():
            w = None  # (unit weights: the counts are the weights)
    n_loc = np.bincount(leaf, minlength=n_leaves).astype(np.float64)
    wv = v if w is None else w * v
    moments = counted(np.concatenate([n_loc, n_loc if w is None else np.bincount(leaf, weights=w, minlength=n_leaves),
                                      np.bincount(leaf, weights=wv, minlength=n_leaves),
                                      np.bincount(leaf, weights=wv * v, minlength=n_leaves)])).reshape(4, n_leaves)
    n, total = moments[0], moments[1]
    has = total > 0
    leaves = np.flatnonzero(has)
    values = np.zeros(n_leaves)

    def select(qleaf, target, strict):
        rows, start = leaf_cut(counted, leaf, v, w, n_leaves, moments, qleaf, target, strict)
        x, _, _ = select_in_leaves(counted, rank, world, rows, np.arange(qleaf.size), target, strict, start)
        return x

    if definition in UNWEIGHTED_ONLY:
        nn = n[leaves]
        h = (nn - 1.0) * q if definition == "linear" else (nn + 1.0) * q - 1.0
        h = np.clip(h, 0.0, np.maximum(nn - 1.0, 0.0))
        lo = np.floor(h)
        frac = h - lo
        r1 = np.minimum(lo + 1.0, nn - 1.0)
        x = select(np.r_[leaves, leaves], np.r_[lo + 1.0, r1 + 1.0], np.zeros(2 * leaves.size, dtype=bool))
        a, b = x[:leaves.size], x[leaves.size:]
        values[leaves] = np.where(frac < 0.5, a + (b - a) * frac, b - (b - a) * (1.0 - frac))
        return values, has, calls[0]
    target = q * total[leaves]
    tol = TIE_TOL * total[leaves]
    if definition == "lower":
        values[leaves] = select(leaves, target - tol, np.zeros(leaves.size, bool))
        return values, has, calls[0]
    x = select(np.r_[leaves, leaves], np.r_[target - tol, target + tol],
               np.r_[np.zeros(leaves.size, bool), np.ones(leaves.size, bool)])
    a, b = x[:leaves.size], x[leaves.size:]
    b = np.where(np.isinf(b), a, b)  # nothing beyond: the last value (as on one machine)
    values[leaves] = 0.5 * (a + b)
    return values, has, calls[0]
