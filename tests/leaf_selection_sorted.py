"""The leaf selection across workers as it was before its first cut by histogram: every worker
sorts its rows by (leaf, value), then narrows a bracket per query by order-statistic pivots.
Kept for tests only: the faster selection in ``lossfam._boost.cluster`` must return the same
leaf values as this one, bit for bit."""
from __future__ import annotations

import numpy as np

from lossfam._boost.quantiles import TIE_TOL

#: a query's bracket rows are gathered once at most this many remain over all workers
LEAF_GATHER = 64
#: order statistics per worker, query and narrowing round
LEAF_PIVOTS = 16


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


def select_in_leaves(reduce, rank, world, rows: LeafRows, qleaf, target, strict):
    """Exact selection for many (leaf, target) queries at once, over the rows of all workers.

    Query k asks for the smallest value x among leaf ``qleaf[k]``'s rows whose cumulative weight
    F(x) (all rows of the leaf with value <= x, on every worker) is >= ``target[k]`` (> when
    ``strict[k]``); returns (x, F(x)) per query, (inf, nan) when no value qualifies.  The method
    is the module's baseline selection, vectorised over the queries: a bracket (lo, hi) per query;
    per round every worker sends, per query, all its rows in the bracket when at most
    ``LEAF_GATHER`` remain over all workers, else ``LEAF_PIVOTS`` evenly spaced order statistics
    of them; a second reduction counts the weight at or below each pivot, and the bracket shrinks
    to neighbouring pivots.  ``reduce(array)`` sums an array over the workers (every worker calls
    it with the same shapes, in the same order: the control flow depends on reduced values only);
    the data sent per round is O(queries x (gather + pivots) x workers), independent of the rows."""
    qleaf = np.asarray(qleaf, dtype=np.intp)
    target = np.asarray(target, dtype=np.float64)
    strict = np.asarray(strict, dtype=bool)
    m = qleaf.size
    lo, f_lo = np.full(m, -np.inf), np.zeros(m)
    hi, f_hi = np.full(m, np.inf), np.full(m, np.nan)
    x_out, f_out = np.full(m, np.inf), np.full(m, np.nan)
    done = np.zeros(m, dtype=bool)
    G, K = LEAF_GATHER, LEAF_PIVOTS

    def ok(f, k):
        return f > target[k] if strict[k] else f >= target[k]

    rounds = 0
    while not done.all():
        rounds += 1
        ab = [rows.bounds(qleaf[k], lo[k], hi[k]) if not done[k] else (0, 0) for k in range(m)]
        count = reduce(np.array([b - a for a, b in ab], dtype=np.float64))
        small = ~done & (count <= G)
        big = ~done & ~small
        vals, wts, cnt = np.zeros((world, m, G)), np.zeros((world, m, G)), np.zeros((world, m))
        piv, pres = np.zeros((world, m, K)), np.zeros((world, m, K))
        for k in np.flatnonzero(small):
            a, b = ab[k]
            vals[rank, k, :b - a], wts[rank, k, :b - a], cnt[rank, k] = rows.v[a:b], rows.w[a:b], b - a
        for k in np.flatnonzero(big):
            a, b = ab[k]
            if b > a:
                idx = np.unique(np.linspace(a, b - 1, K).round().astype(np.intp))
                piv[rank, k, :idx.size], pres[rank, k, :idx.size] = rows.v[idx], 1.0
        sizes = [vals.size, wts.size, cnt.size, piv.size]
        got = reduce(np.concatenate([vals.ravel(), wts.ravel(), cnt.ravel(), piv.ravel(), pres.ravel()]))
        vals, wts, cnt, piv, pres = (part.reshape(shape) for part, shape in zip(
            np.split(got, np.cumsum(sizes)), [(world, m, G), (world, m, G), (world, m), (world, m, K), (world, m, K)]))
        for k in np.flatnonzero(small):  # every bracket row is here: finish as on one machine
            c = cnt[:, k].astype(np.intp)
            v = np.concatenate([vals[r, k, :c[r]] for r in range(world)])
            wk = np.concatenate([wts[r, k, :c[r]] for r in range(world)])
            order = np.argsort(v, kind="stable")
            v, cum = v[order], f_lo[k] + np.cumsum(wk[order])
            last = np.r_[v[1:] != v[:-1], True] if v.size else np.zeros(0, dtype=bool)
            good = np.flatnonzero(ok(cum[last], k)) if v.size else np.zeros(0, dtype=np.intp)
            if good.size:
                x_out[k], f_out[k] = v[last][good[0]], cum[last][good[0]]
            else:
                x_out[k], f_out[k] = hi[k], f_hi[k]
            done[k] = True
        if not big.any():
            break
        points = [np.unique(piv[:, k, :][pres[:, k, :] > 0]) if big[k] else np.zeros(0) for k in range(m)]
        width = max(p.size for p in points)
        below = np.zeros((m, width))
        for k in np.flatnonzero(big):
            below[k, :points[k].size] = rows.weight_at_most(qleaf[k], points[k])
        below = reduce(below.ravel()).reshape(m, width)
        for k in np.flatnonzero(big):
            p, f = points[k], below[k, :points[k].size]
            good = ok(f, k)
            if good.any():
                i = np.flatnonzero(good)[0]
                hi[k], f_hi[k] = p[i], f[i]
            bad = np.flatnonzero(~good & (p < hi[k]))
            if bad.size:
                lo[k], f_lo[k] = p[bad[-1]], f[bad[-1]]
    return x_out, f_out, rounds


def leaf_quantiles(reduce, rank, world, leaf, v, w, n_leaves, q, definition):
    """Per leaf, the q-quantile of ``v`` over the rows of all workers by ``definition`` (the
    definitions of ``lossfam._boost.quantiles.grouped_quantile``, the same numbers), exactly, by
    ``select_in_leaves``; returns (values, has_rows, reduction rounds).  Leaves without rows of
    positive weight get 0 and has_rows False."""
    from lossfam._boost.quantiles import DEFINITIONS, UNWEIGHTED_ONLY

    if definition not in DEFINITIONS:
        raise ValueError(f"unknown quantile definition {definition!r}; one of {DEFINITIONS}")
    if definition in UNWEIGHTED_ONLY and w is not None:
        wa = np.asarray(w)
        if reduce(np.array([float(np.any((wa > 0) & (wa != 1.0)))]))[0] > 0:
            raise ValueError(f"the {definition!r} quantile is defined for unit weights only")
        w = None
    rows = LeafRows(leaf, v, w, n_leaves)
    n, total = (reduce(np.concatenate(rows.totals())).reshape(2, n_leaves))
    has = total > 0
    leaves = np.flatnonzero(has)
    values = np.zeros(n_leaves)
    if definition in UNWEIGHTED_ONLY:
        nn = n[leaves]
        h = (nn - 1.0) * q if definition == "linear" else (nn + 1.0) * q - 1.0
        h = np.clip(h, 0.0, np.maximum(nn - 1.0, 0.0))
        lo = np.floor(h)
        frac = h - lo
        r1 = np.minimum(lo + 1.0, nn - 1.0)
        x, _, rounds = select_in_leaves(reduce, rank, world, rows, np.r_[leaves, leaves], np.r_[lo + 1.0, r1 + 1.0],
                                        np.zeros(2 * leaves.size, dtype=bool))
        a, b = x[:leaves.size], x[leaves.size:]
        values[leaves] = np.where(frac < 0.5, a + (b - a) * frac, b - (b - a) * (1.0 - frac))
        return values, has, rounds
    target = q * total[leaves]
    tol = TIE_TOL * total[leaves]
    if definition == "lower":
        x, _, rounds = select_in_leaves(reduce, rank, world, rows, leaves, target - tol, np.zeros(leaves.size, bool))
        values[leaves] = x
        return values, has, rounds
    x, _, rounds = select_in_leaves(reduce, rank, world, rows, np.r_[leaves, leaves], np.r_[target - tol, target + tol],
                                    np.r_[np.zeros(leaves.size, bool), np.ones(leaves.size, bool)])
    a, b = x[:leaves.size], x[leaves.size:]
    b = np.where(np.isinf(b), a, b)  # nothing beyond: the last value (as on one machine)
    values[leaves] = 0.5 * (a + b)
    return values, has, rounds
