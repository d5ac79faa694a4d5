r"""Exact solvers for penalised maximum likelihood in a linear model (numpy and scipy only).

The model and the objective, for rows i with weights w_i >= 0 and v_i = w_i / sum w:

    raw_i = x_i . coef + intercept + offset_i
    F(coef, intercept) = sum_i v_i nll(y_i, raw_i) + alpha / 2 ||coef||^2

(the intercept is not penalised).  Three solvers, chosen by the family:

``newton``
    Smooth families (exact Hessian).  With g_i, h_i the first two derivatives of
    nll in raw, the gradient and Hessian of F are

        dF/dcoef = X^T (v g) + alpha coef,          dF/dintercept = sum v g
        d2F      = [X 1]^T diag(v h) [X 1] + alpha diag(1, ..., 1, 0)

    The Newton direction solves d2F d = -dF by Cholesky (scipy.linalg.cho_factor);
    a backtracking (Armijo) line search on F makes each step a descent step, so
    the iteration converges from any start for a convex nll and quadratically
    near the optimum.  If the Cholesky factorisation fails (a singular design
    with alpha = 0, or a non-convex user family) the matrix is damped by
    lambda I with lambda growing tenfold until it factorises (a
    Levenberg-Marquardt step).  X^T diag(v h) X is accumulated in row blocks
    with one BLAS symmetric rank-k update (dsyrk) per block on the pre-scaled
    rows sqrt(v h) x_i.  Stops when max |dF| <= tol.

    Families whose Hessian is a surrogate (``exact_hessian`` False, e.g. a user
    family) use the same iteration with the surrogate in place of d2F: each
    step is then a majorise-minimise step (linear, not quadratic, convergence).

``huber``
    The Huber nll is convex and once continuously differentiable in raw; its
    second derivative is 1/s^2 inside the core |u| <= delta and 0 outside.
    Newton's iteration with that generalised Hessian (a semismooth Newton
    method) and the line search above terminates once the set of core rows
    settles; if the core rows alone give a singular matrix, that iteration uses
    the family's surrogate curvature instead.  The scale s is fitted by
    maximum likelihood jointly with the coefficients by alternating the two
    blocks (coefficients given s to max |dF| <= tol; s given the coefficients
    by ``Huber.fit_nuisance``) until s changes by less than 1e-10 relatively.
    With theta = coef / s and tau = 1 / s the unpenalised nll is
    rho(tau y - x theta) - log tau + const, jointly convex in (theta, tau), so
    the alternation (block coordinate descent on a smooth convex function)
    reaches the joint maximum-likelihood estimate.  When the model can fit every
    row exactly, the likelihood grows without bound as s -> 0 and no joint
    estimate exists: if the scale falls below 1e-6 times its value at the
    baseline the alternation stops, keeps the last scale and reports it.

``quantile_lp``
    Laplace and asymmetric Laplace: minimising sum v rho_tau(y - raw) is the
    linear programme

        minimise   sum_i v_i (tau u_i + (1 - tau) l_i)
        subject to x_i . coef + intercept + u_i - l_i = y_i - offset_i,  u, l >= 0

    (u - l is the residual), solved exactly by scipy.optimize.linprog with
    HiGHS on a sparse constraint matrix.  The scale b does not change the
    minimiser when alpha = 0.

``ridge_pinball``
    Laplace and asymmetric Laplace with alpha > 0: a quadratic programme, which
    linprog cannot solve.  Its optimality conditions are linear once the rows
    are split by the sign of their residual; the split is located by a
    smoothing continuation and the linear system is then solved and checked
    (see the function).  With alpha > 0 the minimiser depends on the scale b
    given to the family (nll = rho / b): the penalised objective is the one
    stated above with the family as given.
"""
from __future__ import annotations

import dataclasses

import numpy as np
from scipy import linalg, optimize, sparse
from scipy.linalg.blas import dsyrk

_BLOCK = 8192  # rows per block when accumulating X^T diag(h) X
_EPS = np.finfo(float).eps
SUBSAMPLE_MIN_ROWS = 100_000  # subsampled Hessians (far from the optimum) only from this many rows
SUBSAMPLE_FRACTION = 8  # ... using one row in this many
SUBSAMPLE_WHILE_STEP = 0.02  # ... while the last step moved some raw score by more than this
SCALE_COLLAPSE = 1e-6  # huber: a fitted scale below this times the scale at the baseline means interpolation


@dataclasses.dataclass
class LinearFit:
    """What a solver returns."""

    coef: np.ndarray
    intercept: float
    raw: np.ndarray  # fitted raw scores, offset included
    n_iter: int
    objective: float  # F at the solution when it was evaluated, else nan; LP: sum v rho_tau
    grad_norm: float  # max |dF| at the solution (nan for the LP)
    converged: bool
    family: object  # the family used (huber: with its fitted scale)
    nuisance_fitted: bool = True  # huber: False when the scale had no maximum-likelihood value


def weighted_gram(X, hv, buf=None):
    """(X^T diag(hv) X, X^T hv) for a C-contiguous float64 X, in one pass over X.

    For hv >= 0 the rows are scaled by sqrt(hv) block by block; each block is
    added to the Gram matrix with dsyrk (half the flops of a general product,
    no n x p temporary) and to X^T hv as (scaled block)^T sqrt(hv) while it is
    still in cache.  Otherwise plain products are used.
    """
    n, p = X.shape
    if p == 0:
        return np.zeros((0, 0)), np.zeros(0)
    if n and np.min(hv) >= 0:
        sq = np.sqrt(hv)
        m = min(_BLOCK, n)
        if buf is None or buf.shape[0] < m:
            buf = np.empty((m, p))
        c = np.zeros((p, p), order="F")
        xh = np.zeros(p)
        for s in range(0, n, m):
            e = min(n, s + m)
            a = np.multiply(X[s:e], sq[s:e, None], out=buf[: e - s])
            c = dsyrk(1.0, a.T, beta=1.0, c=c, trans=0, lower=0, overwrite_c=1)
            xh += a.T @ sq[s:e]
        return np.triu(c) + np.triu(c, 1).T, xh
    return X.T @ (hv[:, None] * X), X.T @ hv


def _cholesky(H):
    """Cholesky factor of H, or None when H is not numerically positive definite.

    A factorisation whose smallest pivot is below 1e-12 of the largest is
    refused: H is then singular to working precision (e.g. more coefficients
    than informative rows with alpha = 0) and its solve would be noise.
    """
    try:
        fac = linalg.cho_factor(H, check_finite=False)
    except (linalg.LinAlgError, ValueError):
        return None
    piv = np.abs(np.diag(fac[0]))
    if piv.size and not (np.min(piv) ** 2 > 1e-12 * np.max(piv) ** 2):
        return None
    return fac


def _solve_spd(H, rhs):
    """Solve H d = rhs for the Newton step.

    Cholesky when H is numerically positive definite; otherwise the symmetric
    eigendecomposition H = V diag(lam) V^T with d = V diag(1 / |lam|) V^T rhs
    over the eigenvalues with |lam| > 1e-12 max |lam| (a pseudo-inverse step:
    it stays in the span of the data rows, so a rank-deficient problem gets the
    solution in that span; |lam| keeps the step a descent direction when a user
    family's Hessian is indefinite).
    """
    fac = _cholesky(H)
    if fac is not None:
        return linalg.cho_solve(fac, rhs, check_finite=False)
    lam, V = linalg.eigh(H, check_finite=False)
    mag = np.abs(lam)
    keep = mag > 1e-12 * max(float(mag.max(initial=0.0)), 1e-300)
    coef = np.zeros_like(lam)
    coef[keep] = (V[:, keep].T @ rhs) / mag[keep]
    return V @ coef


def _raw(X, coef, intercept, offset):
    raw = X @ coef if X.shape[1] else np.zeros(X.shape[0])
    raw += intercept
    if offset is not None:
        raw += offset
    return raw


def newton(fam, X, y, v, offset, alpha, fit_intercept, max_iter, tol, coef, intercept,
           curvature=None, buf=None, merit="objective") -> LinearFit:
    """Damped Newton iteration for F (see the module docstring).

    ``curvature(fam, y, raw, h)`` may replace the family's Hessian per row
    (used for Huber's generalised Hessian).

    ``merit`` chooses what the backtracking line search must decrease:
    ``"objective"`` -- F itself (Armijo: F(t) <= F(0) + 1e-4 t dF.d), safe for
    any family; ``"gradient"`` -- ||dF||^2 (Armijo with slope -2 ||dF||^2,
    since dF^T d2F d = -||dF||^2 for the Newton direction).  The gradient merit
    needs no nll evaluation (the trial gradient is reused by the next step) and
    is used for the built-in families whose nll is convex in raw, where a
    stationary point is the minimum.  If it cannot make progress, the step
    falls back to the objective merit.
    """
    n, p = X.shape
    coef = np.array(coef, dtype=float)
    intercept = float(intercept)
    if np.any(coef):
        raw = _raw(X, coef, intercept, offset)
    else:
        raw = np.full(n, intercept) if offset is None else offset + intercept
    nfree = p + int(fit_intercept)

    def objective(raw_, coef_):
        with np.errstate(over="ignore", invalid="ignore"):
            per_row = fam._nll(y, raw_)
        val = float(np.dot(v, per_row)) + 0.5 * alpha * float(coef_ @ coef_)
        return val, per_row

    def noise_of(per_row):
        return 16.0 * _EPS * float(np.dot(v, np.abs(per_row, out=per_row)))

    def derivatives(raw_, coef_):
        with np.errstate(over="ignore", invalid="ignore"):
            g, h = fam._grad_hess(y, raw_)
        g *= v
        grad = np.empty(nfree)
        if p:
            grad[:p] = X.T @ g
            grad[:p] += alpha * coef_
        if fit_intercept:
            grad[p] = g.sum()
        return grad, h

    def hessian(Xm, hv):
        H = np.empty((nfree, nfree))
        H[:p, :p], xh = weighted_gram(Xm, hv, buf)
        H[np.arange(p), np.arange(p)] += alpha
        if fit_intercept:
            H[:p, p] = xh
            H[p, :p] = xh
            H[p, p] = hv.sum()
        return H

    # Inexact Newton far from the optimum: while the last step moved some raw
    # score by more than SUBSAMPLE_WHILE_STEP, the Hessian is estimated from every
    # SUBSAMPLE_FRACTION-th row (n >= SUBSAMPLE_MIN_ROWS only; a singular
    # estimate falls back to all rows); near the optimum the full Hessian
    # restores quadratic convergence.  The gradient is always exact, so the
    # solution and the stopping rule are unchanged.
    sub = None
    if merit == "gradient" and n >= SUBSAMPLE_MIN_ROWS and p:
        sub = slice(0, None, SUBSAMPLE_FRACTION)
        Xsub = np.ascontiguousarray(X[sub])
    last_change = np.inf

    grad, h = derivatives(raw, coef)
    F = None
    converged = False
    gnorm = np.inf
    it = 0
    for it in range(max_iter + 1):
        gnorm = float(np.max(np.abs(grad))) if nfree else 0.0
        if not np.isfinite(gnorm):
            raise FloatingPointError("the gradient is not finite: the raw scores overflowed")
        if gnorm <= tol:
            converged = True
            break
        if it == max_iter:
            break
        alt = curvature(fam, y, raw, h) if curvature is not None else None
        d = None
        if sub is not None and alt is None and last_change > SUBSAMPLE_WHILE_STEP:
            # far from the optimum: curvature from a row subsample is as good as the full one
            hv = h[sub] * v[sub]
            hv *= 1.0 / max(float(v[sub].sum()), 1e-300)
            fac = _cholesky(hessian(Xsub, hv))
            if fac is not None:
                d = -linalg.cho_solve(fac, grad, check_finite=False)
        for hh in ([alt, h] if alt is not None else [h]):
            if d is not None:
                break
            H = hessian(X, hh * v)
            if hh is alt:
                # the generalised Hessian may be singular: use it only if it is well conditioned
                fac = _cholesky(H)
                if fac is None:
                    continue
                d = -linalg.cho_solve(fac, grad, check_finite=False)
                break
            d = -_solve_spd(H, grad)
        dc = d[:p]
        db = d[p] if fit_intercept else 0.0
        draw = X @ dc if p else np.zeros(n)
        draw += db
        accepted = False
        if merit == "gradient":
            m0 = float(grad @ grad)
            t = 1.0
            for _ in range(30):
                raw_new = raw + t * draw
                coef_new = coef + t * dc
                grad_new, h_new = derivatives(raw_new, coef_new)
                m1 = float(grad_new @ grad_new)
                if np.isfinite(m1) and m1 <= (1.0 - 2e-4 * t) * m0:
                    accepted = True
                    break
                t *= 0.5
        if not accepted:
            if F is None:
                F, per_row = objective(raw, coef)
                noise = noise_of(per_row)
            slope = float(grad @ d)
            t = 1.0
            for _ in range(60):
                raw_new = raw + t * draw
                coef_new = coef + t * dc
                F_new, per_row = objective(raw_new, coef_new)
                if np.isfinite(F_new) and F_new <= F + 1e-4 * t * slope:
                    accepted = True
                    break
                noise_new = noise_of(per_row)
                if np.isfinite(F_new) and F_new <= F + max(noise, noise_new):
                    accepted = True  # equal to F within rounding: the step cannot be judged by F
                    break
                t *= 0.5
            if not accepted:
                break  # no descent possible: a broken family or a singular problem at rounding level
            F, noise = F_new, noise_of(per_row)
            grad_new, h_new = derivatives(raw_new, coef_new)
        else:
            F = None
        step = t * np.max(np.abs(d)) if nfree else 0.0
        last_change = t * float(np.max(np.abs(draw)))
        coef, intercept, raw, grad, h = coef_new, intercept + t * db, raw_new, grad_new, h_new
        if step <= 4.0 * _EPS * (1.0 + max(np.max(np.abs(coef), initial=0.0), abs(intercept))):
            # the step no longer changes the parameters: nothing more can be gained
            gnorm = float(np.max(np.abs(grad))) if nfree else 0.0
            converged = gnorm <= tol
            it += 1
            break
    if F is None:
        F = np.nan  # not evaluated (the gradient merit needs no nll values)
    return LinearFit(coef, intercept, raw, it, F, gnorm, converged, fam)


def huber_curvature(fam, y, raw, h):
    """Generalised second derivative of the Huber nll: 1/s^2 in the core, 0 outside."""
    u = np.abs(y - raw) / fam.scale
    return np.where(u <= fam.delta, 1.0 / (fam.scale * fam.scale), 0.0)


def huber_joint(fam, X, y, w, v, offset, alpha, fit_intercept, max_iter, tol, coef, intercept,
                buf=None) -> LinearFit:
    """Coefficients and scale of the Huber family by alternating maximisation (module docstring)."""
    raw = _raw(X, coef, intercept, offset)
    scale_fitted = True
    try:
        fam = fam.fit_nuisance(y, raw, w)
    except ValueError:
        scale_fitted = False  # every residual is zero at the start: keep the given scale
    scale0 = fam.scale
    total = 0
    fit = None
    for _ in range(max(1, max_iter)):
        fit = newton(fam, X, y, v, offset, alpha, fit_intercept, max_iter, tol, coef, intercept,
                     curvature=huber_curvature, buf=buf)
        total += max(fit.n_iter, 1)
        coef, intercept = fit.coef, fit.intercept
        try:
            new = fam.fit_nuisance(y, fit.raw, w)
        except ValueError:
            scale_fitted = False  # zero residuals: the scale has no maximum-likelihood value
            break
        if new.scale < SCALE_COLLAPSE * scale0:
            # the residuals vanish as the scale shrinks (the model can interpolate the data): the
            # likelihood grows without bound as s -> 0, so no joint maximum-likelihood scale exists
            scale_fitted = False
            break
        change = abs(np.log(new.scale / fam.scale))
        fam = new
        if change <= 1e-10 and fit.converged:
            break
    fit = newton(fam, X, y, v, offset, alpha, fit_intercept, max_iter, tol, coef, intercept,
                 curvature=huber_curvature, buf=buf)
    fit.n_iter = total + fit.n_iter
    fit.nuisance_fitted = scale_fitted
    return fit


def nuisance_joint(fam, X, y, w, v, offset, alpha, fit_intercept, max_iter, tol, coef, intercept,
                   buf=None) -> LinearFit:
    """Coefficients and nuisance parameters jointly, for families whose location fit depends on them.

    Block coordinate descent on the (penalised) joint nll: Newton's method on the
    coefficients at fixed nuisance parameters (to max |dF| <= tol), then the
    family's maximum-likelihood nuisance fit (``fit_nuisance``) at fixed
    coefficients, repeated until no nuisance parameter changes by more than
    1e-10 relatively.  Neither block step raises the nll, and the fixed point
    satisfies both blocks' optimality conditions: the joint maximum-likelihood
    estimate (negative_binomial's dispersion, beta's precision, student_t's
    scale, and df when it is estimated).  When the nuisance fit has no
    maximum-likelihood value (ValueError) the last parameters are kept and
    ``nuisance_fitted`` is False.
    """
    raw = _raw(X, coef, intercept, offset)
    fitted = True
    try:
        fam = fam.fit_nuisance(y, raw, w)
    except ValueError:
        fitted = False
    total = 0
    for _ in range(max(1, max_iter)):
        fit = newton(fam, X, y, v, offset, alpha, fit_intercept, max_iter, tol, coef, intercept, buf=buf)
        total += max(fit.n_iter, 1)
        coef, intercept = fit.coef, fit.intercept
        if not fitted:
            break
        try:
            new = fam.fit_nuisance(y, fit.raw, w)
        except ValueError:
            fitted = False
            break
        change = max((abs(np.log(new.params[k] / fam.params[k])) for k in fam.params
                      if not isinstance(fam.params[k], bool)), default=0.0)
        fam = new
        if change <= 1e-10 and fit.converged:
            break
    fit = newton(fam, X, y, v, offset, alpha, fit_intercept, max_iter, tol, coef, intercept, buf=buf)
    fit.n_iter = total + fit.n_iter
    fit.nuisance_fitted = fitted
    return fit


def quantile_lp(X, y, v, offset, tau, fit_intercept) -> LinearFit:
    """Exact minimiser of sum v rho_tau(y - raw) by linear programming (HiGHS)."""
    n, p = X.shape
    keep = v > 0
    Xk, vk = X[keep], v[keep]
    target = y[keep] - (offset[keep] if offset is not None else 0.0)
    m = Xk.shape[0]
    blocks = [sparse.csr_matrix(Xk)]
    if fit_intercept:
        blocks.append(sparse.csr_matrix(np.ones((m, 1))))
    eye = sparse.identity(m, format="csr")
    blocks += [eye, -eye]
    A = sparse.hstack(blocks, format="csr")
    nfree = p + int(fit_intercept)
    c = np.concatenate([np.zeros(nfree), tau * vk, (1.0 - tau) * vk])
    bounds = [(None, None)] * nfree + [(0, None)] * (2 * m)
    res = optimize.linprog(c, A_eq=A, b_eq=target, bounds=bounds, method="highs")
    if res.status != 0:
        raise RuntimeError(f"the linear programme for the quantile fit failed: {res.message}")
    coef = np.asarray(res.x[:p], dtype=float)
    intercept = float(res.x[p]) if fit_intercept else 0.0
    raw = _raw(X, coef, intercept, offset)
    r = y - raw
    obj = float(np.dot(v, np.maximum(tau * r, (tau - 1.0) * r)))
    return LinearFit(coef, intercept, raw, int(res.nit), obj, np.nan, True, None)


def separation_margin(X, y01, v, fit_intercept) -> float:
    """Detect (quasi-)complete separation of binary labels by linear programming.

    With s_i = 2 y_i - 1 and z_i = s_i [x_i, 1], the data are separated exactly
    when some direction beta has z_i . beta >= 0 for every row and > 0 for at
    least one.  The linear programme

        maximise sum_i z_i . beta   subject to  z_i . beta >= 0,  -1 <= beta_j <= 1

    has optimum 0 when the logistic maximum-likelihood estimate is finite and a
    positive optimum when it does not exist (a standard detection programme;
    Konis, 2007, Linear programming algorithms for detecting separated data in
    binary logistic regression models, DPhil thesis, Oxford -- recalled from
    memory).  Returns that optimum divided by sum |z_i| (0 means not separated).
    """
    keep = v > 0
    Xk = X[keep]
    s = 2.0 * y01[keep] - 1.0
    Z = Xk * s[:, None]
    if fit_intercept:
        Z = np.hstack([Z, s[:, None]])
    if Z.shape[1] == 0:
        return 0.0
    total = Z.sum(axis=0)
    res = optimize.linprog(-total, A_ub=-Z, b_ub=np.zeros(Z.shape[0]),
                           bounds=[(-1.0, 1.0)] * Z.shape[1], method="highs")
    if res.status != 0:
        return 0.0
    return max(0.0, -float(res.fun)) / max(float(np.abs(Z).sum()), 1e-300)


class _SmoothedPinball:
    """sum-ready pieces of rho_tau with |r| smoothed on |r| <= mu (used only to locate the ridge solution).

    |r|_mu = r^2 / (2 mu) + mu / 2 for |r| <= mu, |r| otherwise, and
    rho_mu(r) = (|r|_mu + (2 tau - 1) r) / 2 with r = y - raw.  Derivatives in raw:
    -(clip(r / mu, -1, 1) + 2 tau - 1) / 2; curvature 1 / (2 max(|r|, mu)) (exact on the
    core, the majorising IRLS curvature outside it).
    """

    def __init__(self, tau, mu):
        self.tau, self.mu, self.name = tau, mu, "smoothed pinball"

    def _nll(self, y, raw):
        r = y - raw
        a = np.abs(r)
        sm = np.where(a <= self.mu, 0.5 * r * r / self.mu + 0.5 * self.mu, a)
        return 0.5 * (sm + (2.0 * self.tau - 1.0) * r)

    def _grad_hess(self, y, raw):
        r = y - raw
        g = -0.5 * (np.clip(r / self.mu, -1.0, 1.0) + 2.0 * self.tau - 1.0)
        h = 0.5 / np.maximum(np.abs(r), self.mu)
        return g, h


def _smoothed_pinball_curvature(fam, y, raw, h):
    """Generalised second derivative of the smoothed pinball loss: 1/(2 mu) on the core, 0 outside."""
    return np.where(np.abs(y - raw) <= fam.mu, 0.5 / fam.mu, 0.0)


def ridge_pinball(X, y, v, offset, tau, weight_factor, alpha, fit_intercept, max_iter=100) -> LinearFit:
    r"""Exact minimiser of sum c_i rho_tau(y_i - raw_i) + alpha/2 ||coef||^2 (alpha > 0), c = weight_factor v.

    The problem is a quadratic programme.  Its optimality (KKT) conditions: with
    residuals r = y - offset - X coef - intercept there are s_i in the
    subdifferential of rho_tau at r_i (tau for r_i > 0, tau - 1 for r_i < 0, any
    value in [tau - 1, tau] for r_i = 0) such that

        alpha coef = sum_i c_i s_i x_i,      sum_i c_i s_i = 0  (with an intercept).

    Once the rows are split into P (r > 0), N (r < 0) and Z (r = 0), these are
    linear: with u = c_Z s_Z, coef = (g + X_Z^T u) / alpha where
    g = tau X_P^T c_P + (tau - 1) X_N^T c_N, and the rows of Z are fitted exactly:

        [X_Z X_Z^T / alpha   1] [u        ]   [y_Z - o_Z - X_Z g / alpha]
        [1^T                 0] [intercept] = [-(tau sum c_P + (tau - 1) sum c_N)]

    (solved in this unscaled block form, which stays well conditioned for small alpha).

    1. The split is located by minimising the problem with |r| smoothed on
       |r| <= mu (semismooth Newton with the generalised Hessian, see ``newton``), for mu falling from the mean absolute
       deviation to 1e-10 of it by factors of 10, each stage warm-started.
    2. The linear system is solved for that split, and the solution is accepted
       only if it certifies itself: every s_Z within [tau - 1, tau] and every
       residual of P (N) non-negative (non-positive), to 1e-9 relative.  Rows
       that violate move between the sets and the system is solved again.
    Being the KKT point of a convex problem, a certified solution is the exact
    minimiser (up to rounding); if none is certified within ``max_iter``
    rounds a RuntimeError is raised rather than an approximate answer returned.
    """
    keep = v > 0
    Xk = np.ascontiguousarray(X[keep])
    t = y[keep] - (offset[keep] if offset is not None else 0.0)
    c = weight_factor * v[keep]
    n, p = Xk.shape
    b = float(np.quantile(t, tau, method="inverted_cdf", weights=c)) if fit_intercept else 0.0
    coef = np.zeros(p)
    mu0 = max(float(np.dot(c, np.abs(t - b)) / c.sum()), 1e-300)
    total = 0
    mu = mu0
    for k in range(11):
        mu = mu0 * 10.0 ** (-k)
        fit = newton(_SmoothedPinball(tau, mu), Xk, t, c, None, alpha, fit_intercept, 100,
                     1e-13 * float(c.sum()), coef, b, curvature=_smoothed_pinball_curvature,
                     merit="objective")
        coef, b = fit.coef, fit.intercept
        total += fit.n_iter
    r = t - Xk @ coef - b
    scale_t = 1.0 + float(np.max(np.abs(t)))
    Z = np.abs(r) <= mu
    P = ~Z & (r > 0)
    N = ~Z & (r < 0)
    tol = 1e-9
    for rounds in range(1, max_iter + 1):
        g = Xk[P].T @ c[P] * tau + Xk[N].T @ c[N] * (tau - 1.0)
        g0 = tau * c[P].sum() + (tau - 1.0) * c[N].sum()
        XZ = Xk[Z]
        m = XZ.shape[0]
        # unknowns (coef, intercept, u): alpha coef - X_Z^T u = g, 1^T u = -g0, X_Z coef + intercept = t_Z
        q = p + 1 + m
        M = np.zeros((q, q))
        M[:p, :p] = alpha * np.eye(p)
        M[:p, p + 1:] = -XZ.T
        M[p + 1:, :p] = XZ
        rhs = np.zeros(q)
        rhs[:p] = g
        rhs[p + 1:] = t[Z]
        if fit_intercept:
            M[p, p + 1:] = 1.0
            M[p + 1:, p] = 1.0
            rhs[p] = -g0
        else:
            M[p, p] = 1.0  # intercept fixed at 0
        sol = np.linalg.lstsq(M, rhs, rcond=None)[0]
        coef, b, u = sol[:p], float(sol[p]), sol[p + 1:]
        s = u / c[Z]
        r = t - Xk @ coef - b
        # violations of the certificate, each on a relative scale
        viol = np.zeros(n)
        viol[Z] = np.maximum(np.maximum(s - tau, (tau - 1.0) - s), np.abs(r[Z]) / scale_t)
        viol[P] = -r[P] / scale_t
        viol[N] = r[N] / scale_t
        worst = int(np.argmax(viol))
        if viol[worst] <= tol:
            raw = _raw(X, coef, b, offset)
            rr = y - raw
            obj = float(np.dot(v, np.maximum(tau * rr, (tau - 1.0) * rr))) * weight_factor \
                + 0.5 * alpha * float(coef @ coef)
            return LinearFit(coef, b, raw, total + rounds, obj, 0.0, True, None)
        # one change per round (an active-set step): the worst row changes set
        if Z[worst]:
            Z[worst] = False
            j = int(np.flatnonzero(np.flatnonzero(Z | (np.arange(n) == worst)) == worst)[0])
            s_w = s[j]
            if abs(r[worst]) / scale_t > tol and not (s_w > tau + tol or s_w < tau - 1.0 - tol):
                (P if r[worst] > 0 else N)[worst] = True  # not fitted exactly: leave Z by its residual
            else:
                (P if s_w > tau else N)[worst] = True
        else:
            P[worst] = N[worst] = False
            Z[worst] = True
    raise RuntimeError(
        "the ridge-penalised pinball problem: no solution passed the optimality certificate "
        f"after {max_iter} rounds of the active-set correction"
    )
