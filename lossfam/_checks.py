"""Input checks for lossfam: one place that states each domain and words each error.

Every public entry point validates its arrays here; the family kernels then
assume valid input.  Errors name the family, the rule that was broken, how many
rows broke it, and the first few offending row indices with their values, e.g.::

    poisson: y must be a non-negative integer; 3 rows outside, e.g. rows [4, 17, 90] = [-1.0, 2.5, nan]
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np

_SHOW = 5  # how many offending rows an error message lists


def as_float_array(x, what: str, owner: str) -> np.ndarray:
    """Return ``x`` as a float64 ndarray (no copy when it already is one).

    Complex numbers (whose imaginary part would be dropped), dates and time
    spans (which would become counts of days or nanoseconds) are refused.
    """
    try:
        dtype = getattr(x, "dtype", None)
        kind = dtype.kind if isinstance(dtype, np.dtype) else np.asarray(x).dtype.kind
    except (TypeError, ValueError):  # ragged input: the conversion below words the error
        kind = "O"
    if kind in "cmM":
        name = {"c": "complex numbers", "m": "time spans", "M": "dates"}[kind]
        raise ValueError(f"{owner}: {what} must be real numbers, got {name}; convert them to numbers first")
    try:
        arr = np.asarray(x, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise ValueError(f"{owner}: {what} must be numeric ({exc})") from None
    return arr


def rows_text(bad: np.ndarray, values: np.ndarray) -> str:
    """'3 rows, e.g. rows [4, 17, 90] = [-1.0, 2.5, nan]' for the True entries of ``bad``."""
    return _describe_rows(bad, values).replace(" outside,", ",", 1)


def _describe_rows(bad: np.ndarray, values: np.ndarray) -> str:
    idx = np.flatnonzero(bad)
    shown = idx[:_SHOW]
    vals = ", ".join(repr(float(v)) for v in values.ravel()[shown])
    if bad.ndim > 1:  # (row, column) pairs rather than flat positions
        rows = ", ".join(str(tuple(int(j) for j in np.unravel_index(i, bad.shape))) for i in shown)
    else:
        rows = ", ".join(str(int(i)) for i in shown)
    noun = "row" if idx.size == 1 else "rows"
    return f"{idx.size} {noun} outside, e.g. {noun} [{rows}] = [{vals}]"


@dataclass(frozen=True)
class Domain:
    """A set of admissible values, stated as data.

    ``rule`` is the human sentence used in errors; ``inside`` maps a float64
    array to a boolean mask of admissible entries (NaN must map to False).
    ``quick`` is an optional cheap whole-array test that returns True only
    when every entry is certainly admissible (used to skip the mask pass).
    """

    rule: str
    inside: Callable[[np.ndarray], np.ndarray]
    quick: Callable[[np.ndarray], bool] | None = None

    def check(self, arr: np.ndarray, what: str, owner: str) -> None:
        if arr.size == 0:
            return
        if self.quick is not None and self.quick(arr):
            return
        ok = self.inside(arr)
        if not ok.all():
            bad = ~ok
            raise ValueError(f"{owner}: {what} must be {self.rule}; {_describe_rows(bad, arr)}")


def _finite_sum(arr) -> bool:
    """One pass: a finite sum proves every entry finite (NaN and inf propagate).

    A sum that overflows on finite entries returns False, and the caller then
    falls back to the exact elementwise test, so this never wrongly refuses.
    """
    with np.errstate(over="ignore", invalid="ignore"):
        return bool(np.isfinite(np.sum(arr)))


def _quick_finite(arr):
    return _finite_sum(arr)


#: rows per block of :func:`_bounds` (a block stays in the L2 cache between its two reductions)
_BOUNDS_BLOCK = 1 << 16


def _bounds(arr):
    """(min, max) of ``arr`` with one pass over memory: each block is reduced twice while cached.

    NaN propagates into both (numpy's min and max do).
    """
    if arr.ndim != 1 or arr.size <= _BOUNDS_BLOCK:
        return float(np.min(arr)), float(np.max(arr))
    blocks = [arr[i:i + _BOUNDS_BLOCK] for i in range(0, arr.size, _BOUNDS_BLOCK)]
    return float(np.min([b.min() for b in blocks])), float(np.max([b.max() for b in blocks]))


def _quick_nonneg(arr):
    lo, hi = _bounds(arr)
    return lo >= 0 and hi < np.inf  # lo >= 0 is False for NaN


def _quick_positive(arr):
    lo, hi = _bounds(arr)
    return lo > 0 and hi < np.inf


REAL = Domain("a finite real number", np.isfinite, _quick_finite)
NONNEGATIVE = Domain("finite and >= 0", lambda a: np.isfinite(a) & (a >= 0), _quick_nonneg)
POSITIVE = Domain("finite and > 0", lambda a: np.isfinite(a) & (a > 0), _quick_positive)
NONNEGATIVE_INTEGER = Domain(
    "a non-negative integer",
    lambda a: np.isfinite(a) & (a >= 0) & (np.floor(a) == a),
    lambda a: _quick_nonneg(a) and bool(np.array_equal(np.floor(a), a)),
)
BINARY = Domain("0 or 1", lambda a: (a == 0) | (a == 1))


def _quick_open_unit(arr):
    lo, hi = _bounds(arr)
    return lo > 0 and hi < 1  # False for NaN


OPEN_UNIT = Domain("strictly between 0 and 1", lambda a: (a > 0) & (a < 1), _quick_open_unit)


def check_target(y, domain: Domain, owner: str) -> np.ndarray:
    """Validate targets ``y`` against ``domain``; return them as float64."""
    y = as_float_array(y, "y", owner)
    if y.ndim > 1:
        hint = "; for one column use y.ravel()" if y.ndim == 2 and y.shape[1] == 1 else ""
        raise ValueError(f"{owner}: y must be one-dimensional (one target per row), got shape {y.shape}{hint}")
    domain.check(y, "y", owner)
    return y


def check_raw(raw, y: np.ndarray | None, owner: str) -> np.ndarray:
    """Validate raw scores: finite, and the same shape as ``y`` when given."""
    raw = as_float_array(raw, "raw", owner)
    if y is not None and raw.shape != y.shape:
        raise ValueError(
            f"{owner}: raw has shape {raw.shape} but y has shape {y.shape}; "
            "pass one raw score per target row"
        )
    REAL.check(raw, "raw (the raw score)", owner)
    return raw


def check_weight(weight, y: np.ndarray, owner: str, *, need_positive_sum: bool = False):
    """Validate sample weights: broadcastable to ``y``, finite and >= 0.

    Returns None when ``weight`` is None, else a float64 array broadcast to
    the shape of ``y`` (a read-only view when it was broadcast).
    """
    if weight is None:
        return None
    w = as_float_array(weight, "weight", owner)
    try:
        w = np.broadcast_to(w, y.shape)
    except ValueError:
        raise ValueError(
            f"{owner}: weight has shape {w.shape}, which does not broadcast to y's shape {y.shape}"
        ) from None
    NONNEGATIVE.check(w, "weight", owner)
    if need_positive_sum and not np.any(w > 0):
        raise ValueError(f"{owner}: weights sum to zero; at least one row needs a positive weight")
    return w


def unit_weight(weight, y: np.ndarray, owner: str) -> np.ndarray:
    """Checked weights rescaled so the largest lies in [1/2, 1) (ones when None).

    For fits where only relative weights matter: sums of weights near 1e308
    no longer overflow, nor products with subnormal weights underflow.  The
    factor is a power of two, so the rescaling is exact (integer weights keep
    their exact ties, e.g. in a weighted median).
    """
    w = check_weight(weight, y, owner, need_positive_sum=True)
    if w is None:
        return np.ones_like(y)
    _, exponent = np.frexp(np.max(w))
    return np.ldexp(w, -int(exponent))


def finite_residuals(r: np.ndarray, owner: str) -> np.ndarray:
    """Residuals y - raw, refused (rows named) where the subtraction overflowed."""
    if _finite_sum(r):  # one pass, no mask: every entry is finite
        return r
    bad = ~np.isfinite(r)
    if np.any(bad):
        raise ValueError(f"{owner}: y - raw overflows float64 in {rows_text(bad, r)}; the nuisance parameters cannot be fitted")
    return r


def check_nonempty(y: np.ndarray, owner: str) -> None:
    if y.size == 0:
        raise ValueError(f"{owner}: y is empty; at least one row is needed")


def check_param(name: str, value, domain: Domain, owner: str) -> float:
    """Validate one scalar nuisance parameter and return it as a Python float."""
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"{owner}: parameter {name} must be a number, got {value!r}") from None
    if not bool(domain.inside(np.asarray([v]))[0]):
        raise ValueError(f"{owner}: parameter {name} must be {domain.rule}, got {v!r}")
    return v
