r"""Diagnostics of a fitted noise model: quantile residuals, PIT, QQ data, calibration, coverage.

Every function takes a family (a name or a :class:`lossfam.Family`), the
targets ``y`` and the raw scores ``raw`` of a fitted model, and reads the
predictive law from ``family.distribution(raw)`` (a frozen scipy.stats law,
or lossfam's ``HuberLaw``).

Probability integral transform (PIT) and quantile residuals
-----------------------------------------------------------
For a continuous law with cdf F, the PIT of a target is u = F(y) and the
quantile residual is z = Phi^{-1}(u).  When the model is right, u is
Uniform(0, 1) and z is standard normal, whatever the family.

For a discrete law (counts, labels) F jumps at each y, so F(y) is not uniform.
The randomized quantile residual (Dunn and Smyth, 1996, "Randomized quantile
residuals", J. Comput. Graph. Stat. 5(3), 236-244) draws u uniformly between
the two sides of the jump,

    u = F(y - 1) + V P(Y = y),      V ~ Uniform(0, 1)   (seeded),

which is exactly Uniform(0, 1) under the model.  A continuous law with point
masses (tweedie's exact zeros; its law exposes ``log_atom``) gets the same
randomisation at the atoms, u = F(y-) + V P(Y = y), and u = F(y) elsewhere.  ``unit_interval=True`` applies
the same idea to a continuous law scored on integer targets (a continuous
law for a value that was rounded): u = F(y - 1/2) + V (F(y + 1/2) - F(y - 1/2)).

Censored and interval targets (a :class:`lossfam.censoring.IntervalTarget`) get the same
randomisation over the censoring interval: u = F(lo) + V (F(hi) - F(lo)) for a censored row
(exact rows as above), uniform under the model given the interval; F and its complement come
from the family's own log tails (``Family._tail_pieces``).

Several raw scores per row.  Every function here also takes a
:class:`lossfam.SeveralScoreFamily` with its (n, k) raw scores (a scale that varies by row):
the predictive law is again ``family.distribution(raw)``.  :func:`coverage_by_spread`
checks the central intervals within groups of rows of similar predicted spread (conditional
coverage), the check that a scale varying with the features must pass.

Numerics.  u and 1 - u are carried as logarithms: log u from ``logcdf`` (and
log P(Y = y) from ``logpmf``), log(1 - u) from ``logsf``, combined with
``logaddexp`` so that neither tail cancels (1 - F(y) is never formed by a
subtraction).  Then z = ndtri_exp(log u) on the lower half and
z = -ndtri_exp(log(1 - u)) on the upper half (``scipy.special.ndtri_exp`` is
Phi^{-1}(e^x), accurate for very negative x).  Where a law's tail underflows
(its ``logcdf`` returns -inf, e.g. scipy's gamma far below the mean), u or
1 - u is clipped up to ``TINY`` = the smallest normal float64 (2.2e-308)
*for the normal transform only*, so |z| <= 37.5: the residual stays finite and
still says "far out in the tail".  Input data are never clipped; ``pit`` returns
the unclipped u.
"""
from __future__ import annotations

import numpy as np
from scipy import stats
from scipy.special import ndtri_exp

from . import _checks
from .censoring import IntervalTarget
from .families._several import SeveralScoreFamily
from .registry import family as _make_family

#: smallest u (and 1 - u) fed to the normal transform: the smallest normal float64
TINY = float(np.finfo(np.float64).tiny)
_LOG_TINY = float(np.log(TINY))

__all__ = [
    "TINY",
    "pit",
    "quantile_residuals",
    "qq_data",
    "ks_statistic",
    "calibration_table",
    "binned_calibration",
    "interval_coverage",
    "coverage_by_spread",
    "grouped_coverage",
    "SPREADS",
    "log_interval_probability",
]


# ---------------------------------------------------------------------- helpers
def _inputs(family, y, raw, *, for_nll=True):
    fam = _make_family(family)
    y = fam.check_target(y, for_nll=for_nll)
    if isinstance(fam, SeveralScoreFamily):
        raw = fam.check_raw(raw, y)  # (n, k): one row of raw scores per target
    else:
        raw = _checks.check_raw(raw, y, fam.name)
    if isinstance(y, IntervalTarget):
        return fam, y, raw
    if y.ndim != 1:
        raise ValueError(f"{fam.name}: y must be one-dimensional, got shape {y.shape}")
    return fam, y, raw


def _rng(seed):
    return seed if isinstance(seed, np.random.Generator) else np.random.default_rng(seed)


def _log_tails(law, x):
    """(log F(x), log S(x)) from the law's logcdf/logsf when it has them, else log of cdf/sf."""
    with np.errstate(divide="ignore", over="ignore", invalid="ignore", under="ignore"):
        lc = law.logcdf(x) if hasattr(law, "logcdf") else np.log(law.cdf(x))
        ls = law.logsf(x) if hasattr(law, "logsf") else np.log(law.sf(x))
    return np.asarray(lc, dtype=float), np.asarray(ls, dtype=float)


def _log1mexp(x):
    """log(1 - e^x) for x <= 0, accurate at both ends (log(-expm1(x)) near 0, log1p(-e^x) far)."""
    x = np.asarray(x, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(x > -np.log(2.0), np.log(-np.expm1(x)), np.log1p(-np.exp(x)))


def _log_interval_prob_law(law, a, b):
    """log P(a < Y <= b) = log(F(b) - F(a)) for a < b, without cancellation.

    Below the median it is log F(b) + log(1 - F(a)/F(b)); above it the same with
    the survival function, log S(a) + log(1 - S(b)/S(a)).  Both are exact
    identities; each side is used where its terms are not close to 1.
    """
    lca, lsa = _log_tails(law, a)
    lcb, lsb = _log_tails(law, b)
    with np.errstate(invalid="ignore"):
        low = lcb + _log1mexp(np.minimum(lca - lcb, 0.0))
        high = lsa + _log1mexp(np.minimum(lsb - lsa, 0.0))
    out = np.where(lcb <= np.log(0.5), low, high)
    return np.where(np.isnan(out), -np.inf, out)


def log_interval_probability(family, y, raw, half_width=0.5):
    r"""log P(y - h < Y <= y + h) under a continuous family's law (h = ``half_width``).

    This scores a continuous law on integer-valued targets on the same footing
    as a count law: the probability it gives to the unit interval around each y
    (a density is not a probability).  It is computed from log F and log S
    (no cancellation; exact far into the tails when the law has accurate
    ``logcdf``/``logsf``, as scipy's normal does).  Where the law's log tails
    underflow to -inf (some scipy laws compute them as log(cdf), e.g. the gamma
    far above its mean), the midpoint rule log(2 h p(y)) is used for those rows
    instead, so the score stays finite.
    """
    fam, y, raw = _inputs(family, y, raw)
    law = fam.distribution(raw)
    out = _log_interval_prob_law(law, y - half_width, y + half_width)
    bad = ~np.isfinite(out)
    if np.any(bad):
        with np.errstate(divide="ignore"):
            mid = np.asarray(law.logpdf(y), dtype=float) + np.log(2.0 * half_width)
        out = np.where(bad, mid, out)
    return out


def _log_pit(fam, y, raw, seed, unit_interval):
    """(log u, log(1 - u)) of the (randomized) probability integral transform."""
    if isinstance(y, IntervalTarget):
        return _log_pit_censored(fam, y, raw, seed)
    law = fam.distribution(raw)
    if fam.discrete or unit_interval:
        if fam.discrete:
            with np.errstate(divide="ignore"):
                log_mass = np.asarray(law.logpmf(y), dtype=float)
            below, above = y - 1.0, y
        else:
            if not np.all(np.floor(y) == y):
                raise ValueError(f"{fam.name}: unit_interval=True needs integer-valued targets")
            log_mass = _log_interval_prob_law(law, y - 0.5, y + 0.5)
            below, above = y - 0.5, y + 0.5
        lc_below, _ = _log_tails(law, below)
        _, ls_above = _log_tails(law, above)
        v = _rng(seed).random(y.shape)
        with np.errstate(divide="ignore"):
            log_u = np.logaddexp(lc_below, np.log(v) + log_mass)
            log_1mu = np.logaddexp(ls_above, np.log1p(-v) + log_mass)
        return log_u, log_1mu
    if hasattr(law, "log_atom"):
        return _log_pit_with_atoms(law, y, seed)
    return _log_tails(law, y)


def _log_pit_with_atoms(law, y, seed):
    """(log u, log(1 - u)) for a law with point masses (``law.log_atom(y)`` = log P(Y = y)),
    e.g. tweedie's mass at 0: u = F(y-) + V P(Y = y) at an atom, F(y) elsewhere.

    log F(y-) = log(F(y) - P(Y = y)) = log F(y) + log(1 - P(Y = y) / F(y)), and
    1 - u = S(y) + (1 - V) P(Y = y), both formed in log space without cancellation.
    """
    lc, ls = _log_tails(law, y)
    with np.errstate(divide="ignore", invalid="ignore"):
        log_mass = np.asarray(law.log_atom(y), dtype=float)
    atom = np.isfinite(log_mass)
    if not np.any(atom):
        return lc, ls
    v = _rng(seed).random(y.shape)
    with np.errstate(divide="ignore", invalid="ignore"):
        below = lc + _log1mexp(np.minimum(log_mass - lc, 0.0))
        log_u = np.logaddexp(below, np.log(v) + log_mass)
        log_1mu = np.logaddexp(ls, np.log1p(-v) + log_mass)
    return np.where(atom, log_u, lc), np.where(atom, log_1mu, ls)


def _log_pit_censored(fam, t, raw, seed):
    """(log u, log(1 - u)) for an IntervalTarget: F(y) on exact rows, F(lo) + V (F(hi) - F(lo))
    on censored rows, from the family's tail pieces (module docstring)."""
    from .families._censored import _pieces_at, censored_nll, open_sides

    has_lo, has_hi = open_sides(fam, t.lower, t.upper)
    lf_lo, _, _, _ = _pieces_at(fam, t.lower, raw, has_lo & ~t.exact, True)
    _, ls_hi, _, _ = _pieces_at(fam, t.upper, raw, has_hi & ~t.exact, False)
    v = _rng(seed).random(t.size)
    log_mass = np.where(t.exact, 0.0, -censored_nll(fam, t, raw))
    with np.errstate(divide="ignore"):
        log_u = np.logaddexp(lf_lo, np.log(v) + log_mass)
        log_1mu = np.logaddexp(ls_hi, np.log1p(-v) + log_mass)
    if t.exact.any():
        ex = t.exact
        lc, ls = _log_tails(fam.distribution(raw[ex]), t.lower[ex])
        log_u[ex], log_1mu[ex] = lc, ls
    return log_u, log_1mu


# ---------------------------------------------------------------------- public
def pit(family, y, raw, *, seed=0, unit_interval=False) -> np.ndarray:
    """Probability integral transform u of each target (randomized for discrete families).

    ``seed`` (an int or a numpy Generator) draws the uniforms of the randomized
    transform; it is unused for continuous laws unless ``unit_interval=True``.
    Returns u in [0, 1], unclipped.
    """
    fam, y, raw = _inputs(family, y, raw)
    log_u, log_1mu = _log_pit(fam, y, raw, seed, unit_interval)
    return np.where(log_u <= log_1mu, np.exp(log_u), -np.expm1(log_1mu))


def quantile_residuals(family, y, raw, *, seed=0, unit_interval=False) -> np.ndarray:
    """Quantile residuals z = Phi^{-1}(u), standard normal when the model is right.

    Discrete families get the randomized residual of Dunn and Smyth (1996),
    seeded by ``seed``.  u and 1 - u are clipped up to ``TINY`` for the normal
    transform only (|z| <= 37.5); see the module docstring.
    """
    fam, y, raw = _inputs(family, y, raw)
    log_u, log_1mu = _log_pit(fam, y, raw, seed, unit_interval)
    lo = np.maximum(log_u, _LOG_TINY)
    hi = np.maximum(log_1mu, _LOG_TINY)
    return np.where(lo <= hi, ndtri_exp(lo), -ndtri_exp(hi))


def qq_data(residuals):
    """(theoretical, sample) quantiles for a normal QQ plot of the residuals.

    The sample quantiles are the sorted finite residuals; the theoretical ones
    are Phi^{-1}((i - 3/8) / (n + 1/4)), i = 1..n (Blom's plotting positions,
    common practice for normal QQ plots).
    """
    z = np.asarray(residuals, dtype=float).ravel()
    bad = ~np.isfinite(z)
    if np.any(bad):
        raise ValueError(f"qq_data: residuals must be finite; {int(bad.sum())} rows are not")
    n = z.size
    if n == 0:
        raise ValueError("qq_data: no residuals")
    i = np.arange(1, n + 1, dtype=float)
    return stats.norm.ppf((i - 0.375) / (n + 0.25)), np.sort(z)


def ks_statistic(residuals) -> float:
    """Kolmogorov-Smirnov distance between the residuals' empirical cdf and N(0, 1)."""
    z = np.asarray(residuals, dtype=float).ravel()
    if z.size == 0:
        raise ValueError("ks_statistic: no residuals")
    return float(stats.kstest(z, "norm").statistic)


def calibration_table(family, y, raw, *, bins=10, binning="equal_count", weight=None) -> dict:
    """Binned predicted probability against the observed rate, for 0/1 targets.

    The predicted probability that y = 1 is ``law.sf(0.5)`` = P(Y > 1/2), which
    is p itself for bernoulli; the table is :func:`binned_calibration` of it.
    """
    fam = _make_family(family)
    y = _checks.as_float_array(y, "y", fam.name)
    _checks.BINARY.check(y, "y (for a calibration table)", fam.name)
    raw = _checks.check_raw(raw, y, fam.name)
    p = np.asarray(fam.distribution(raw).sf(0.5), dtype=float)
    return binned_calibration(y, p, bins=bins, binning=binning, weight=weight)


#: the ways :func:`binned_calibration` can cut [0, 1]
BINNINGS = ("equal_count", "equal_width")


def binned_calibration(y, prob, *, bins=10, binning="equal_count", weight=None) -> dict:
    """Calibration table from 0/1 targets and predicted probabilities of y = 1.

    Rows are binned by ``prob``: ``binning="equal_count"`` cuts at the
    sample quantiles of ``prob`` (bins with about equal row counts),
    ``"equal_width"`` cuts [0, 1] into bins of equal width.  Returns a dict of
    equal-length arrays (empty bins dropped): ``lower``, ``upper`` (bin
    edges), ``predicted`` (mean predicted probability), ``observed`` (rate of
    y = 1), ``count`` (rows) and ``weight`` (their total weight; equal to
    count when unweighted).  Means are weighted when ``weight`` is given.
    """
    owner = "calibration"
    y = _checks.as_float_array(y, "y", owner)
    _checks.BINARY.check(y, "y", owner)
    p = _checks.as_float_array(prob, "prob", owner)
    if p.shape != y.shape:
        raise ValueError(f"{owner}: prob has shape {p.shape} but y has shape {y.shape}")
    _checks.Domain("a probability in [0, 1]", lambda a: (a >= 0) & (a <= 1)).check(p, "prob", owner)
    w = _checks.check_weight(weight, y, owner, need_positive_sum=True)
    w = np.ones_like(y) if w is None else np.asarray(w, dtype=float)
    if isinstance(bins, bool) or int(bins) != bins or int(bins) < 1:
        raise ValueError(f"{owner}: bins must be an integer >= 1, got {bins!r}")
    bins = int(bins)
    if binning == "equal_count":
        edges = np.quantile(p, np.linspace(0.0, 1.0, bins + 1))
        edges[0], edges[-1] = 0.0, 1.0
        edges = np.unique(edges)
    elif binning == "equal_width":
        edges = np.linspace(0.0, 1.0, bins + 1)
    else:
        raise ValueError(f"{owner}: binning must be one of {', '.join(map(repr, BINNINGS))}, got {binning!r}")
    idx = np.clip(np.searchsorted(edges, p, side="right") - 1, 0, edges.size - 2)
    nb = edges.size - 1
    count = np.bincount(idx, minlength=nb)
    wsum = np.bincount(idx, weights=w, minlength=nb)
    keep = (count > 0) & (wsum > 0)
    with np.errstate(invalid="ignore", divide="ignore"):
        pred = np.bincount(idx, weights=w * p, minlength=nb) / wsum
        obs = np.bincount(idx, weights=w * y, minlength=nb) / wsum
    return {
        "lower": edges[:-1][keep],
        "upper": edges[1:][keep],
        "predicted": pred[keep],
        "observed": obs[keep],
        "count": count[keep],
        "weight": wsum[keep],
    }


def interval_coverage(family, y, raw, levels=(0.5, 0.8, 0.9, 0.95), *, weight=None) -> dict:
    """Nominal against observed coverage of the central prediction intervals.

    For each level the interval is ``family.distribution(raw).interval(level)``
    (closed, [lo, hi]); the observed coverage is the (weighted) fraction of
    rows with lo <= y <= hi.  For a discrete law the interval's end points are
    quantiles, so its probability is at least the level and coverage above
    nominal is expected.  Returns a dict of arrays: ``level``, ``observed``,
    ``mean_width`` (mean of hi - lo) and ``count`` (rows).
    """
    fam, y, raw = _inputs(family, y, raw, for_nll=False)
    w = _checks.check_weight(weight, y, fam.name, need_positive_sum=True)
    w = np.ones_like(y) if w is None else np.asarray(w, dtype=float)
    levels = np.atleast_1d(np.asarray(levels, dtype=float))
    if np.any(~((levels > 0) & (levels < 1))):
        raise ValueError(f"interval_coverage: levels must be strictly between 0 and 1, got {levels.tolist()}")
    law = fam.distribution(raw)
    observed, width = [], []
    for level in levels:
        lo, hi = law.interval(level)
        lo = np.broadcast_to(np.asarray(lo, dtype=float), y.shape)
        hi = np.broadcast_to(np.asarray(hi, dtype=float), y.shape)
        inside = (lo <= y) & (y <= hi)
        observed.append(float(np.dot(w, inside) / w.sum()))
        width.append(float(np.mean(hi - lo)))
    return {
        "level": levels,
        "observed": np.asarray(observed),
        "mean_width": np.asarray(width),
        "count": np.full(levels.shape, y.size),
    }


#: how :func:`coverage_by_spread` measures a row's predicted spread
SPREADS = ("std", "iqr", "width")


def _law_spread(law, how, level):
    with np.errstate(invalid="ignore", over="ignore"):
        if how == "std":
            return np.asarray(law.std(), dtype=float)
        if how == "iqr":
            return np.asarray(law.ppf(0.75), dtype=float) - np.asarray(law.ppf(0.25), dtype=float)
        lo, hi = law.interval(level)
        return np.asarray(hi, dtype=float) - np.asarray(lo, dtype=float)


def coverage_by_spread(law, y, *, level=0.9, groups=10, spread="std", by=None, weight=None,
                       as_frame=False):
    """Coverage of the central ``level`` interval within groups of rows of similar predicted spread.

    A predictive law can cover 90% of all rows while covering 99% of the easy rows and 75% of the
    hard ones (a constant scale on heteroscedastic data).  This table checks the coverage per
    group: rows are cut into ``groups`` groups of about equal weight at the weighted sample
    quantiles of their predicted spread (deciles by default), and each group's coverage is reported beside the
    nominal level.  A right law gives ``level`` in every group, up to the binomial standard error
    ``se`` = sqrt(level (1 - level) / n_eff), n_eff = (sum w)^2 / sum w^2 of the group.

    Parameters
    ----------
    law : a frozen predictive law with per-row parameters (``family.distribution(raw)``, or an
        estimator's ``predict_distribution(X)``), with ``interval`` and, for the spread, ``std``
        or ``ppf``.
    y : (n,) targets.
    level : the interval's probability, strictly between 0 and 1.
    groups : number of groups (ties of the spread stay together, so fewer groups may come out;
        rows that all share one spread form one group).
    spread : what a row's predicted spread is, read from its law:
        ``"std"`` -- the law's standard deviation (gaussian / gaussian_spread: sigma; laplace:
        sqrt(2) b; gamma: mean / sqrt(shape); poisson: sqrt(mean); not finite for a Student t
        with df <= 2, use "iqr" there);
        ``"iqr"`` -- the interquartile range ppf(0.75) - ppf(0.25) (any law with a quantile
        function);
        ``"width"`` -- the width of the central ``level`` interval itself.
        For a one-score family with a constant scale, the spread still varies where it depends on
        the location (poisson, gamma, ...); for gaussian it is the same on every row, so the table
        has one group.  Pass ``by`` to group such a model's rows like another model's.
    by : (n,) array, optional
        Group by these values instead of the law's own spread (e.g. the predicted scale of a
        scale-varying model, to show a constant-scale model's coverage on the same groups).
    weight : (n,) row weights, optional.
    as_frame : return a pandas DataFrame instead of a dict of arrays.

    Returns
    -------
    A dict of equal-length arrays, one entry per group in increasing spread (``pandas.DataFrame``
    takes it as it is): ``group`` (0, 1, ...), ``lower`` and ``upper`` (the range of the grouping
    values in the group), ``spread`` (mean grouping value), ``count`` (rows), ``weight`` (their
    total weight), ``level``, ``coverage`` (weighted share of rows with lo <= y <= hi), ``se``
    and ``mean_width`` (mean interval width).  For a discrete law the interval's end points are
    values that carry mass, so coverage at or above the level is expected.
    """
    owner = "coverage_by_spread"
    y = _checks.as_float_array(y, "y", owner)
    if y.ndim != 1 or y.size == 0:
        raise ValueError(f"{owner}: y must be a non-empty one-dimensional array, got shape {y.shape}")
    level = float(level)
    if not 0.0 < level < 1.0:
        raise ValueError(f"{owner}: level must be strictly between 0 and 1, got {level!r}")
    if isinstance(groups, bool) or int(groups) != groups or int(groups) < 1:
        raise ValueError(f"{owner}: groups must be an integer >= 1, got {groups!r}")
    if spread not in SPREADS:
        raise ValueError(f"{owner}: spread must be one of {', '.join(map(repr, SPREADS))}, got {spread!r}")
    w = _checks.check_weight(weight, y, owner, need_positive_sum=True)
    w = np.ones_like(y) if w is None else np.asarray(w, dtype=float)
    lo, hi = law.interval(level)
    lo = np.broadcast_to(np.asarray(lo, dtype=float), y.shape)
    hi = np.broadcast_to(np.asarray(hi, dtype=float), y.shape)
    if by is None:
        key = np.broadcast_to(_law_spread(law, spread, level), y.shape)
        what = f"the law's {spread}"
    else:
        key = _checks.as_float_array(by, "by", owner)
        if key.shape != y.shape:
            raise ValueError(f"{owner}: by has shape {key.shape} but y has shape {y.shape}")
        what = "by"
    bad = ~np.isfinite(key)
    if bad.any():
        rows = np.flatnonzero(bad)
        raise ValueError(f"{owner}: {what} is not finite on {rows.size} row(s), e.g. rows {rows[:5].tolist()}"
                         + (" (a law without a finite standard deviation: use spread='iqr')"
                            if by is None and spread == "std" else ""))
    table = grouped_coverage(key, (lo <= y) & (y <= hi), hi - lo, w, level, int(groups))
    if as_frame:
        import pandas as pd

        return pd.DataFrame(table)
    return table


def grouped_coverage(key, inside, width, w, level, groups=10) -> dict:
    """The table of :func:`coverage_by_spread` from per-row grouping values ``key``, interval
    indicators ``inside`` (the row's target lies in its central ``level`` interval), interval
    widths and weights (all (n,) arrays, checked by the caller)."""
    key = np.asarray(key, dtype=float)
    w = np.asarray(w, dtype=float)
    inside = np.asarray(inside, dtype=bool)
    width = np.asarray(width, dtype=float)
    # weighted quantiles (the inverse of the weighted empirical cdf), so weights act as repeated rows
    order = np.argsort(key, kind="stable")
    cum = np.cumsum(w[order])
    q = np.linspace(0.0, 1.0, int(groups) + 1)[1:-1] * cum[-1]
    inner = key[order][np.minimum(np.searchsorted(cum, q, side="left"), key.size - 1)]
    edges = np.unique(np.concatenate([[key.min()], inner, [key.max()]]))
    # group g holds edges[g] <= key < edges[g + 1] (the last group closed above)
    idx = np.clip(np.searchsorted(edges, key, side="right") - 1, 0, max(edges.size - 2, 0))
    _, idx = np.unique(idx, return_inverse=True)  # number the non-empty groups 0, 1, ...
    ng = int(idx.max()) + 1
    wsum = np.bincount(idx, weights=w, minlength=ng)
    w2 = np.bincount(idx, weights=w * w, minlength=ng)
    count = np.bincount(idx, minlength=ng)
    with np.errstate(invalid="ignore", divide="ignore"):
        cover = np.bincount(idx, weights=w * inside, minlength=ng) / wsum
        n_eff = wsum * wsum / w2
        mean_key = np.bincount(idx, weights=w * key, minlength=ng) / wsum
    width = np.bincount(idx, weights=width, minlength=ng) / count
    low = np.array([key[idx == g].min() for g in range(ng)])
    high = np.array([key[idx == g].max() for g in range(ng)])
    keep = wsum > 0  # a group of zero-weight rows has no coverage to report
    table = {
        "group": np.arange(int(keep.sum())),
        "lower": low[keep],
        "upper": high[keep],
        "spread": mean_key[keep],
        "count": count[keep],
        "weight": wsum[keep],
        "level": np.full(int(keep.sum()), level),
        "coverage": cover[keep],
        "se": np.sqrt(level * (1.0 - level) / n_eff[keep]),
        "mean_width": width[keep],
    }
    return table
