"""A checker for families, built-in or user-registered.

``verify_family(fam, y, raw)`` runs the checks that every family must pass and
raises AssertionError listing what failed:

* nll, gradient and Hessian are finite float64 arrays of y's shape;
* the gradient equals the fourth-order central finite difference of nll in
  raw, and (for exact Hessians) the Hessian equals that of the gradient;
  surrogate Hessians are checked to be positive;
* the baseline is a minimiser: the weighted mean nll does not fall on
  either side of it;
* the deviance is >= 0;
* the predictive law's log density (or mass) equals -nll.

Use it in your own tests after ``lossfam.register(MyFamily)``.
"""
from __future__ import annotations

import numpy as np


def finite_difference(fun, x, step):
    """Fourth-order central difference of an elementwise function: error O(step^4)."""
    return (
        -fun(x + 2 * step) + 8 * fun(x + step) - 8 * fun(x - step) + fun(x - 2 * step)
    ) / (12 * step)


def _kink_free(fam, y, raw, step):
    """Rows where the gradient is smooth within 3 steps of raw (away from kinks of non-smooth families).

    Families with an exact Hessian are smooth everywhere.  For the others the
    analytic gradient at raw - 3 step, raw and raw + 3 step must lie on a
    line (true inside a linear or constant piece), which holds for every
    family without naming any: a kink between the points breaks it.
    """
    if fam.exact_hessian:
        return np.ones_like(y, dtype=bool)
    g0 = fam.grad_hess(y, raw)[0]
    lo = fam.grad_hess(y, raw - 3 * step)[0]
    hi = fam.grad_hess(y, raw + 3 * step)[0]
    scale = np.maximum(np.abs(g0), np.maximum(np.abs(lo), np.abs(hi)))
    return np.abs(lo + hi - 2.0 * g0) <= 1e-9 * np.maximum(scale, 1e-300)


def verify_family(fam, y, raw, weight=None, *, rtol=1e-5, atol=1e-7) -> None:
    """Check a family on targets ``y`` and raw scores ``raw``; raise AssertionError on failure."""
    y = np.asarray(y, dtype=float)
    raw = np.asarray(raw, dtype=float)
    problems = []
    nll = fam.nll(y, raw)
    g, h = fam.grad_hess(y, raw)
    for label, arr in (("nll", nll), ("gradient", g), ("Hessian", h)):
        if arr.shape != y.shape or arr.dtype != np.float64:
            problems.append(f"{label}: shape {arr.shape} dtype {arr.dtype}, expected {y.shape} float64")
        elif not np.all(np.isfinite(arr)):
            problems.append(f"{label}: non-finite values at rows {np.flatnonzero(~np.isfinite(arr))[:5]}")
    step = 1e-3 * np.maximum(1.0, np.abs(raw))
    smooth = _kink_free(fam, y, raw, step)
    fd_g = finite_difference(lambda r: fam.nll(y, r), raw, step)
    bad = smooth & ~np.isclose(g, fd_g, rtol=rtol, atol=atol * np.maximum(1.0, np.abs(fd_g)))
    if bad.any():
        i = np.flatnonzero(bad)[:3]
        problems.append(f"gradient != finite difference of nll at rows {i}: {g[i]} vs {fd_g[i]}")
    if fam.exact_hessian:
        fd_h = finite_difference(lambda r: fam.grad_hess(y, r)[0], raw, step)
        bad = smooth & ~np.isclose(h, fd_h, rtol=rtol, atol=atol * np.maximum(1.0, np.abs(fd_h)))
        if bad.any():
            i = np.flatnonzero(bad)[:3]
            problems.append(f"Hessian != finite difference of gradient at rows {i}: {h[i]} vs {fd_h[i]}")
    elif not np.all(h > 0):
        problems.append("surrogate Hessian is not positive everywhere")
    if weight is not None:
        gw, hw = fam.grad_hess(y, raw, weight)
        if not (np.allclose(gw, g * weight) and np.allclose(hw, h * weight)):
            problems.append("weighted gradient/Hessian are not weight times the unweighted ones")
    w = np.ones_like(y) if weight is None else np.broadcast_to(np.asarray(weight, float), y.shape)
    c = fam.baseline(y, weight)

    def mean_nll(v):
        return float(np.dot(w, fam.nll(y, np.full_like(y, v))) / w.sum())

    at = mean_nll(c)
    for eps in (1e-4, 1e-2):
        d = eps * max(1.0, abs(c))
        if mean_nll(c - d) < at - 1e-12 * max(1.0, abs(at)) or mean_nll(c + d) < at - 1e-12 * max(1.0, abs(at)):
            problems.append(f"baseline {c} is not a minimiser of the mean nll (step {d})")
    dev = fam.deviance(y, raw)
    if not np.all(dev >= 0):
        problems.append("deviance is negative somewhere")
    law = fam.distribution(raw)
    logp = law.logpmf(y) if hasattr(law, "logpmf") and fam.discrete else law.logpdf(y)
    if not np.allclose(-logp, nll, rtol=1e-9, atol=1e-9):
        problems.append("distribution(raw) log density does not equal -nll")
    if problems:
        raise AssertionError(f"{fam.name}: " + "; ".join(problems))
