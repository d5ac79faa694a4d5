r"""Leaf-value tables for the refit path, vectorised over leaves (no per-leaf Python loop).

After a tree is grown, ``leaf_table`` gives each leaf the learning rate times
the constant that minimises its rows' nll given their current raw scores:

``"median"`` / ``"quantile"`` (level tau)
    the tau-quantile of the leaf's residuals ``y - raw``, by the sample
    quantile definition the engine's built-in median / quantile objective
    renews its leaves with (``facts.renewal_definition``; definitions in
    ``lossfam._boost.quantiles``), so that a tree grown on the same
    gradients gets the same leaf values on the custom path as on the native
    twin.
``"line_search"``
    the root of the leaf's summed gradient, by Newton steps on the family's
    own Hessian (for a surrogate Hessian these are the iteratively reweighted
    least-squares steps, which decrease the nll monotonically), all leaves
    at once with ``np.bincount``, until every step is below 1e-10 in raw units
    relative or 50 iterations.

Leaves without rows of positive weight keep the engine's value.
"""
from __future__ import annotations

import numpy as np

from .quantiles import grouped_engine_quantile, grouped_quantile

LINE_SEARCH_STEPS = 50
LINE_SEARCH_TOL = 1e-10
LINE_SEARCH_HALVINGS = 40


def grouped_line_search(fam, leaf, y, raw, w, n_leaves):
    """Per leaf, the constant c with sum over the leaf of w g(y, raw + c) = 0: Newton / IRLS steps
    on the family's own curvature, each halved (up to ``LINE_SEARCH_HALVINGS`` times) until the
    leaf's weighted nll does not rise, so that a leaf of few far-off rows, where a bare Newton step
    on a bounded score overshoots (logistic errors: s sinh(z) from a residual z), cannot diverge.
    A leaf whose step cannot be made to lower its nll stops where it is."""
    wt = np.ones_like(y) if w is None else w
    mass = np.bincount(leaf, weights=wt, minlength=n_leaves)
    has = mass > 0
    c = np.zeros(n_leaves)

    def leaf_nll(cv):
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            v = fam._nll(y, raw + cv[leaf]) * wt
        v[wt == 0] = 0.0  # out-of-bag rows take no part, whatever their nll
        return np.bincount(leaf, weights=v, minlength=n_leaves)

    current = leaf_nll(c)
    for _ in range(LINE_SEARCH_STEPS):
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            g, h = fam._grad_hess(y, raw + c[leaf])
            G = np.bincount(leaf, weights=g * wt, minlength=n_leaves)
            H = np.bincount(leaf, weights=h * wt, minlength=n_leaves)
            step = np.where(has & (H > 0), -G / H, 0.0)
        step[~np.isfinite(step)] = 0.0
        moving = step != 0.0
        worse = np.zeros(n_leaves, dtype=bool)
        for _ in range(LINE_SEARCH_HALVINGS):
            if not moving.any():
                break
            trial = leaf_nll(c + np.where(moving, step, 0.0))
            worse = moving & ~(trial <= current + 1e-12 * np.abs(current))
            if not worse.any():
                break
            step[worse] *= 0.5
        else:
            worse = moving & ~(trial <= current + 1e-12 * np.abs(current))
        step[worse] = 0.0
        c += step
        current = leaf_nll(c)
        if np.all(np.abs(step) <= LINE_SEARCH_TOL * (1.0 + np.abs(c))):
            break
    return c, has


def leaf_table(rule, level, fam, leaf, y, raw, w, n_leaves, learning_rate, definition="midpoint"):
    """(learning_rate * per-leaf value, has_rows) for the leaves of one tree (module docstring).

    ``definition``: the sample quantile definition of the median / quantile
    rules (``lossfam._boost.quantiles``); rows of zero weight (out of the
    bag) are left out.  Where the definition is an engine's own unit-weight
    renewal ("weibull": XGBoost, "linear": LightGBM) and the rows carry no
    other weights, the leaf is computed in that engine's arithmetic
    (``engine_leaf_table``)."""
    leaf = np.asarray(leaf, dtype=np.intp).reshape(-1)
    if rule in ("median", "quantile") and definition in ENGINE_ARITHMETIC and (w is None or _unit_or_zero(w)):
        return engine_leaf_table(level, leaf, y, raw, w, n_leaves, learning_rate, definition)
    if rule in ("median", "quantile"):
        c, has = grouped_quantile(leaf, y - raw, w, level, n_leaves, definition)
    elif rule == "line_search":
        c, has = grouped_line_search(fam, leaf, y, raw, w, n_leaves)
    else:  # pragma: no cover - the adapters only call this for refit rules
        raise ValueError(f"no leaf table for rule {rule!r}")
    return learning_rate * c, has


#: the renewal definitions computed in the engine's own arithmetic (grouped_engine_quantile)
ENGINE_ARITHMETIC = ("weibull", "linear")


def _unit_or_zero(w):
    """True when every weight is 1 or 0 (no weights, or lossfam's bag: out-of-bag rows weigh 0)."""
    return bool(np.all((w == 1.0) | (w == 0.0)))


def engine_leaf_table(level, leaf, y, raw, w, n_leaves, learning_rate, definition):
    """The leaf table of the median / quantile rules in the arithmetic of the engine that renews by
    ``definition``, so that the custom path keeps following the native twin over many rounds.

    ``"weibull"`` (XGBoost): the residuals are float32 labels minus the engine's float32 scores
    (``raw`` must be the scores as XGBoost holds them: float32 sums of float32 leaves), the
    quantile in float32 (``grouped_engine_quantile``) and the leaf float32(q * float32(eta)).
    ``"linear"`` (LightGBM): double residuals, the quantile as LightGBM interpolates it, the leaf
    q * learning_rate in double.  Rows of zero weight (out of the bag) are left out.  Returns
    float64 values (exactly the engine's) and ``has_rows``.
    """
    if w is not None:
        keep = w > 0
        leaf, y, raw = leaf[keep], y[keep], raw[keep]
    if definition == "weibull":
        f32 = np.float32
        r = np.subtract(np.asarray(y, dtype=f32), np.asarray(raw, dtype=f32), dtype=f32)
        q, has = grouped_engine_quantile(leaf, r, level, n_leaves, definition)
        return np.multiply(q, f32(learning_rate), dtype=f32).astype(np.float64), has
    r = np.asarray(y, dtype=np.float64) - np.asarray(raw, dtype=np.float64)
    q, has = grouped_engine_quantile(leaf, r, level, n_leaves, definition)
    return learning_rate * q, has


class RowBag:
    """lossfam's own row bagging on the refit path: the engine sees zero gradient and Hessian on
    out-of-bag rows (so they do not shape the tree), and the leaf table uses in-bag rows only.

    ``fraction`` and ``every`` mirror the engines' settings (LightGBM
    ``bagging_fraction``/``bagging_freq``, XGBoost ``subsample`` every round).
    """

    def __init__(self, n, fraction, every, seed):
        self.n = n
        self.fraction = float(fraction)
        self.every = max(int(every), 1)
        self.rng = np.random.default_rng(seed)
        self.mask = None

    def weights(self, round_index, w):
        """Row weights for this round: w on in-bag rows, 0 out of bag."""
        if self.mask is None or round_index % self.every == 0:
            self.mask = self.rng.random(self.n) < self.fraction
        base = np.ones(self.n) if w is None else w
        return np.where(self.mask, base, 0.0)


#: the rounding unit of scores held in float32 (XGBoost's margins) and in float64 (LightGBM's scores)
FLOAT32_UNIT, FLOAT64_UNIT = 2.0 ** -24, 2.0 ** -53
#: the most cells of the lookup table ``leaves_from_scores`` builds
SCORE_CELLS = 1 << 22
#: above this share of rows needing ``read_rows``, the whole tree is read by the engine
SCORE_SHARE = 0.25


def leaves_from_scores(nodes, values, before, after, read_rows, unit):
    """Each row's leaf node of the tree an engine added between its cached training scores
    ``before`` and ``after``; rows the change cannot place are read by ``read_rows(index) -> their
    leaf nodes`` (the engine's leaf prediction on those rows).  None where the scores were not built
    as assumed (then the engine reads every row).

    Both engines add each row's leaf value v to its cached score in the scores' own precision
    (``unit``: 2^-24 for XGBoost's float32 margins, 2^-53 for LightGBM's float64 scores), so
    after = fl(before + v) and |after - before - v| <= unit |after|; the change d is computed in
    float64 (exact for float32 scores, else one more rounding, <= 2^-53 |d|).  ``E`` is twice the
    largest such bound.  Leaf values less than ``T`` >= 4E apart are put in one group (T larger
    when the values' range would need more than ``SCORE_CELLS`` cells, or more than four per row
    and 2^20); the groups' windows [first - E, last + E] then lie at least T - 2E apart, so a
    table over cells of (T - 2E) / 2 names the one window a row's d can be in.  A row in a one-leaf group is that leaf's, checked:
    every such row must lie within E of its leaf's value, else None.  Rows in groups of several
    leaves go to ``read_rows`` (the whole tree, None, when they are more than ``SCORE_SHARE`` of
    the rows)."""
    u64 = np.asarray(values, dtype=np.float64)
    order = np.argsort(u64, kind="stable")
    u, nodes = u64[order], np.asarray(nodes, dtype=np.intp)[order]
    after = np.asarray(after)
    d = after.astype(np.float64)  # (a copy)
    d -= np.asarray(before)
    if u.size == 0 or d.size == 0 or not (np.isfinite(u).all() and np.isfinite(d.sum())):
        return None
    E = 2.0 * (unit * (float(max(after.max(), -after.min())) + float(max(d.max(), -d.min()))) + 2.0 ** -149)
    span = float(u[-1] - u[0]) + 2.0 * E
    T = max(4.0 * E, 4.0 * span / min(SCORE_CELLS, max(1 << 20, 4 * d.size)))
    group = np.r_[0, np.cumsum(np.diff(u) >= T)]
    n_groups = int(group[-1]) + 1
    first, last = np.searchsorted(group, np.arange(n_groups)), np.searchsorted(group, np.arange(n_groups), "right") - 1
    cell = (T - 2.0 * E) / 2.0
    lo = u[0] - E
    n_cells = int(np.ceil(span / cell)) + 1
    # each cell's group: the first whose window's end plus a cell reaches the cell's centre x.  A row's
    # d in window g lies within cell / 2 of x; an earlier window ends >= 2 cells before d, so its end
    # plus a cell stays below x, while g's end plus a cell is >= x + cell / 2
    # (cell i's centre is lo + (i + 1/2) cell: the cells up to group g's bound, counted without listing
    # the centres; the cells beyond every bound go to the last group)
    upto = np.floor((u[last] + E + cell - lo) / cell - 0.5) + 1.0
    upto = np.clip(upto, 0, n_cells).astype(np.intp)
    upto[-1] = n_cells
    table = np.repeat(np.arange(n_groups, dtype=np.int16 if n_groups < 2 ** 15 else np.intp),
                      np.diff(np.r_[0, upto]))
    k = d - lo
    k *= 1.0 / cell
    np.clip(k, 0.0, n_cells - 1.0, out=k)
    g = table[k.astype(np.intp)]
    pos = first[g]  # the group's first leaf (its only one in a one-leaf group)
    if n_groups == u.size:  # (every group one leaf: the usual case)
        k = np.subtract(d, u[pos], out=k)
        if not max(float(k.max()), -float(k.min())) <= E:
            return None
        return nodes[pos]
    mine = (first == last)[g]
    if not float(np.abs(d[mine] - u[pos[mine]]).max(initial=0.0)) <= E:
        return None
    out = nodes[pos]
    unsure = np.flatnonzero(~mine)
    if unsure.size > SCORE_SHARE * d.size:
        return None
    if unsure.size:
        out[unsure] = np.asarray(read_rows(unsure), dtype=np.intp).reshape(-1)
    return out
