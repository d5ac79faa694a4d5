r"""Joint maximum likelihood of a linear model for each raw score of a SeveralScoreFamily.

The model (numpy and scipy only).  For rows i with weights w_i >= 0, v_i = w_i / sum w, and a
family with k raw scores, raw score j has its own design Z_j = [X_{S_j}, 1] (the columns S_j of
X, all of them by default, and an intercept column when fitted):

    raw_ij = X_{i,S_j} . beta_j + b_j + offset_ij
    F(theta) = sum_i v_i nll(y_i, raw_i) + alpha / 2 sum_j ||beta_j||^2

(theta stacks (beta_0, b_0, beta_1, b_1, ...); intercepts are not penalised).  This is the
varying-dispersion model of Smyth (1989, "Generalized linear models with varying dispersion",
JRSS B 51, 47-60) fitted by joint, not alternating, maximisation: the mean and dispersion
submodels share one Newton system.  With g_i = d nll / d raw_i (a k-vector) and H_i the k x k
Hessian of nll in raw_i, the chain rule through the linear maps gives

    dF/dtheta_j      = Z_j^T (v g_.j) + alpha (beta_j, 0)
    d2F/dtheta_j dtheta_l = Z_j^T diag(v H_.jl) Z_l + alpha [j = l] diag(1, ..., 1, 0)

Newton step: solve d2F d = -dF by Cholesky of the equilibrated matrix D^-1 d2F D^-1 (D the square
root of its diagonal; ``_solvers._newton_step``, the same symmetric Jacobi scaling as the
one-score solver, so columns in different units factorise as well as standardised ones).  The
exact Hessian of a location-scale nll is not positive definite everywhere (gaussian: a row's
2 x 2 Hessian in (mu, log sigma) has determinant -2 z^2 / sigma^2 <= 0, only the sum over rows
is positive definite near the maximum); where the summed exact matrix does not factorise the step
uses the expected information E_y[H_i] (the family's ``_fisher``) in its place (Fisher scoring,
positive definite for a full-rank design).  A backtracking (Armijo) line search on F makes every
step a descent step.  Near the maximum the exact Hessian is positive definite and the steps are
Newton's, so convergence there is quadratic.

Stopping rule: max over coefficients of |dF/dtheta| / c, with c = sqrt(sum_i v_i x_ij^2) for the
coefficient of column j (1 for an intercept): the gradient for standardised columns (unit-free),
as in ``_solvers.newton``; or a full step that changes no raw score beyond rounding.

Starting point: every beta_j = 0 and the intercepts at ``family.baseline(y, w, offset)`` (the
best constant raw-score vector), so the first iterate is the intercept-only maximum.

A likelihood may have no finite maximiser (gaussian: a scale submodel that can send sigma to 0
on rows the mean submodel fits exactly, e.g. a feature taking a value on fewer rows than the
mean submodel has coefficients); the iteration then stops at max_iter without convergence and
the estimator warns.  A ridge penalty alpha > 0 keeps the estimate finite.
"""
from __future__ import annotations

import dataclasses

import numpy as np

from ._solvers import _EPS, _ROUNDING, _newton_step, column_scales


@dataclasses.dataclass
class JointFit:
    coefs: list  # k arrays, beta_j over the columns of score j
    intercepts: np.ndarray  # (k,)
    raw: np.ndarray  # (n, k), offset included
    n_iter: int
    objective: float
    grad_norm: float
    converged: bool
    fisher_steps: int  # steps that used the expected information in place of the exact Hessian


def _layout(masks, fit_intercept):
    """Slices of theta per score and the index of each intercept (or None)."""
    out, start = [], 0
    for m in masks:
        pj = int(np.count_nonzero(m))
        size = pj + int(fit_intercept)
        out.append((slice(start, start + pj), start + pj if fit_intercept else None))
        start += size
    return out, start


def joint_newton(fam, X, y, v, offset, masks, alpha, fit_intercept, max_iter, tol, start, theta0=None) -> JointFit:
    """Maximise the joint likelihood (module docstring).

    ``X`` dense (n, p) float64; ``masks`` k boolean (p,) arrays (the columns of each score);
    ``offset`` None or (n, k); ``start`` the (k,) starting intercepts (zeros without intercepts);
    ``theta0`` a full starting point (a list of k (coefficients, intercept) pairs) instead.
    """
    n, p = X.shape
    k = len(masks)
    Xs = [np.ascontiguousarray(X[:, m]) for m in masks]
    lay, size = _layout(masks, fit_intercept)
    cols = column_scales(X, v) if p else np.zeros(0)
    inv_c = np.ones(size)
    pen = np.zeros(size)  # alpha on the penalised coordinates
    for j, (sl, _) in enumerate(lay):
        inv_c[sl] = 1.0 / cols[masks[j]]
        pen[sl] = alpha
    theta = np.zeros(size)
    if fit_intercept:
        for j, (_, b) in enumerate(lay):
            theta[b] = start[j]
    if theta0 is not None:
        for j, (sl, b) in enumerate(lay):
            theta[sl] = theta0[j][0]
            if b is not None:
                theta[b] = theta0[j][1]

    def raw_of(th):
        raw = np.empty((n, k))
        for j, (sl, b) in enumerate(lay):
            raw[:, j] = Xs[j] @ th[sl] if Xs[j].shape[1] else 0.0
            if b is not None:
                raw[:, j] += th[b]
        if offset is not None:
            raw += offset
        return raw

    def objective(raw, th):
        with np.errstate(over="ignore", invalid="ignore"):
            per_row = fam._nll(y, raw)
        val = float(np.dot(v, per_row)) + 0.5 * float(np.dot(pen * th, th))
        return val, 16.0 * _EPS * float(np.dot(v, np.abs(per_row)))

    def gradient(raw, th):
        with np.errstate(over="ignore", invalid="ignore"):
            g = fam._gradient(y, raw) * v[:, None]
        out = pen * th
        for j, (sl, b) in enumerate(lay):
            out[sl] += Xs[j].T @ g[:, j]
            if b is not None:
                out[b] += g[:, j].sum()
        return out

    def matrix(hv):
        """d2F from per-row k x k curvature hv (already times v)."""
        H = np.zeros((size, size))
        for j, (slj, bj) in enumerate(lay):
            for l in range(j, k):
                sll, bl = lay[l]
                h = hv[:, j, l]
                A = Xs[j] * h[:, None]
                blk = np.zeros((slj.stop - slj.start + (bj is not None), sll.stop - sll.start + (bl is not None)))
                pj, pl = slj.stop - slj.start, sll.stop - sll.start
                blk[:pj, :pl] = A.T @ Xs[l]
                if bl is not None:
                    blk[:pj, pl] = A.sum(axis=0)
                if bj is not None:
                    blk[pj, :pl] = h @ Xs[l]
                    if bl is not None:
                        blk[pj, pl] = h.sum()
                rj = slice(slj.start, slj.start + blk.shape[0])
                rl = slice(sll.start, sll.start + blk.shape[1])
                H[rj, rl] = blk
                H[rl, rj] = blk.T
        H[np.diag_indices(size)] += pen
        return H

    raw = raw_of(theta)
    F, noise = objective(raw, theta)
    if not np.isfinite(F):
        raise FloatingPointError("the nll is not finite at the starting point")
    grad = gradient(raw, theta)
    converged = False
    fisher_steps = 0
    gnorm = np.inf
    it = 0
    for it in range(max_iter + 1):
        gnorm = float(np.max(np.abs(grad * inv_c))) if size else 0.0
        if not np.isfinite(gnorm):
            raise FloatingPointError("the gradient is not finite: the raw scores overflowed")
        if gnorm <= tol:
            converged = True
            break
        if it == max_iter:
            break
        with np.errstate(over="ignore", invalid="ignore"):
            hv = fam._hessian(y, raw) * v[:, None, None]
        d = None
        if np.all(np.isfinite(hv)):
            d, _ = _newton_step(matrix(hv), grad, exact=False)
        if d is None or not float(grad @ d) > 0:
            with np.errstate(over="ignore", invalid="ignore"):
                fv = fam._fisher(raw) * v[:, None, None]
            d, _ = _newton_step(matrix(fv), grad)
            fisher_steps += 1
        d = -d
        draw = raw_of(d) - (offset if offset is not None else 0.0)
        slope = float(grad @ d)
        t, accepted = 1.0, False
        for _ in range(60):
            th_new = theta + t * d
            raw_new = raw + t * draw
            F_new, noise_new = objective(raw_new, th_new)
            if np.isfinite(F_new) and (F_new <= F + 1e-4 * t * slope or F_new <= F + max(noise, noise_new)):
                accepted = True
                break
            t *= 0.5
        if not accepted:
            # no descent possible: at the optimum to rounding when the full step is below the
            # rounding of the raw scores, else a singular or unbounded problem
            converged = float(np.max(np.abs(draw), initial=0.0)) <= _ROUNDING * float(np.max(np.abs(raw), initial=0.0))
            break
        change = t * float(np.max(np.abs(draw), initial=0.0))
        theta, raw, F, noise = th_new, raw_new, F_new, noise_new
        grad = gradient(raw, theta)
        if t == 1.0 and change <= _ROUNDING * float(np.max(np.abs(raw), initial=0.0)):
            gnorm = float(np.max(np.abs(grad * inv_c))) if size else 0.0
            converged = True
            it += 1
            break
    coefs = [theta[sl].copy() for sl, _ in lay]
    intercepts = np.array([theta[b] if b is not None else 0.0 for _, b in lay])
    return JointFit(coefs, intercepts, raw, it, F, gnorm, converged, fisher_steps)


class FirstScoreFixed:
    """A several-score family with its first raw score held at ``raw0`` (per row): the hooks the
    solver calls see only the other raw scores (the full ones with row and column 0 dropped).
    Used only inside a fit: the location held while the scale is fitted, or the multinomial's
    reference class at 0."""

    def __init__(self, fam, raw0):
        self.family, self.raw0 = fam, raw0

    def _full(self, r):
        return np.column_stack([self.raw0, r])

    def _nll(self, y, r):
        return self.family._nll(y, self._full(r))

    def _gradient(self, y, r):
        return self.family._gradient(y, self._full(r))[:, 1:]

    def _hessian(self, y, r):
        return self.family._hessian(y, self._full(r))[:, 1:, 1:]

    def _fisher(self, r):
        return self.family._fisher(self._full(r))[:, 1:, 1:]


def kinked_location_alternation(fam, X, y, v, offset, masks, alpha, fit_intercept, max_iter, tol, start,
                                tau, factor, max_rounds=100) -> JointFit:
    r"""Joint maximum likelihood for a family whose nll has a kink in the location (laplace and
    asymmetric laplace with a log scale per row): nll_i = factor rho_tau(y_i - mu_i) / b_i +
    (terms in b_i only), rho_tau the pinball loss.

    Newton's method does not apply to the location (its second derivative is 0 almost everywhere),
    so the two blocks are minimised in turn, each exactly:

    * location given the scales: minimise sum_i v_i factor rho_tau(y_i - mu_i) / b_i (+ the ridge
      term): quantile regression with row weights v_i / b_i, by linear programming
      (``_solvers.quantile_lp``; with alpha > 0 the certified active-set solve
      ``_solvers.ridge_pinball``);
    * scales given the location: ``joint_newton`` on the scale raw scores (smooth and convex in
      them: |r| e^{-r1} + r1).

    F falls at every half step; the rounds stop when a round lowers it by no more than 1e-13
    relatively (the location's row split then no longer changes).  The result is a point that
    neither block can improve (block coordinate descent); the tests check it against a direct
    search over all coefficients.
    """
    from ._solvers import quantile_lp, ridge_pinball

    n, p = X.shape
    o0 = None if offset is None else offset[:, 0]
    o_rest = None if offset is None else offset[:, 1:]
    rest = masks[1:]
    scale_theta = None
    raw_rest = np.tile(start[1:], (n, 1)) + (0.0 if o_rest is None else o_rest)
    F_old = np.inf
    total_iter, converged, fisher = 0, False, 0
    loc = sc = None
    for _ in range(max_rounds):
        c = v * np.exp(-raw_rest[:, 0])  # b_i from the scale column (log link)
        Xl = np.ascontiguousarray(X[:, masks[0]])
        if alpha > 0:
            loc = ridge_pinball(Xl, y, c, o0, tau, factor, alpha, fit_intercept)
        else:
            loc = quantile_lp(Xl, y, c, o0, tau, fit_intercept)
        view = FirstScoreFixed(fam, loc.raw)
        sc = joint_newton(view, X, y, v, o_rest, rest, alpha, fit_intercept, max_iter, tol,
                          np.asarray(start[1:], dtype=float), theta0=scale_theta)
        total_iter += 1 + sc.n_iter
        fisher += sc.fisher_steps
        scale_theta = list(zip(sc.coefs, sc.intercepts))
        raw_rest = sc.raw
        F = sc.objective + 0.5 * alpha * float(loc.coef @ loc.coef)
        if not sc.converged:
            break
        if F_old - F <= 1e-13 * abs(F):
            converged = True
            break
        F_old = F
    raw = np.column_stack([loc.raw, sc.raw])
    coefs = [loc.coef] + list(sc.coefs)
    intercepts = np.concatenate([[loc.intercept if fit_intercept else 0.0], sc.intercepts])
    return JointFit(coefs, intercepts, raw, total_iter, F, sc.grad_norm, converged, fisher)
