r"""Sample quantiles of groups of rows, vectorised over the groups (no per-group Python loop).

Used for the baseline of the median / quantile families (one group: every row)
and for their leaf values (one group per leaf).  For a group with values
``x_(1) <= ... <= x_(n)`` (weights ``w_(k)``, cumulative ``S_k``, total ``W``)
and level ``q`` in (0, 1), the definitions are:

``"midpoint"``
    The midpoint of the set of minimisers of ``sum_k w_k rho_q(x_k - c)``
    (``rho_q`` the pinball loss).  That set is ``[x_lo, x_hi]`` with
    ``x_lo`` the smallest value whose cumulative weight reaches ``q W`` and
    ``x_hi`` the smallest whose cumulative weight exceeds it; the two differ
    only when some ``S_k`` equals ``q W`` exactly (compared to within
    ``TIE_TOL * W``: ``0.1 * 30`` is ``3.0000000000000004`` in floating
    point).  With unit weights it is Hyndman and Fan's definition 2
    (numpy's ``"averaged_inverted_cdf"``); at ``q = 1/2`` it is the usual
    median (the mean of the two middle values for even ``n``).  It depends on
    the weights only through the weighted empirical law, so integer weights
    give exactly what repeated rows give, and scaling every weight changes
    nothing; and it is symmetric: the ``q``-quantile of ``x`` is minus the
    ``(1 - q)``-quantile of ``-x``.
``"lower"``
    ``x_lo`` alone (Hyndman and Fan's definition 1, numpy's
    ``"inverted_cdf"``), the left end of the minimiser set.
``"linear"`` (unit weights)
    Hyndman and Fan's definition 7: with ``h = (n - 1) q`` (0-based),
    ``x_[floor h] + (h - floor h) (x_[floor h + 1] - x_[floor h])``; numpy's
    default ``"linear"``.
``"weibull"`` (unit weights)
    Hyndman and Fan's definition 6: the same interpolation at
    ``h = (n + 1) q - 1`` (0-based), clamped to ``[0, n - 1]``; numpy's
    ``"weibull"``.

"linear" and "weibull" interpolate between order statistics and so are, for
most ``q``, not minimisers of the group's pinball loss; they are here because
the engines' built-in median / quantile objectives renew leaves (and start)
with them (``lossfam._boost.facts`` and the adapters say which engine uses
which; measured on lightgbm 4.7.0 and xgboost 3.2.0).

Reference: R. J. Hyndman and Y. Fan, "Sample quantiles in statistical
packages", The American Statistician 50(4), 361-365 (1996), definitions 1, 2,
6 and 7 (recalled from memory; tests/test_engine_contract.py checks each
against numpy.quantile's method of the same name).
"""
from __future__ import annotations

import numpy as np

DEFINITIONS = ("midpoint", "lower", "linear", "weibull")
UNWEIGHTED_ONLY = ("linear", "weibull")
#: relative tolerance (of the group's total weight) under which a cumulative weight equals q W
TIE_TOL = 1e-12


def grouped_quantile(group, x, w, q, n_groups, definition="midpoint"):
    """Per group, the ``q``-quantile of ``x`` by ``definition`` (module docstring).

    ``group``: integer group index of each row in ``[0, n_groups)``; ``w``:
    row weights or None (unit weights).  Rows of zero weight are left out.
    The unit-weight definitions ("linear", "weibull") refuse other weights.
    Returns ``(values, has_rows)``; groups without rows of positive weight
    get value 0 and ``has_rows`` False.
    """
    if definition not in DEFINITIONS:
        raise ValueError(f"unknown quantile definition {definition!r}; one of {DEFINITIONS}")
    group = np.asarray(group, dtype=np.intp).reshape(-1)
    x = np.asarray(x, dtype=np.float64).reshape(-1)
    if w is not None:
        w = np.asarray(w, dtype=np.float64).reshape(-1)
        keep = w > 0
        if not keep.all():
            group, x, w = group[keep], x[keep], w[keep]
        if definition in UNWEIGHTED_ONLY:
            if np.any(w != 1.0):
                raise ValueError(f"the {definition!r} quantile is defined for unit weights only")
            w = None
    if n_groups == 1 and x.size > 2 and (w is None or np.all(w == 1.0)) and np.all(group == 0):
        return _one_group_unit_weights(x, q, definition)
    order = np.lexsort((x, group))
    gs = group[order]
    xs = x[order]
    ids = np.arange(n_groups)
    starts = np.searchsorted(gs, ids, side="left")
    ends = np.searchsorted(gs, ids, side="right")
    has = ends > starts
    last = np.maximum(ends - 1, starts)
    values = np.zeros(n_groups)
    if not has.any():
        return values, has
    if definition in UNWEIGHTED_ONLY:
        n = (ends - starts).astype(np.float64)
        h = (n - 1.0) * q if definition == "linear" else (n + 1.0) * q - 1.0
        h = np.clip(h, 0.0, np.maximum(n - 1.0, 0.0))
        lo = np.floor(h)
        frac = h - lo
        i0 = np.minimum(starts + lo.astype(np.intp), last)
        i1 = np.minimum(i0 + 1, last)
        a, b = xs[np.where(has, i0, 0)], xs[np.where(has, i1, 0)]
        # numpy's lerp: from the nearer end, so frac 0 and 1 return the order statistic exactly
        values = np.where(frac < 0.5, a + (b - a) * frac, b - (b - a) * (1.0 - frac))
        return np.where(has, values, 0.0), has
    cw = np.cumsum(w[order]) if w is not None else np.arange(1, xs.size + 1, dtype=np.float64)
    before = np.where(starts > 0, cw[np.maximum(starts - 1, 0)], 0.0)
    total = np.where(has, cw[np.maximum(ends - 1, 0)] - before, 0.0)
    has &= total > 0
    target = before + q * total
    tol = TIE_TOL * total
    i_lo = np.clip(np.searchsorted(cw, target - tol, side="left"), starts, last)
    a = xs[np.minimum(i_lo, xs.size - 1)]
    if definition == "lower":
        return np.where(has, a, 0.0), has
    i_hi = np.clip(np.searchsorted(cw, target + tol, side="right"), starts, last)
    b = xs[np.minimum(i_hi, xs.size - 1)]
    return np.where(has, 0.5 * (a + b), 0.0), has


def _one_group_unit_weights(x, q, definition):
    """``grouped_quantile`` of one group of unit-weight rows, from a partial sort (O(n)): the same
    order statistics, picked by the same arithmetic as the general path."""
    n = x.size
    last = n - 1
    if definition in UNWEIGHTED_ONLY:
        h = (n - 1.0) * q if definition == "linear" else (n + 1.0) * q - 1.0
        h = min(max(h, 0.0), float(max(n - 1.0, 0.0)))
        lo = np.floor(h)
        frac = h - lo
        i0 = min(int(lo), last)
        i1 = min(i0 + 1, last)
        a, b = _order_statistics(x, (i0, i1))
        value = a + (b - a) * frac if frac < 0.5 else b - (b - a) * (1.0 - frac)
        return np.array([value]), np.array([True])
    total = float(n)  # the cumulative weights are exactly 1, 2, ..., n
    target = q * total
    tol = TIE_TOL * total
    # np.searchsorted(cw, v, "left") = #{k in 1..n: k < v}; "right" = #{k: k <= v}
    i_lo = min(max(_count_below(target - tol, n), 0), last)
    if definition == "lower":
        return np.array([_order_statistics(x, (i_lo,))[0]]), np.array([True])
    i_hi = min(max(_count_at_most(target + tol, n), 0), last)
    a, b = _order_statistics(x, (i_lo, i_hi))
    return np.array([0.5 * (a + b)]), np.array([True])


def _count_below(v, n):
    """#{k in 1..n: k < v} (v a float)."""
    return int(min(max(np.ceil(v) - 1.0, 0.0), n))


def _count_at_most(v, n):
    """#{k in 1..n: k <= v} (v a float)."""
    return int(min(max(np.floor(v), 0.0), n))


def _order_statistics(x, ks):
    """The k-th smallest values of x (0-based), by a partial sort."""
    part = np.partition(x, sorted(set(ks)))
    return [float(part[k]) for k in ks]


def sample_quantile(x, w, q, definition="midpoint") -> float:
    """The ``q``-quantile of all of ``x`` (weights ``w`` or None) by ``definition``."""
    x = np.asarray(x, dtype=np.float64).reshape(-1)
    values, has = grouped_quantile(np.zeros(x.size, dtype=np.intp), x, w, q, 1, definition)
    if not has[0]:
        raise ValueError("no row of positive weight")
    return float(values[0])


def single_precision_quantile(x, w, q, definition) -> float:
    """The ``q``-quantile of all of ``x`` by ``definition`` in the engines' single precision.

    The engines' built-in median / quantile objectives start from a sample
    quantile of the targets computed on float32 labels at a float32 level, the
    difference of the two order statistics taken in float32 and the
    interpolation in float64, rounded to float32 (measured on lightgbm 4.7.0
    and xgboost 3.2.0: tests/test_engine_contract.py reproduces both starts
    bit for bit).  With ``p = float32(q)``, ``x_(1) <= ... <= x_(n)``:

    ``"linear"`` (unit weights)
        from the upper neighbour: ``h = (n - 1)(1 - p)`` counted from the
        largest value, ``b = h - floor h``,
        ``x_[hi] - b * float32(x_[hi] - x_[lo])``  (``x_[hi]`` the larger of the two).
    ``"weibull"`` (unit weights)
        ``x_(1)`` for ``p <= 1/(n + 1)``, ``x_(n)`` for ``p >= n/(n + 1)``,
        otherwise with ``t = p (n + 1)``, ``k = floor t``, ``d = t - k``:
        ``x_(k) + d * float32(x_(k+1) - x_(k))``.
    ``"lower"``
        the smallest value whose cumulative weight reaches ``p W``.

    Mathematically these are ``grouped_quantile``'s definitions of the same
    names; only the rounding differs, and it decides the first trees on
    targets with many ties.
    """
    f32 = np.float32
    x = np.asarray(x, dtype=np.float64).reshape(-1).astype(f32)
    p = float(f32(q))
    if definition == "lower":
        wt = np.ones(x.size) if w is None else np.asarray(w, dtype=np.float64).reshape(-1).astype(f32).astype(np.float64)
        order = np.argsort(x, kind="stable")
        cw = np.cumsum(wt[order])
        if not cw.size or cw[-1] <= 0:
            raise ValueError("no row of positive weight")
        i = min(int(np.searchsorted(cw, p * cw[-1], side="left")), x.size - 1)
        return float(x[order][i])
    if w is not None and np.any(np.asarray(w) != 1.0):
        raise ValueError(f"the {definition!r} quantile is defined for unit weights only")
    s = np.sort(x)
    if s.size == 0:
        raise ValueError("no row")
    ranks, combine = single_precision_plan(definition, s.size, q)
    return combine(*(s[r] for r in ranks))


def single_precision_plan(definition, n, q):
    """For the unit-weight rules of ``single_precision_quantile`` on ``n`` values: the 0-based
    ranks of the order statistics it reads, and the function of their float32 values that gives
    the quantile (so that the order statistics can come from elsewhere, e.g. a selection over
    the partitions of a cluster)."""
    f32 = np.float32
    p = float(f32(q))
    if definition == "linear":
        h = (n - 1) * (1.0 - p)
        pos = int(h)
        return (n - 1 - pos, max(n - 2 - pos, 0)), (
            lambda upper, lower: float(f32(float(upper) - float(f32(upper - lower)) * (h - pos))))
    if definition == "weibull":
        if p <= 1.0 / (n + 1):
            return (0,), float
        if p >= n / (n + 1.0):
            return (n - 1,), float
        t = p * (n + 1.0)
        k = int(np.floor(t)) - 1
        return (k, min(k + 1, n - 1)), (lambda lo, hi: float(f32(float(lo) + (t - 1.0 - k) * float(f32(hi - lo)))))
    raise ValueError(f"no single-precision rule for the {definition!r} quantile")


def grouped_engine_quantile(group, x, q, n_groups, definition):
    """Per group, the ``q``-quantile of ``x`` (unit weights) in the arithmetic of the engine whose
    built-in median / quantile objective renews leaves by ``definition`` (``facts.renewal_definition``).

    ``"weibull"`` (XGBoost)
        ``x`` are float32 residuals (the engine subtracts its float32 scores from the float32
        labels); with ``p = float32(q)`` the rule of ``single_precision_quantile``: ``x_(1)``
        for ``p <= 1/(n+1)``, ``x_(n)`` for ``p >= n/(n+1)``, else
        ``float32(x_(k) + d * float32(x_(k+1) - x_(k)))``.  Returns float32 values.
    ``"linear"`` (LightGBM)
        ``x`` are float64 residuals (LightGBM keeps its scores in double); with
        ``p = float32(q)`` (its quantile level is a float) and ``h = (n - 1)(1 - p)``
        counted from the largest value, ``upper - (upper - lower)(h - floor h)`` in float64:
        the start's rule (``single_precision_plan``) on doubles.

    Mathematically these are ``grouped_quantile``'s definitions of the same names; only the
    rounding differs, and over a thousand rounds of leaves that chase residuals of a few ulps
    it decides the trees (the custom path then drifts away from the native twin).  Groups
    without rows get 0 and ``has_rows`` False.
    """
    group = np.asarray(group, dtype=np.intp).reshape(-1)
    order = np.lexsort((x, group))
    gs, xs = group[order], x[order]
    ids = np.arange(n_groups)
    starts = np.searchsorted(gs, ids, side="left")
    ends = np.searchsorted(gs, ids, side="right")
    has = ends > starts
    count = (ends - starts).astype(np.float64)
    last = np.maximum(ends - 1, starts)
    p = float(np.float32(q))
    safe = np.where(has, starts, 0)

    def at(i):
        return xs[np.where(has, np.clip(i, starts, last), 0)] if xs.size else np.zeros(n_groups, x.dtype)

    if not xs.size:
        return np.zeros(n_groups, x.dtype), has
    if definition == "weibull":
        f32 = np.float32
        t = p * (count + 1.0)
        k = np.floor(t) - 1.0
        d = (t - 1.0) - k
        i0 = safe + np.maximum(k, 0).astype(np.intp)
        lo, hi = at(i0), at(i0 + 1)
        inner = (lo.astype(np.float64) + d * (hi - lo).astype(np.float64)).astype(f32)
        with np.errstate(divide="ignore"):
            values = np.where(p <= 1.0 / (count + 1.0), at(safe),
                              np.where(p >= count / (count + 1.0), at(last), inner))
        return np.where(has, values, f32(0.0)).astype(f32), has
    if definition == "linear":
        h = np.maximum(count - 1.0, 0.0) * (1.0 - p)
        pos = np.floor(h)
        upper = at(last - pos.astype(np.intp))
        lower = at(np.maximum(last - pos.astype(np.intp) - 1, starts))
        values = upper - (upper - lower) * (h - pos)
        return np.where(has, values, 0.0), has
    raise ValueError(f"no engine arithmetic for the {definition!r} quantile")
