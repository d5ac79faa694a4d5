r"""Censored and interval targets: rows known only to lie between two bounds.

A row of an :class:`IntervalTarget` is a pair ``(lower, upper)`` with
``lower <= upper``:

=========================  ====================================================
bounds                     meaning
=========================  ====================================================
``lower == upper == y``    exact: observed at y (the family's usual nll)
``(y, +inf)``              right-censored: still running at y (y or later)
``(-inf, y)``              left-censored: below a detection limit y
``(a, b)``, ``a < b``      interval-censored: somewhere between a and b
=========================  ====================================================

A bound at or beyond the edge of a family's support is the same as an open
side (for a positive family, ``lower = 0`` and ``lower = -inf`` both mean
"no lower bound").  A censored row contributes ``-log(F(upper) - F(lower))`` to
the nll, where ``F`` is the family's cdf at the row's raw score; an exact row
contributes ``-log f(y)`` as before.  The math is on the family
(:meth:`lossfam.Family.nll` and friends accept an IntervalTarget wherever
they accept ``y``); this module only holds the target form.

Constructors
------------
``interval_target(lower, upper)``
    the general form;
``right_censored(time, event)``
    durations: ``event`` true where the time was observed, false where the
    row was still running at ``time`` (the usual survival-data layout).

Validation here is family-free (shapes, NaN, ``lower > upper``, a lower
bound of +inf or an upper bound of -inf); the family checks its own support
(``Family.check_target``).  Errors name the rows.
"""
from __future__ import annotations

import numpy as np

from . import _checks


class IntervalTarget:
    """Per-row bounds ``lower <= upper`` of a partly observed target (module docstring).

    Attributes
    ----------
    lower, upper : float64 ndarrays of one dimension and equal length
    exact : bool ndarray, True where ``lower == upper``
    """

    __slots__ = ("lower", "upper", "exact", "_split")

    def __init__(self, lower, upper, *, owner="interval target"):
        lo = _checks.as_float_array(lower, "lower", owner)
        hi = _checks.as_float_array(upper, "upper", owner)
        if lo.ndim == 0:
            lo = lo.reshape(1)
        if hi.ndim == 0:
            hi = hi.reshape(1)
        if lo.ndim != 1 or hi.ndim != 1:
            raise ValueError(f"{owner}: lower and upper must be one-dimensional, got shapes {lo.shape} and {hi.shape}")
        if lo.shape != hi.shape:
            raise ValueError(f"{owner}: lower has {lo.size} rows but upper has {hi.size}; give one pair of bounds per row")
        for arr, what in ((lo, "lower"), (hi, "upper")):
            nan = np.isnan(arr)
            if nan.any():
                raise ValueError(f"{owner}: {what} bound is NaN in {_checks.rows_text(nan, arr)}; "
                                 "an open side is -inf (lower) or +inf (upper)")
        bad = lo == np.inf
        if bad.any():
            raise ValueError(f"{owner}: lower bound is +inf in {_checks.rows_text(bad, lo)}; no value lies above it")
        bad = hi == -np.inf
        if bad.any():
            raise ValueError(f"{owner}: upper bound is -inf in {_checks.rows_text(bad, hi)}; no value lies below it")
        bad = lo > hi
        if bad.any():
            idx = np.flatnonzero(bad)[:5]
            pairs = ", ".join(f"({float(lo[i])!r}, {float(hi[i])!r})" for i in idx)
            noun = "row" if bad.sum() == 1 else "rows"
            raise ValueError(f"{owner}: lower > upper in {int(bad.sum())} {noun}, e.g. {noun} "
                             f"{[int(i) for i in idx]} = [{pairs}]")
        lo, hi = lo.copy(), hi.copy()  # own read-only copies: the row split cached below stays true
        lo.flags.writeable = False
        hi.flags.writeable = False
        self.lower = lo
        self.upper = hi
        self.exact = lo == hi
        self._split = None  # row indices by kind, filled on first use (lossfam.families._censored)

    # ------------------------------------------------------------------ array-like basics
    def __len__(self):
        return self.lower.size

    @property
    def shape(self):
        return self.lower.shape

    @property
    def size(self):
        return self.lower.size

    @property
    def ndim(self):
        return 1

    def __getitem__(self, idx):
        """The rows ``idx`` (a mask, an index array or a slice) as an IntervalTarget."""
        return _from_valid(self.lower[idx], self.upper[idx])

    def __eq__(self, other):
        return (isinstance(other, IntervalTarget) and np.array_equal(self.lower, other.lower)
                and np.array_equal(self.upper, other.upper))

    __hash__ = None

    def __repr__(self):
        n, e = self.size, int(self.exact.sum())
        return f"IntervalTarget({n} rows: {e} exact, {n - e} censored)"

    @property
    def censored_fraction(self) -> float:
        return float(np.mean(~self.exact)) if self.size else 0.0

    def midpoint(self):
        """A stand-in value per row for starting points and plots (not for the likelihood):
        y for exact rows, the finite bound for one-sided rows, the midpoint of a closed interval."""
        lo, hi = self.lower, self.upper
        with np.errstate(invalid="ignore"):
            mid = 0.5 * lo + 0.5 * hi
        # y itself on exact rows: halving a subnormal y first would round it to 0
        return np.where(np.isfinite(lo), np.where(np.isfinite(hi), np.where(lo == hi, lo, mid), lo), hi)


def _from_valid(lo, hi) -> IntervalTarget:
    t = IntervalTarget.__new__(IntervalTarget)
    t.lower, t.upper, t.exact, t._split = lo, hi, lo == hi, None
    return t


def interval_target(lower, upper) -> IntervalTarget:
    """Targets known to lie in ``[lower, upper]`` per row (module docstring for the conventions)."""
    return IntervalTarget(lower, upper)


def right_censored(time, event) -> IntervalTarget:
    """Durations: ``time`` per row, ``event`` true (or 1) where it was observed and false (or 0)
    where the row was still running at ``time`` (its bounds become ``(time, +inf)``)."""
    t = _checks.as_float_array(time, "time", "right_censored")
    e = np.asarray(event)
    if e.shape != t.shape:
        raise ValueError(f"right_censored: time has shape {t.shape} but event has shape {e.shape}")
    if e.dtype != bool:
        ef = _checks.as_float_array(e, "event", "right_censored")
        bad = ~((ef == 0) | (ef == 1))
        if bad.any():
            raise ValueError(f"right_censored: event must be 0/1 or boolean; {_checks.rows_text(bad, ef)}")
        e = ef == 1
    upper = np.where(e, t, np.inf)
    return IntervalTarget(t, upper, owner="right_censored")


def as_interval_target(y):
    """``y`` itself when it is an IntervalTarget, else None (plain targets stay plain)."""
    return y if isinstance(y, IntervalTarget) else None
