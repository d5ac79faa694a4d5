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

    The Newton direction solves d2F d = -dF by Cholesky (scipy.linalg.cho_factor)
    of the equilibrated matrix D^-1 d2F D^-1, D = sqrt(diag d2F) (symmetric
    Jacobi scaling: by van der Sluis' theorem it is within a factor
    sqrt(p + 1) of the best diagonal scaling, so a design whose columns differ
    in units -- years, money amounts, timestamps -- is factorised as well as
    its standardised twin; the direction is unchanged by it).  Each Newton
    step computes the gradient exactly from the data, so it is also a step of
    iterative refinement: the answer is accurate to the problem's own
    conditioning, not the square of it.
    A backtracking (Armijo) line search on F makes each step a descent step, so
    the iteration converges from any start for a convex nll and quadratically
    near the optimum.  If the Cholesky factorisation fails (a singular design
    with alpha = 0, or a non-convex user family) the matrix is damped by
    lambda I with lambda growing tenfold until it factorises (a
    Levenberg-Marquardt step).  X^T diag(v h) X is accumulated in row blocks
    with one BLAS matrix product a^T a per block of pre-scaled rows
    a_i = sqrt(v h) x_i (sparse X: one sparse product per block of rows, X is
    never densified; the (p + 1) x (p + 1) matrix is dense).  Stops when
    max_j |dF/dcoef_j| / c_j <= tol with c_j = sqrt(sum_i v_i x_ij^2) (c = 1 for
    the intercept and for all-zero columns): the gradient with respect to the
    coefficients of the standardised columns x_j / c_j, so the rule does not
    depend on a column's units (dense X with at least SUBSAMPLE_MIN_ROWS rows:
    c_j estimated on one row in SUBSAMPLE_FRACTION, see ``newton_dense``); or
    when a step no longer changes any raw score beyond rounding (64 eps max |raw|);
    dense X with few columns also when a trusted correction is below tol in the
    same units (``newton_dense``).

    Families whose Hessian is a surrogate (``exact_hessian`` False, e.g. a user
    family) use the same iteration with the surrogate in place of d2F: each
    step is then a majorise-minimise step (linear, not quadratic, convergence).

    Two organisations of this iteration serve the built-in families whose nll
    is convex in raw (gaussian, poisson, gamma, bernoulli), where most time
    goes:
    * dense X with at most CHORD_MIN_COLUMNS coefficients (``newton_dense``):
      one pass over X per trial point, the raw-score update, the gradient and
      the Newton matrix sharing each block of rows while it is in cache; on
      large data a start from the fit of a row subsample, then chord steps
      with its factorisation corrected by secant (BFGS) updates; refinement
      when needed;
    * sparse X with more coefficients (``newton_cg``): truncated Newton, the
      direction from conjugate gradients on Hessian-vector products (the
      matrix is never formed), preconditioned by its diagonal (two-level, with
      a coarse space of the one-hot blocks found in X) and BFGS pairs
      from earlier solves, started from the fit of a row subsample, and
      refined at the end by one accurately solved Newton step.

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
    HiGHS (interior point, then crossover to an optimal vertex) on a sparse
    constraint matrix whose columns are centred and scaled by powers of two;
    the vertex is polished by fitting its interpolated rows exactly.  The scale b does not change the
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

_BLOCK = 8192  # rows per block when accumulating X^T diag(h) X
_SPARSE_BLOCK = 131072  # rows per block for sparse X (bounds the one scaled copy of a block)
_ROUNDING = 64.0 * np.finfo(float).eps  # a raw-score change below this times max |raw| is rounding
_EPS = np.finfo(float).eps
SUBSAMPLE_MIN_ROWS = 100_000  # subsampled Hessians (far from the optimum) only from this many rows
SUBSAMPLE_FRACTION = 8  # ... using one row in this many
SUBSAMPLE_WHILE_STEP = 0.02  # ... while the last step moved some raw score by more than this
CHORD_SHRINK = 0.01  # a chord (or subsampled) step is kept only if it shrinks ||C^-1 dF||^2 by this factor
SUBSAMPLE_SHRINK = 0.25  # ... and subsampled steps must shrink ||C^-1 dF||^2 by this factor (two misses in a row: full Hessians)
CHORD_MIN_COLUMNS = 200  # ... used for sparse X or more coefficients than this
SUBSAMPLE_START_TOL = 1e-4  # large data (fast paths): tolerance of the subsample's fit that gives the start
REFINE_CG_RTOL = 1e-4  # sparse X, many columns: the refinement's conjugate gradients shrink the residual by this factor
CG_MEMORY = 40  # sparse X with more coefficients than CHORD_MIN_COLUMNS: pairs kept by the quasi-Newton preconditioner
COARSE_MIN_COVER = 0.5  # ... a one-hot block enters the coarse space if it has a non-zero on this share of rows
COARSE_MAX_BLOCKS = 64  # ... and at most this many blocks (the coarse matrix is (blocks + 1) x (blocks + 1))
SCALE_COLLAPSE = 1e-6  # huber: a fitted scale below this times the scale at the baseline means interpolation


@dataclasses.dataclass
class LinearFit:
    """What a solver returns."""

    coef: np.ndarray
    intercept: float
    raw: np.ndarray  # fitted raw scores, offset included
    n_iter: int
    objective: float  # F at the solution when it was evaluated, else nan; LP: sum v rho_tau
    grad_norm: float  # max |dF| at the solution (nan for the LP; before a final unchecked correction)
    converged: bool
    family: object  # the family used (huber: with its fitted scale)
    nuisance_fitted: bool = True  # huber: False when the scale had no maximum-likelihood value



def _scaled_gradient(grad, inv_c):
    """The gradient in equilibrated units and its largest entry (the unit-free stopping test);
    0 when there is no free coefficient.  A non-finite gradient means the raw scores overflowed."""
    sgrad = grad * inv_c
    gnorm = float(np.max(np.abs(sgrad))) if sgrad.size else 0.0
    if not np.isfinite(gnorm):
        raise FloatingPointError("the gradient is not finite: the raw scores overflowed")
    return sgrad, gnorm

def weighted_gram(X, hv, buf=None):
    """(X^T diag(hv) X, X^T hv) in one pass over X (dense C-contiguous float64, or scipy.sparse).

    Dense X with hv >= 0: the rows are scaled by sqrt(hv) block by block; each
    scaled block a is added to the Gram matrix as a^T a (no n x p temporary)
    and to X^T hv as a^T sqrt(hv) while it is still in cache.  a^T a is a
    general product (dgemm), whose upper triangle is mirrored at the end: with
    OpenBLAS on one thread it measured 1.1-1.5 times faster than the symmetric
    rank-k update (dsyrk) for 5-400 columns, despite twice the flops.  Sparse
    X: one sparse product per block of rows (the scaled block is the only copy
    made), accumulated in a dense p x p array.  Otherwise plain products are
    used.
    """
    n, p = X.shape
    if p == 0:
        return np.zeros((0, 0)), np.zeros(0)
    if sparse.issparse(X):
        X = X.tocsr() if X.format != "csr" else X
        c = np.zeros((p, p))
        m = max(1, min(n, _SPARSE_BLOCK))
        for s in range(0, n, m):
            e = min(n, s + m)
            blk = X[s:e]
            scaled = sparse.diags(hv[s:e]) @ blk
            c += (blk.T @ scaled).toarray()
        return c, np.asarray(X.T @ hv).ravel()
    if n and np.min(hv) >= 0:
        sq = np.sqrt(hv)
        m = min(_BLOCK, n)
        if buf is None or buf.shape[0] < m:
            buf = np.empty((m, p))
        c = np.zeros((p, p))
        xh = np.zeros(p)
        for s in range(0, n, m):
            e = min(n, s + m)
            a = np.multiply(X[s:e], sq[s:e, None], out=buf[: e - s])
            c += a.T @ a
            xh += a.T @ sq[s:e]
        return np.triu(c) + np.triu(c, 1).T, xh
    return X.T @ (hv[:, None] * X), X.T @ hv


def _csr_row_block(X, s, e):
    """Rows s:e of a CSR matrix as a CSR matrix sharing X's data and index arrays (no copy of them)."""
    a, b = int(X.indptr[s]), int(X.indptr[e])
    return sparse.csr_matrix((X.data[a:b], X.indices[a:b], X.indptr[s:e + 1] - a), shape=(e - s, X.shape[1]),
                             copy=False)


def weighted_column_squares(X, hv, unit=False):
    """sum_i hv_i x_ij^2 for every column j (the diagonal of X^T diag(hv) X).

    Sparse X (CSR): ``unit`` (every stored entry 0 or 1, so x^2 = x) gives it as
    one product X^T hv; otherwise the squares are formed for one block of rows
    at a time (views of X's index arrays, so the only copy is one block's
    values).  Dense X: in blocks of rows.
    """
    n, p = X.shape
    if sparse.issparse(X):
        X = X.tocsr() if X.format != "csr" else X
        if unit:
            return np.asarray(X.T @ hv, dtype=float).ravel()
        ss = np.zeros(p)
        for s in range(0, n, _SPARSE_BLOCK):
            e = min(n, s + _SPARSE_BLOCK)
            blk = _csr_row_block(X, s, e)
            blk = sparse.csr_matrix((blk.data * blk.data, blk.indices, blk.indptr), shape=blk.shape, copy=False)
            ss += blk.T @ hv[s:e]
        return ss
    ss = np.zeros(p)
    for s in range(0, n, _BLOCK):
        blk = X[s:s + _BLOCK]
        ss += hv[s:s + _BLOCK] @ (blk * blk)
    return ss


def column_scales(X, v, unit=False):
    """c_j = sqrt(sum_i v_i x_ij^2) (1 for an all-zero column); ``unit`` as in ``weighted_column_squares``."""
    c = np.sqrt(weighted_column_squares(X, v, unit))
    c[~(c > 0) | ~np.isfinite(c)] = 1.0
    return c


def _equilibrate(H):
    """D = sqrt(diag H) (1 where the diagonal is not positive) and D^-1 H D^-1."""
    d = np.sqrt(np.abs(np.diag(H)))
    d[~(d > 0) | ~np.isfinite(d)] = 1.0
    return d, H / d[:, None] / d[None, :]


def _cholesky(H):
    """Cholesky factor of an equilibrated H, or None when H is not numerically positive definite.

    A factorisation whose smallest pivot is below 1e-12 of the largest is
    refused: H is then singular to working precision (e.g. more coefficients
    than informative rows with alpha = 0) and its solve would be noise.  The
    test is applied after equilibration (unit diagonal), so it measures
    collinearity, not the columns' units.
    """
    try:
        fac = linalg.cho_factor(H, check_finite=False)
    except (linalg.LinAlgError, ValueError):
        return None
    piv = np.abs(np.diag(fac[0]))
    if piv.size and not (np.min(piv) ** 2 > 1e-12 * np.max(piv) ** 2):
        return None
    return fac


def _newton_step(H, rhs, exact=True):
    """Solve H d = rhs through the equilibrated matrix D^-1 H D^-1; return (d, solve).

    Cholesky when it is numerically positive definite; otherwise (``exact``)
    its symmetric eigendecomposition V diag(lam) V^T with the pseudo-inverse
    over |lam| > 1e-12 max |lam| (the step stays in the span of the data rows,
    so a rank-deficient problem gets the solution in that span; |lam| keeps the
    step a descent direction when a user family's Hessian is indefinite).
    ``solve(r)`` applies the same factorisation to another right-hand side.
    Returns (None, None) when ``exact`` is False and the Cholesky factorisation fails.
    """
    dg, Hs = _equilibrate(H)
    fac = _cholesky(Hs)
    if fac is not None:
        def solve(r):
            return linalg.cho_solve(fac, r / dg, check_finite=False) / dg
        return solve(rhs), solve
    if not exact:
        return None, None
    lam, V = linalg.eigh(Hs, check_finite=False)
    mag = np.abs(lam)
    keep = mag > 1e-12 * max(float(mag.max(initial=0.0)), 1e-300)
    Vk, mk = V[:, keep], mag[keep]

    def solve(r):
        return (Vk @ ((Vk.T @ (r / dg)) / mk)) / dg
    return solve(rhs), solve


def _raw(X, coef, intercept, offset):
    raw = np.asarray(X @ coef, dtype=float).ravel() if X.shape[1] else np.zeros(X.shape[0])
    raw += intercept
    if offset is not None:
        raw += offset
    return raw


def newton(fam, X, y, v, offset, alpha, fit_intercept, max_iter, tol, coef, intercept,
           curvature=None, buf=None, merit="objective", cscale=None, fused=True) -> LinearFit:
    """Damped Newton iteration for F (see the module docstring).

    With merit "gradient" and no ``curvature``, sparse X with more than
    CHORD_MIN_COLUMNS coefficients goes to ``newton_cg`` and dense X with at
    most that many (and ``fused``) to ``newton_dense``; the rest is below.

    ``curvature(fam, y, raw, h)`` may replace the family's Hessian per row
    (used for Huber's generalised Hessian).  ``cscale``: the column scales c_j
    of the stopping rule (computed from X and v when None).

    ``merit`` chooses what the backtracking line search must decrease:
    ``"objective"`` -- F itself (Armijo: F(t) <= F(0) + 1e-4 t dF.d), safe for
    any family; ``"gradient"`` -- ||C^-1 dF||^2 with C = diag(c) (Armijo with
    slope -2 ||C^-1 dF||^2, since dF^T C^-2 d2F d = -||C^-1 dF||^2 for the
    Newton direction).  The gradient merit needs no nll evaluation (the trial
    gradient is reused by the next step) and is used for the built-in families
    whose nll is convex in raw, where a stationary point is the minimum.  If it
    cannot make progress, the step falls back to the objective merit.
    """
    n, p = X.shape
    if (sparse.issparse(X) and merit == "gradient" and curvature is None
            and p + int(fit_intercept) > CHORD_MIN_COLUMNS):
        return newton_cg(fam, X, y, v, offset, alpha, fit_intercept, max_iter, tol, coef, intercept, cscale)
    if (fused and not sparse.issparse(X) and merit == "gradient" and curvature is None and p
            and p + int(fit_intercept) <= CHORD_MIN_COLUMNS):
        return newton_dense(fam, X, y, v, offset, alpha, fit_intercept, max_iter, tol, coef, intercept,
                            cscale, buf)
    coef = np.array(coef, dtype=float)
    intercept = float(intercept)
    if np.any(coef):
        raw = _raw(X, coef, intercept, offset)
    else:
        raw = np.full(n, intercept) if offset is None else offset + intercept
    nfree = p + int(fit_intercept)
    if cscale is None:
        cscale = column_scales(X, v) if p else np.zeros(0)
    inv_c = np.ones(nfree)
    inv_c[:p] = 1.0 / cscale

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
        Xsub = X[sub] if sparse.issparse(X) else np.ascontiguousarray(X[sub])
    last_change = np.inf

    # chord steps pay where forming and factorising the Hessian costs many passes over X:
    # sparse X (a sparse product per block) or many columns (O(p^3) factorisation)
    chord = sparse.issparse(X) or nfree > CHORD_MIN_COLUMNS
    grad, h = derivatives(raw, coef)
    F = None
    solve = reuse = None
    poor_sub = 0
    converged = False
    gnorm = np.inf
    it = 0
    for it in range(max_iter + 1):
        sgrad, gnorm = _scaled_gradient(grad, inv_c)
        if gnorm <= tol:
            converged = True
            if solve is not None:
                coef, intercept, raw, grad, h, gnorm = _refine(
                    solve, X, coef, intercept, raw, grad, h, inv_c, derivatives, fit_intercept)
            break
        if it == max_iter:
            break
        alt = curvature(fam, y, raw, h) if curvature is not None else None
        d = None
        accepted = False
        m0 = float(sgrad @ sgrad)
        if reuse is not None and alt is None:
            # chord step: the last full factorisation, kept while it shrinks the gradient fast
            d = -reuse(grad)
            draw = _raw(X, d[:p], d[p] if fit_intercept else 0.0, None) if p else np.full(n, d[p])
            t = 1.0
            raw_new, coef_new = raw + draw, coef + d[:p]
            grad_new, h_new = derivatives(raw_new, coef_new)
            sg = grad_new * inv_c
            m1 = float(sg @ sg)
            accepted = bool(np.isfinite(m1) and m1 <= CHORD_SHRINK * m0)
            if not accepted:
                reuse, d = None, None
        from_sub = False
        if d is None and sub is not None and alt is None and last_change > SUBSAMPLE_WHILE_STEP:
            # far from the optimum: curvature from a row subsample is as good as the full one
            hv = h[sub] * v[sub]
            hv *= 1.0 / max(float(v[sub].sum()), 1e-300)
            d, _ = _newton_step(hessian(Xsub, hv), grad, exact=False)
            if d is not None:
                d = -d
                from_sub = True
        for hh in ([alt, h] if alt is not None else [h]):
            if d is not None:
                break
            H = hessian(X, hh * v)
            if hh is alt:
                # the generalised Hessian may be singular: use it only if it is well conditioned
                d, solve = _newton_step(H, grad, exact=False)
                if d is None:
                    continue
                d = -d
                break
            d, solve = _newton_step(H, grad)
            d = -d
            reuse = solve if merit == "gradient" and chord else None
        dc = d[:p]
        db = d[p] if fit_intercept else 0.0
        if not accepted:
            draw = _raw(X, dc, db, None) if p else np.full(n, db)
        if merit == "gradient" and not accepted:
            t = 1.0
            for _ in range(30):
                raw_new = raw + t * draw
                coef_new = coef + t * dc
                grad_new, h_new = derivatives(raw_new, coef_new)
                sg = grad_new * inv_c
                m1 = float(sg @ sg)
                if np.isfinite(m1) and m1 <= (1.0 - 2e-4 * t) * m0:
                    accepted = True
                    break
                t *= 0.5
            if from_sub:
                poor_sub = poor_sub + 1 if not (accepted and m1 <= SUBSAMPLE_SHRINK * m0) else 0
                if poor_sub >= 2:
                    sub = None  # the subsample's curvature is too rough for this design: full Hessians from now on
            if not (accepted and t == 1.0):
                reuse = None
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
                # no descent possible: at the optimum to rounding when the full step is itself
                # below the rounding of the raw scores, else a broken family or a singular problem
                converged = float(np.max(np.abs(draw), initial=0.0)) <= _ROUNDING * float(
                    np.max(np.abs(raw), initial=0.0))
                break
            F, noise = F_new, noise_of(per_row)
            grad_new, h_new = derivatives(raw_new, coef_new)
        else:
            F = None
        last_change = t * float(np.max(np.abs(draw), initial=0.0))
        coef, intercept, raw, grad, h = coef_new, intercept + t * db, raw_new, grad_new, h_new
        if last_change <= _ROUNDING * float(np.max(np.abs(raw), initial=0.0)) and t == 1.0:
            # a full Newton step no longer changes any raw score beyond rounding: the optimum
            # is reached to working precision (the gradient is then at its rounding level)
            gnorm = float(np.max(np.abs(grad * inv_c))) if nfree else 0.0
            converged = True
            it += 1
            break
    if F is None:
        F = np.nan  # not evaluated (the gradient merit needs no nll values)
    return LinearFit(coef, intercept, raw, it, F, gnorm, converged, fam)


def _is_unit(X):
    """Every stored entry of the sparse matrix X is 0 or 1 (one-hot and indicator designs): x^2 = x."""
    d = X.data
    ones = d == 1.0
    return bool(ones.all() or np.all(ones | (d == 0.0)))


def _secant_solve(solve, pairs):
    """r -> an approximation of d2F^-1 r: ``solve`` corrected by BFGS updates from the pairs (s, y) of past steps.

    The two-loop recursion of limited-memory BFGS (Nocedal & Wright, Numerical
    Optimization, 2nd ed., 2006, Algorithm 7.4 -- recalled from memory) with ``solve`` (a factorised
    Newton matrix) as the initial inverse: each pair s (a step) and y (the
    change of the exact gradient along it) makes the approximation exact along
    y, so the chord steps, which converge linearly at the rate of the
    factorisation's error, gain the error's directions as they go.  Pairs with
    s.y <= 0 are skipped (they carry no positive curvature).
    """
    usable = [(s, y, 1.0 / float(s @ y)) for s, y in pairs if float(s @ y) > 0]
    if not usable:
        return solve

    def apply(r):
        q = np.array(r, dtype=float)
        coefs = []
        for s, y, rho in reversed(usable):
            a = rho * float(s @ q)
            q -= a * y
            coefs.append(a)
        z = solve(q)
        for (s, y, rho), a in zip(usable, reversed(coefs)):
            z += s * (a - rho * float(y @ z))
        return z
    return apply


def dense_sweep(fam, X, y, v, raw_base, t, dc, db, draw, new_draw, hessian, fit_intercept, buf, squares=None,
                vconst=None):
    """One pass over the rows of dense X in blocks: the raw scores, gradient and Newton matrix at a trial point.

    Returns (raw, grad, H) with raw = raw_base + t draw, where ``draw`` holds
    X dc + db (recomputed into it, block by block, when ``new_draw``); grad the
    unpenalised gradient of sum v nll at raw; H (``hessian`` "full": all rows;
    "sub": one row in SUBSAMPLE_FRACTION, reweighted to the total weight;
    None: not formed) the unpenalised [X 1]^T diag(v h) [X 1].  The subsample
    is the first 1/SUBSAMPLE_FRACTION of every block of rows (a systematic sample
    spread over the data in runs of _BLOCK / SUBSAMPLE_FRACTION rows).  Each block is
    used by all three while it is in cache; H is accumulated with one product
    a^T a per block of rows scaled by sqrt(v h) (``weighted_gram``).  ``squares``
    (length p), when given, has sum_i v_i x_ij^2 added to it in the same pass.
    Column-major X: X d and X^T (v g) are whole-array products (a block of
    rows of such an X is p strided pieces); only H is formed in blocks.
    ``vconst``: the value of every v_i when the weights are all equal (no
    sample weights); the sums are then formed unweighted and scaled once.
    """
    n, p = X.shape
    nfree = p + int(fit_intercept)
    m = buf.shape[0]
    raw_new = np.empty(n)
    grad = np.zeros(nfree)
    H = np.zeros((p, p)) if hessian else None
    xh = np.zeros(p)
    hsum = vsum = 0.0
    general = False
    step = SUBSAMPLE_FRACTION if hessian == "sub" else 1
    # column-major X (e.g. from a DataFrame): a block of its rows is 'p' strided pieces, so X d and
    # X^T (v g) are whole-array products (each column read once, at full speed) and the blocks
    # below only form H
    by_columns = X.flags.f_contiguous and not X.flags.c_contiguous
    with np.errstate(over="ignore", invalid="ignore"):
        if by_columns:
            if new_draw:
                np.dot(X, dc, out=draw)
                draw += db
            if t == 1.0:
                np.add(raw_base, draw, out=raw_new)
            else:
                np.multiply(draw, t, out=raw_new)
                raw_new += raw_base
            g_all, h_all = fam._grad_hess(y, raw_new)
            if vconst is None:
                g_all *= v
            grad[:p] = X.T @ g_all
            if fit_intercept:
                grad[p] = g_all.sum()
            if squares is not None:
                squares += weighted_column_squares(X, v)
        for s in range(0, n if (hessian or not by_columns) else 0, m):
            e = min(n, s + m)
            Xb = X[s:e]
            vb = v[s:e]
            if by_columns:
                h = h_all[s:e]
            else:
                rb = raw_new[s:e]
                if new_draw:
                    np.dot(Xb, dc, out=draw[s:e])
                    draw[s:e] += db
                if t == 1.0:
                    np.add(raw_base[s:e], draw[s:e], out=rb)
                else:
                    np.multiply(draw[s:e], t, out=rb)
                    rb += raw_base[s:e]
                g, h = fam._grad_hess(y[s:e], rb)
                if squares is not None:
                    sq = np.multiply(Xb, Xb, out=buf[: e - s])
                    squares += vb @ sq
                if vconst is None:
                    g *= vb
                grad[:p] += g @ Xb
                if fit_intercept:
                    grad[p] += g.sum()
            if not hessian:
                continue
            if step > 1:
                k = -(-(e - s) // step)  # the first 1/step of the block: contiguous, so cheap to scale and multiply
                Xb, h, vb = Xb[:k], h[:k], vb[:k]
                vsum += float(vb.sum()) if vconst is None else vconst * k
            if vconst is None:
                h *= vb
            hsum += float(h.sum())
            if general or np.min(h) < 0:
                if not general:  # a negative curvature: no square roots, plain products from here on
                    H = np.triu(H) + np.triu(H, 1).T
                    general = True
                H += Xb.T @ (h[:, None] * Xb)
                xh += h @ Xb
                continue
            np.sqrt(h, out=h)
            a = np.multiply(Xb, h[:, None], out=buf[: Xb.shape[0]])
            H += a.T @ a
            xh += h @ a
    if vconst is not None:
        grad *= vconst
    if not hessian:
        return raw_new, grad, None
    full = np.empty((nfree, nfree))
    full[:p, :p] = H if general else np.triu(H) + np.triu(H, 1).T
    if fit_intercept:
        full[:p, p] = xh
        full[p, :p] = xh
        full[p, p] = hsum
    if vconst is not None:
        full *= vconst
    if step > 1:
        full *= 1.0 / max(vsum, 1e-300)
    return raw_new, grad, full


def newton_dense(fam, X, y, v, offset, alpha, fit_intercept, max_iter, tol, coef, intercept,
                 cscale=None, buf=None, warm=True, state=None, nested=False) -> LinearFit:
    r"""Damped Newton iteration for F with dense X and few columns, one pass over X per step.

    The iteration of ``newton`` with the gradient-norm line search (the
    built-in families whose nll is convex in raw), organised so that each
    trial point costs one pass over X (``dense_sweep``): the raw-score
    update X d, the gradient and, when wanted, the Newton matrix at the trial
    point (used if the step is accepted) share one read of each block of rows.
    Forming the Newton matrix is the costly part of a pass (a product with
    n p^2 multiply-adds against 2 n p for the two matrix-vector
    products), so on large data (n >= SUBSAMPLE_MIN_ROWS) it is avoided on
    all rows:

    * start: the same iteration on one row in SUBSAMPLE_FRACTION (weights
      rescaled to the same total), to SUBSAMPLE_START_TOL; its solution is
      the starting point and its last factorisation (with its secant pairs)
      the matrix of the first steps on all rows; the column scales c_j of the
      stopping rule are estimated on its rows too (``_scales_from_subsample``:
      exact for a column that is zero there), which spares the first pass over
      all rows the squares of X.  That subsample fit
      (``nested``) starts in turn from one of its own rows in
      SUBSAMPLE_FRACTION when it has at least SUBSAMPLE_MIN_ROWS /
      SUBSAMPLE_FRACTION rows: it forms its Newton matrix once, at that
      start, and continues with chord steps, so the costly Newton steps far
      from the optimum are taken on 1/SUBSAMPLE_FRACTION^2 of the rows;
    * chord steps with that factorisation, corrected by BFGS updates from
      the secant pairs (step, change of the exact gradient) of the steps on
      all rows (``_secant_solve``), while each shrinks ||C^-1 dF||^2 by
      CHORD_SHRINK; a step that does not gets the matrix from all rows at
      its end point.  (Without the start -- it failed, or a starting point
      was given -- the matrices come from the first 1/SUBSAMPLE_FRACTION of
      each block of rows while steps move some raw score by more than
      SUBSAMPLE_WHILE_STEP.)

    The gradient is exact at every step, so the solution and the stopping
    rule are those of ``newton``, with one more way to stop: when the next
    correction d is below tol in standardised units (max_j c_j |d_j|, and
    |d| of the intercept) and its matrix is trusted -- the exact Newton
    matrix at this point, or one whose last step shrank ||C^-1 dF||^2 by
    CHORD_SHRINK -- d is applied without a further pass over X (its error is
    then about the last contraction factor times tol; the gradient reported
    is the one before it).  On smaller data every step is a Newton
    step with the matrix from all rows.  At the gradient test the last
    factorisation refines the solution (``_refine_dense``).  If the gradient
    norm cannot be decreased the general iteration (``newton``, with its
    fall-back to F itself) takes over.
    """
    n, p = X.shape
    coef = np.array(coef, dtype=float)
    intercept = float(intercept)
    nfree = p + int(fit_intercept)
    large = n >= SUBSAMPLE_MIN_ROWS
    start_solve, start_iter = None, 0
    min_rows = SUBSAMPLE_MIN_ROWS // SUBSAMPLE_FRACTION if nested else SUBSAMPLE_MIN_ROWS
    if warm and n >= min_rows and not np.any(coef):
        # a starting point from one row in SUBSAMPLE_FRACTION (Newton's method on those rows, to
        # SUBSAMPLE_START_TOL); its last factorisation serves the first chord steps on all rows
        rows = slice(0, None, SUBSAMPLE_FRACTION)
        total = float(v[rows].sum())
        if total > 0:
            got = {}
            try:
                start = newton_dense(fam, np.ascontiguousarray(X[rows]), y[rows], v[rows] / total,
                                     None if offset is None else offset[rows], alpha, fit_intercept, max_iter,
                                     max(tol, SUBSAMPLE_START_TOL), coef, intercept, warm=large, state=got,
                                     nested=True)
            except (FloatingPointError, ValueError, np.linalg.LinAlgError):
                start = None
            if (start is not None and start.converged and got.get("solve") is not None
                    and np.all(np.isfinite(start.coef)) and np.isfinite(start.intercept)):
                coef, intercept = start.coef, float(start.intercept)
                start_solve, start_iter = got["solve"], start.n_iter
                if cscale is None and not nested and got.get("squares") is not None:
                    cscale = _scales_from_subsample(X, v, got["squares"])
    raw = np.full(n, intercept) if offset is None else offset + intercept
    m = max(SUBSAMPLE_FRACTION, min(_BLOCK, n))
    if buf is None or buf.shape[0] < m or buf.shape[1] != p:
        buf = np.empty((m, p))
    else:
        buf = buf[:m]
    draw = np.zeros(n)
    # equal weights (no sample weights): the sweeps form their sums unweighted and scale them once
    vconst = float(v[0]) if n and v[0] > 0 and not np.any(v != v[0]) else None

    def sweep(raw_base, t, dc, db, new_draw, hessian, coef_, squares=None):
        raw_new, grad, H = dense_sweep(fam, X, y, v, raw_base, t, dc, db, draw, new_draw, hessian,
                                       fit_intercept, buf, squares, vconst)
        if alpha:
            grad[:p] += alpha * coef_
            if H is not None:
                H[np.arange(p), np.arange(p)] += alpha
        return raw_new, grad, H

    use_sub = large and start_solve is None
    # chord steps (a matrix from all rows only when they stall) on large data and after a start;
    # Newton steps otherwise.  A nested fit forms its matrix at its start: its subsample's is rougher
    chord = large or start_solve is not None
    squares = np.zeros(p) if cscale is None else None  # the column scales, from the same pass
    # the first pass: raw = X coef + intercept (+ offset), the gradient, the column scales, and the
    # Newton matrix unless the subsample's factorisation serves the large data's first steps
    first = None if (large and start_solve is not None) else ("sub" if use_sub else "full")
    raw, grad, H = sweep(raw, 1.0, coef, 0.0, True, first, coef, squares)
    if cscale is None:
        if state is not None:
            state["squares"] = squares.copy()
        cscale = np.sqrt(squares)
        cscale[~(cscale > 0) | ~np.isfinite(cscale)] = 1.0
    inv_c = np.ones(nfree)
    inv_c[:p] = 1.0 / cscale
    H_kind = first
    solve = start_solve
    poor_sub = 0
    pairs = []  # (step, gradient change) since the last factorisation
    converged = corrected = proven = False
    gnorm = np.inf
    it = 0
    for it in range(max_iter + 1):
        sgrad, gnorm = _scaled_gradient(grad, inv_c)
        if gnorm <= tol:
            converged = True
            break
        if it == max_iter:
            break
        used = "chord"
        if H is not None:
            d, new_solve = _newton_step(H, grad, exact=H_kind == "full")
            if d is None:  # the subsample's matrix is singular: all rows from here on
                use_sub = False
                _, _, H = sweep(raw, 0.0, None, 0.0, False, "full", coef)
                H_kind = "full"
                d, new_solve = _newton_step(H, grad)
            d, solve, used = -d, new_solve, H_kind
            pairs = []
        else:
            d = -_secant_solve(solve, pairs)(grad)
        dc = d[:p]
        db = d[p] if fit_intercept else 0.0
        if (used == "full" or proven) and not float(np.max(np.abs(d) / inv_c)) > tol:
            # the correction is below tol in standardised units and comes from the exact Newton
            # matrix at this point, or from one whose last step shrank ||C^-1 dF||^2 CHORD_SHRINK-
            # fold: applied without checking it (the refinement's rule, one pass earlier)
            coef, intercept = coef + dc, intercept + db
            raw = raw + _raw(X, dc, db, None)
            converged = corrected = True
            break
        m0 = float(sgrad @ sgrad)
        # the matrix formed at the trial point: the subsample's far from the optimum; on small
        # data all rows at every step (Newton's method); on large data near the optimum none
        # (chord steps with the last factorisation; a full matrix only when they stall)
        want = "sub" if use_sub else (None if chord else "full")
        accepted = False
        t = 1.0
        for k in range(30):
            raw_new, grad_new, H_new = sweep(raw, t, dc, db, k == 0, want, coef + t * dc)
            sg = grad_new * inv_c
            m1 = float(sg @ sg)
            if np.isfinite(m1) and m1 <= (1.0 - 2e-4 * t) * m0:
                accepted = True
                break
            t *= 0.5
        if not accepted:
            # no progress on the gradient norm (rounding near the optimum, or a singular problem):
            # the general iteration takes over from here, with its fall-back to F itself
            fit = newton(fam, X, y, v, offset, alpha, fit_intercept, max_iter - it, tol, coef, intercept,
                         buf=buf, merit="gradient", cscale=cscale, fused=False)
            fit.n_iter += it + start_iter
            return fit
        change = t * float(np.max(np.abs(draw)))
        shrink = m1 / m0 if m0 > 0 else 0.0
        proven = t == 1.0 and shrink <= CHORD_SHRINK
        pairs.append((t * d, grad_new - grad))
        coef, intercept, raw, grad = coef + t * dc, intercept + t * db, raw_new, grad_new
        if used == "sub":
            poor_sub = poor_sub + 1 if not (t == 1.0 and shrink <= SUBSAMPLE_SHRINK) else 0
        if use_sub and (poor_sub >= 2 or change <= SUBSAMPLE_WHILE_STEP):
            use_sub = False
        H, H_kind = H_new, want
        if chord and not use_sub and not (t == 1.0 and shrink <= CHORD_SHRINK):
            # the last step stalled (a chord step, the subsample's matrix, or far from the optimum):
            # the matrix from all rows at this point
            _, _, H = sweep(raw, 0.0, None, 0.0, False, "full", coef)
            H_kind = "full"
        if change <= _ROUNDING * float(np.max(np.abs(raw))) and t == 1.0:
            gnorm = float(np.max(np.abs(grad * inv_c)))
            converged = True
            it += 1
            break
    if converged and H is not None and H_kind == "full":
        # the matrix formed at the last point: its factorisation refines the solution and is handed on
        _, last = _newton_step(H, grad, exact=False)
        if last is not None:
            solve, pairs = last, []
    if state is not None:
        state["solve"] = _secant_solve(solve, pairs) if solve is not None else None
    if converged and solve is not None and not nested and not corrected:  # a start needs no refinement
        coef, intercept, raw, grad, gnorm = _refine_dense(
            solve, pairs, sweep, X, coef, intercept, raw, grad, inv_c, fit_intercept, draw, tol)
    return LinearFit(coef, intercept, raw, it + start_iter, np.nan, gnorm, converged, fam)


def _scales_from_subsample(X, v, squares):
    """Column scales c_j for the stopping rule from sum_i v_i x_ij^2 over the start's row subsample.

    The subsample (one row in SUBSAMPLE_FRACTION, weights rescaled to the same
    total) estimates sum_i v_i x_ij^2 over all rows; scaling a column scales its
    estimate exactly as it scales the exact value, so the stopping rule stays
    free of the columns' units.  A column that is zero (or not finite) on the
    subsample gets its exact value from all rows (one read of those columns).
    """
    sq = np.array(squares, dtype=float)
    bad = ~(sq > 0) | ~np.isfinite(sq)
    if np.any(bad):
        sq[bad] = weighted_column_squares(np.ascontiguousarray(X[:, bad]), v)
    c = np.sqrt(sq)
    c[~(c > 0) | ~np.isfinite(c)] = 1.0
    return c


def _refine_dense(solve, pairs, sweep, X, coef, intercept, raw, grad, inv_c, fit_intercept, draw, tol, rounds=3):
    """``_refine`` for ``newton_dense``: each round is one pass (X d and the gradient together).

    The last factorisation is corrected by the secant pairs of the steps since
    it was made (``_secant_solve``); each round adds its own pair.  Checked
    rounds (a pass for X d and the gradient, kept only if the gradient
    shrinks) are made only when needed: when the first correction d, in
    standardised units (max_j c_j |d_j|, and |d_0| for the intercept; it
    estimates the error of the coefficients that the gradient test left),
    exceeds ``tol`` -- the problem's conditioning has amplified the gradient's
    tolerance.  Otherwise d is below tol and the iteration that produced it was
    contracting (the gradient test was reached by it), so d is applied without
    a check: one matrix-vector product X d for the raw scores, no gradient.
    """
    p = coef.shape[0]
    sg = grad * inv_c
    m0 = float(sg @ sg)
    scale = 1e-11 * float(np.max(np.abs(raw), initial=0.0))
    for k in range(rounds):
        d = -_secant_solve(solve, pairs)(grad)
        dc = d[:p]
        db = d[p] if fit_intercept else 0.0
        if not float(np.sum(np.abs(dc) / inv_c[:p])) + abs(db) > scale:
            break
        if k == 0 and not float(np.max(np.abs(d) / inv_c)) > tol:
            raw = raw + _raw(X, dc, db, None)
            return coef + dc, intercept + db, raw, grad, float(np.max(np.abs(sg)))  # gradient before the step
        raw_new, grad_new, _ = sweep(raw, 1.0, dc, db, True, None, coef + dc)
        pairs.append((d, grad_new - grad))
        if float(np.max(np.abs(draw), initial=0.0)) <= _ROUNDING * float(np.max(np.abs(raw), initial=0.0)):
            break
        sg = grad_new * inv_c
        m1 = float(sg @ sg)
        if not (m1 < m0):
            break
        coef, intercept, raw, grad, m_prev, m0 = coef + dc, intercept + db, raw_new, grad_new, m0, m1
        if m1 > CHORD_SHRINK * m_prev:
            break
    return coef, intercept, raw, grad, float(np.sqrt(np.max(grad * grad * inv_c * inv_c, initial=0.0)))



def _positions(ind, table, test, step=1 << 20):
    """Positions k of ``ind`` with test(table[ind[k]], table[ind[k + 1]]), in chunks (bounded temporaries)."""
    out = []
    for a in range(0, max(ind.size - 1, 0), step):
        t = table[ind[a:min(ind.size, a + step + 1)]]
        out.append(np.flatnonzero(test(t[:-1], t[1:])) + a)
    return np.concatenate(out) if out else np.zeros(0, dtype=np.intp)


def _in_row(X, pos):
    """For positions ``pos`` of X's stored entries: the entry at pos + 1 is in the same row (CSR X)."""
    nxt = np.searchsorted(X.indptr, pos + 1, side="right") - 1  # the row of entry pos + 1
    return nxt == np.searchsorted(X.indptr, pos, side="right") - 1


def _blocks_from_cuts(lim, unit):
    """Fewest runs of unit columns [s, e) with lim[j] >= e for every j in the run: greedy interval stabbing.

    Every unit column j needs a block boundary in (j, lim[j]]; the sweep cuts at the smallest
    right end among the open intervals (the optimal rule for stabbing intervals with points,
    recalled from memory as textbook greedy-algorithm material).  Columns that are not unit
    are boundaries themselves.  Returns block_of (-1 outside blocks of >= 2 columns).
    """
    p = lim.size
    block_of = np.full(p, -1, dtype=np.int32)
    f, s, bound = 0, 0, p
    for c in range(p + 1):
        if c == p or c == bound or not unit[c]:
            if c - s >= 2:
                block_of[s:c] = f
                f += 1
            if c == p:
                break
            s, bound = (c, int(lim[c])) if unit[c] else (c + 1, p)
        else:
            bound = min(bound, int(lim[c]))
    return block_of


def onehot_blocks(X):
    """Runs of adjacent 0/1 columns of CSR X that never share a row (one-hot encoded factors).

    Returns block_of (length p: the block of each column, -1 for none) and the number of blocks.
    Only columns whose every stored entry is 1 take part, and blocks have >= 2 columns and
    non-zeros on >= COARSE_MIN_COVER of the rows (at most COARSE_MAX_BLOCKS, the most covering,
    and at most n / (p + 1) - 1).
    Two columns j1 < j2 that are consecutive non-zeros of some row cannot share a block: a block
    boundary must lie in (j1, j2].  Found in rounds, each O(nnz): first the boundaries between
    adjacent columns that share a row, then the candidate blocks are checked on every row and
    the pairs that break one add their boundaries (``_blocks_from_cuts``), at most 4 rounds;
    a block still broken after them is dropped.  Needs sorted indices (canonical CSR), else no
    block is returned.
    """
    n, p = X.shape
    none = (np.full(p, -1, dtype=np.int32), 0)
    # at most COARSE_MAX_BLOCKS, and (blocks + 1) (p + 1) <= n: the coarse space's dense p x blocks
    # products stay within the size of one length-n vector
    most = min(COARSE_MAX_BLOCKS, n // (p + 1) - 1)
    if most < 1 or p < 2 or not X.has_sorted_indices:
        return none
    counts = np.bincount(X.indices, minlength=p)
    unit = np.bincount(X.indices[X.data != 1.0], minlength=p) == 0
    ind = X.indices
    lim = np.full(p, p, dtype=np.int64)
    pos = _positions(ind, np.arange(p), lambda u, w: w == u + 1)  # adjacent columns stored next to each other ...
    pos = pos[_in_row(X, pos)]  # ... in one row
    lim[ind[pos]] = ind[pos] + 1
    for rnd in range(5):
        block_of = _blocks_from_cuts(lim, unit)
        k = int(block_of.max(initial=-1)) + 1
        if not k:
            return none
        inb = block_of >= 0
        cover = np.bincount(block_of[inb], weights=counts[inb], minlength=k)  # rows covered, if no row is shared
        small = np.flatnonzero(cover < COARSE_MIN_COVER * n)
        if small.size:
            block_of[np.isin(block_of, small)] = -1
        if not np.any(block_of >= 0):
            return none
        pos = _positions(ind, block_of, lambda u, w: (u == w) & (u >= 0))  # two entries of one block in a row
        pos = pos[_in_row(X, pos)]
        if not pos.size:
            break
        if rnd < 4:
            np.minimum.at(lim, ind[pos], ind[pos + 1])
        else:
            block_of[np.isin(block_of, np.unique(block_of[ind[pos]]))] = -1
    keep = np.unique(block_of[block_of >= 0])
    if not keep.size:
        return none
    cover = np.bincount(block_of[block_of >= 0], weights=counts[block_of >= 0], minlength=k)
    keep = keep[np.argsort(-cover[keep], kind="stable")[:most]]
    remap = np.full(k, -1, dtype=np.int32)
    remap[np.sort(keep)] = np.arange(keep.size, dtype=np.int32)
    out = np.where(block_of >= 0, remap[np.maximum(block_of, 0)], -1).astype(np.int32)
    return out, int(keep.size)


class _CoarseSpace:
    """The coarse space of one-hot blocks, Z = [1_f for each block f, e_intercept], and the rows it is built on.

    ``Xc`` (CSR) holds those rows (all of the fit's X, or the rows ``sel`` of it with curvature
    weights multiplied by ``weight``: the row subsample of ``newton_cg``'s start, whose weights
    were rescaled to the same total); ``member`` (rows x k, uint8): row i has a non-zero in
    block f (at most one, by construction), so Xc 1_f = member[:, f].
    """

    def __init__(self, Xc, block_of, k, member, fit_intercept, sel=None, weight=1.0):
        self.Xc, self.block_of, self.k, self.member = Xc, block_of, k, member
        self.fit_intercept, self.sel, self.weight = fit_intercept, sel, weight
        self.frozen = None
        p = block_of.size
        kz = k + int(fit_intercept)
        Z = np.zeros((p + int(fit_intercept), kz))
        cols = np.flatnonzero(block_of >= 0)
        Z[cols, block_of[cols]] = 1.0
        if fit_intercept:
            Z[p, k] = 1.0
        self.Z = Z

    @classmethod
    def of(cls, X, fit_intercept):
        """The coarse space of CSR X's one-hot blocks (``onehot_blocks``), or None without any."""
        block_of, k = onehot_blocks(X)
        if not k:
            return None
        n, p = X.shape
        member = np.zeros((n, k), dtype=np.uint8)
        for s in range(0, n, _SPARSE_BLOCK):
            e = min(n, s + _SPARSE_BLOCK)
            a, b = int(X.indptr[s]), int(X.indptr[e])
            f = block_of[X.indices[a:b]]
            rows = np.repeat(np.arange(s, e), np.diff(X.indptr[s:e + 1]))
            sel = f >= 0
            member[rows[sel], f[sel]] = 1
        return cls(X, block_of, k, member, fit_intercept)

    def lifted(self, sel, weight):
        """The same space serving a fit on X whose rows ``sel`` (weights times ``weight``) are these rows."""
        return _CoarseSpace(self.Xc, self.block_of, self.k, self.member, self.fit_intercept, sel, weight)

    def preconditioner(self, hv, alpha, diag):
        r"""r -> P r, the balancing two-level preconditioner of d2F with the Jacobi diagonal ``diag``.

            P = (I - Q A) D^-1 (I - A Q) + Q,   Q = Z (Z^T A Z)^+ Z^T,   A = d2F

        (symmetric positive definite; P A has the eigenvalue 1 on the coarse space and elsewhere
        the spectrum of the Jacobi-preconditioned matrix with the coarse directions deflated.
        Mandel, Balancing domain decomposition, Comm. Numer. Methods Eng. 9, 1993; Tang, Nabben,
        Vuik & Erlangga, Comparison of two-level preconditioners derived from deflation, domain
        decomposition and multigrid methods, J. Sci. Comput. 39, 2009 -- both recalled from
        memory).  A Z = [X 1]^T (v h * [member 1]) + alpha (Z_coef, 0) takes one sparse product
        with k + 1 columns; Z^T A Z is (k + 1) x (k + 1), inverted by its eigen-decomposition
        (pseudo-inverse: a singular design makes it singular).  Built on a row subsample, A in
        these two places is the subsample's d2F: P stays symmetric positive definite for any
        positive definite matrix there (a preconditioner, not the system; the solves use the exact
        products), and the product costs a fraction of one with all rows.  A space serving a
        larger fit (``lifted``) computes A Z and (Z^T A Z)^+ once, at its first call (the full
        fit's start, where the subsample's fit ended), keeps them for later calls (a fixed A there
        keeps P positive definite; only the diagonal is renewed) and releases the subsample's rows.
        """
        if self.frozen is not None:
            AZ, Einv = self.frozen
            return self._apply(AZ, Einv, diag)
        X = self.Xc
        if self.sel is not None:
            hv = hv[self.sel] * self.weight
        n, p = X.shape
        k, Z = self.k, self.Z
        kz = Z.shape[1]
        AZ = np.zeros((Z.shape[0], kz))
        for s in range(0, n, _SPARSE_BLOCK):
            e = min(n, s + _SPARSE_BLOCK)
            W = np.empty((e - s, kz))
            W[:, :k] = self.member[s:e]
            W[:, :k] *= hv[s:e, None]
            if self.fit_intercept:
                W[:, k] = hv[s:e]
                AZ[p] += W.sum(axis=0)
            AZ[:p] += _csr_row_block(X, s, e).T @ W
        AZ[:p] += alpha * Z[:p]
        E = Z.T @ AZ
        lam, U = np.linalg.eigh(0.5 * (E + E.T))
        good = lam > kz * _EPS * max(float(np.max(np.abs(lam), initial=0.0)), np.finfo(float).tiny)
        Einv = (U[:, good] / lam[good]) @ U[:, good].T
        if self.sel is not None:
            self.frozen = (AZ, Einv)
            self.Xc = self.member = None
        return self._apply(AZ, Einv, diag)

    def _apply(self, AZ, Einv, diag):
        Z = self.Z

        def apply(r):
            c = Einv @ (Z.T @ r)
            y = (r - AZ @ c) / diag
            y -= Z @ (Einv @ (AZ.T @ y))
            y += Z @ c
            return y
        return apply


def _cg_diagonal(X, hv, v, cscale, alpha, fit_intercept, unit):
    """The diagonal of d2F (Jacobi preconditioner): sum_i v_i h_i x_ij^2 + alpha, and sum v h for the intercept.

    One product X^T (v h) when every stored entry of X is 0 or 1 (``unit``); none while h is the
    same on every row (then it is h times the squared column scales).
    """
    p = X.shape[1]
    diag = np.empty(p + int(fit_intercept))
    h0 = hv[0] / v[0] if v[0] > 0 else np.nan
    if np.all(hv == h0 * v):
        diag[:p] = h0 * cscale * cscale + alpha
    else:
        diag[:p] = weighted_column_squares(X, hv, unit) + alpha
    if fit_intercept:
        diag[p] = hv.sum()
    diag[~(diag > 0) | ~np.isfinite(diag)] = 1.0
    return diag


def _preconditioner(hv, alpha, diag, coarse):
    """The base preconditioner of the conjugate gradients: two-level with the one-hot coarse space, else Jacobi."""
    if coarse:
        return coarse.preconditioner(hv, alpha, diag)
    return lambda r: r / diag


def _conjugate_gradients(X, XT, hv, alpha, fit_intercept, rhs, base, mem, inv_c, target, small):
    """Preconditioned conjugate gradients for d2F d = rhs, d2F u = [X 1]^T (hv * ([X 1] u)) + alpha (u_coef, 0).

    Started at d = 0; the preconditioner is ``base`` (r -> an approximation of d2F^-1 r: the
    Jacobi diagonal, or the two-level ``_CoarseSpace.preconditioner``) corrected by the BFGS pairs
    ``mem`` (``_secant_solve``).  Stops when the residual r = rhs - d2F d has
    ||C^-1 r|| <= ``target`` or max |C^-1 r| <= ``small`` (C^-1 = diag(``inv_c``)), or when no
    curvature is left along the search direction.  Returns d and the pairs (step, d2F step) of
    its conjugate steps.
    """
    p = X.shape[1]
    nfree = rhs.size
    d = np.zeros(nfree)
    r = np.array(rhs, dtype=float)
    precond = _secant_solve(base, mem)
    z = precond(r)
    u = z.copy()
    pairs = []
    rz = float(r @ z)
    for _ in range(max(10 * nfree, 50)):
        xd = X @ u[:p]
        if fit_intercept:
            xd += u[p]
        xd *= hv
        hu = np.empty(nfree)
        hu[:p] = XT @ xd
        hu[:p] += alpha * u[:p]
        if fit_intercept:
            hu[p] = xd.sum()
        del xd
        curv = float(u @ hu)
        if not (curv > 0.0 and np.isfinite(curv)):
            break  # no curvature left along u (a singular direction): keep the step so far
        a = rz / curv
        d += a * u
        pairs.append((a * u, a * hu))
        r -= a * hu
        sr = r * inv_c
        if float(np.linalg.norm(sr)) <= target or float(np.max(np.abs(sr))) <= small:
            break
        z = precond(r)
        rz_new = float(r @ z)
        u = z + (rz_new / rz) * u
        rz = rz_new
    return d, pairs


def newton_cg(fam, X, y, v, offset, alpha, fit_intercept, max_iter, tol, coef, intercept,
              cscale=None, mem=None, warm=True, unit=None, refine=True, coarse=None) -> LinearFit:
    r"""Truncated Newton iteration for F with sparse X: Newton directions from preconditioned conjugate gradients.

    Used by ``newton`` for sparse X with many columns, where forming the dense
    Newton matrix X^T diag(v h) X (one sparse product with ~k^2 terms for a row
    of k non-zeros) and factorising it costs far more than the solve needs.
    Each outer iteration solves d2F d = -dF approximately by the conjugate
    gradient method on exact Hessian-vector products

        d2F u = [X 1]^T (v h * ([X 1] u)) + alpha (u_coef, 0)

    (one product with X and one with X^T; the matrix is never formed).

    Preconditioner: its diagonal (Jacobi: sum_i v_i h_i x_ij^2 + alpha, and
    sum v h for the intercept; one product X^T (v h) when every stored entry
    is 0 or 1, none while h is the same on every row), corrected by BFGS
    updates from the last CG_MEMORY conjugate steps s and their products
    d2F s, applied by the two-loop recursion (``_secant_solve``; the
    preconditioner built from earlier conjugate-gradient runs of Morales &
    Nocedal, Automatic preconditioning by limited memory quasi-Newton
    updating, SIAM J. Optim. 10, 2000 -- recalled from memory).  For one-hot
    designs the Jacobi-scaled matrix has about one outlying eigenvalue per
    categorical factor (each factor's columns nearly add up to the intercept)
    around a tight cluster near 1.  Those directions are known: the vectors
    1_f (1 on the columns of factor f) and the intercept.  When X has such
    blocks (``onehot_blocks``: runs of adjacent 0/1 columns that never share
    a row and cover at least COARSE_MIN_COVER of the rows) the Jacobi step
    becomes the balancing two-level preconditioner with the coarse space
    Z = [1_f ..., e_intercept] (``_CoarseSpace.preconditioner``), built on
    the start's row subsample; the full-row solves then take a few products
    instead of ten to twenty.  Without blocks (general sparse data) it is
    Jacobi alone.  Jacobi preconditioning makes the iterates independent of
    the columns' units, as the equilibrated Cholesky solve of the dense path.

    Start: with n >= SUBSAMPLE_MIN_ROWS the same iteration first fits one
    row in SUBSAMPLE_FRACTION (weights rescaled to the same total) to
    SUBSAMPLE_START_TOL; its solution is the starting point and its conjugate
    pairs seed the preconditioner, so the expensive products on all rows are
    spent near the optimum only.

    The inner iteration stops at the truncated-Newton (inexact Newton) rule

        ||C^-1 r|| <= eta_k ||C^-1 dF||,   eta_k = min(1/2, max_j |dF_j| / c_j)

    (r the residual of the linear system, C = diag(c) the column scales of the
    stopping rule), or once max_j |r_j| / c_j <= tol / 10, when the step
    already reaches the outer tolerance.  A forcing term eta_k of the order of
    the gradient keeps Newton's quadratic convergence near the optimum
    (Dembo, Eisenstat & Steihaug, Inexact Newton methods, SIAM J. Numer. Anal.
    19, 1982, Theorem 3.3; Nocedal & Wright, Numerical Optimization, 2nd ed.,
    2006, section 7.1, Theorem 7.2 and Algorithm 7.1 -- both recalled from
    memory).  Conjugate gradients started at 0 return a descent direction, and
    with eta_k <= 1/2 also one for ||C^-1 dF||^2, so the step is accepted by
    the same backtracking line search on the gradient norm as in ``newton``
    (falling back to F itself).  The gradient is exact at every
    outer step, so the solution and the stopping rule are those of the dense
    path; memory above X is a handful of length-n vectors (and the copy of
    the subsample's rows).  At the gradient test one more Newton step,
    solved to a small relative residual, refines the coefficients
    (``_refine_cg``), as the last factorisation does on the dense path.
    """
    n, p = X.shape
    X = X.tocsr() if X.format != "csr" else X
    XT = X.T  # CSC view of X^T, no copy
    if unit is None:
        unit = _is_unit(X)
    coef = np.array(coef, dtype=float)
    intercept = float(intercept)
    nfree = p + int(fit_intercept)
    if mem is None:
        mem = []  # (s, d2F s) of past conjugate steps: the pairs of the quasi-Newton preconditioner
    start_iter = 0
    if warm and n >= SUBSAMPLE_MIN_ROWS and not np.any(coef):
        # a starting point from one row in SUBSAMPLE_FRACTION, solved to SUBSAMPLE_START_TOL; its
        # conjugate pairs (curvature of the subsample, weights rescaled to the same total) seed the
        # preconditioner
        rows = slice(0, None, SUBSAMPLE_FRACTION)
        total = float(v[rows].sum())
        if total > 0:
            Xsub = X[rows]
            if coarse is None:
                # the one-hot coarse space of the subsample's rows serves both fits
                sub = _CoarseSpace.of(Xsub, fit_intercept)
                coarse = sub.lifted(rows, 1.0 / total) if sub else False
            else:
                sub = False
            try:
                start = newton_cg(fam, Xsub, y[rows], v[rows] / total, None if offset is None else offset[rows],
                                  alpha, fit_intercept, max_iter, max(tol, SUBSAMPLE_START_TOL), coef, intercept,
                                  mem=mem, warm=False, unit=unit, refine=False, coarse=sub or False)
            except (FloatingPointError, ValueError, np.linalg.LinAlgError):
                start = None
            del Xsub, sub  # the full fit's coarse space keeps the subsample's rows only while it needs them
            if start is not None and np.all(np.isfinite(start.coef)) and np.isfinite(start.intercept):
                coef, intercept, start_iter = start.coef, float(start.intercept), start.n_iter
            else:
                mem.clear()
    if coarse is None:
        coarse = _CoarseSpace.of(X, fit_intercept) or False  # False: no one-hot blocks (Jacobi alone)
    raw = _raw(X, coef, intercept, offset) if np.any(coef) else (
        np.full(n, intercept) if offset is None else offset + intercept)
    if cscale is None:
        cscale = column_scales(X, v, unit)
    inv_c = np.ones(nfree)
    inv_c[:p] = 1.0 / cscale

    def derivatives(raw_, coef_):
        with np.errstate(over="ignore", invalid="ignore"):
            g, h = fam._grad_hess(y, raw_)
        g *= v
        grad = np.empty(nfree)
        grad[:p] = XT @ g
        grad[:p] += alpha * coef_
        if fit_intercept:
            grad[p] = g.sum()
        del g
        h *= v
        return grad, h

    def objective(raw_, coef_):
        with np.errstate(over="ignore", invalid="ignore"):
            per_row = fam._nll(y, raw_)
        return float(np.dot(v, per_row)) + 0.5 * alpha * float(coef_ @ coef_)

    grad, hv = derivatives(raw, coef)
    converged = False
    gnorm = np.inf
    diag, base, change = None, None, np.inf
    it = 0
    for it in range(max_iter + 1):
        sgrad, gnorm = _scaled_gradient(grad, inv_c)
        if gnorm <= tol:
            converged = True
            break
        if it == max_iter:
            break
        if diag is None or change > SUBSAMPLE_WHILE_STEP:
            # the Jacobi diagonal at this point; kept (it only preconditions) once steps are small
            diag = _cg_diagonal(X, hv, v, cscale, alpha, fit_intercept, unit)
            base = _preconditioner(hv, alpha, diag, coarse)
        eta = min(0.5, gnorm)
        d, newmem = _conjugate_gradients(X, XT, hv, alpha, fit_intercept, -grad, base, mem, inv_c,
                                         eta * float(np.linalg.norm(sgrad)), 0.1 * tol)
        mem[:] = (mem + newmem)[-CG_MEMORY:]
        if not np.any(d):
            d = -grad / diag  # no curvature along the first direction: a scaled gradient step
        dc = d[:p]
        db = d[p] if fit_intercept else 0.0
        draw = _raw(X, dc, db, None)
        m0 = float(sgrad @ sgrad)
        accepted = False
        t = 1.0
        for _ in range(30):
            raw_new = raw + t * draw
            coef_new = coef + t * dc
            grad_new, hv_new = derivatives(raw_new, coef_new)
            sg = grad_new * inv_c
            m1 = float(sg @ sg)
            if np.isfinite(m1) and m1 <= (1.0 - 2e-4 * t) * m0:
                accepted = True
                break
            del raw_new, grad_new, hv_new
            t *= 0.5
        if not accepted:
            F = objective(raw, coef)
            slope = float(grad @ d)
            t = 1.0
            for _ in range(60):
                raw_new = raw + t * draw
                coef_new = coef + t * dc
                F_new = objective(raw_new, coef_new)
                if np.isfinite(F_new) and F_new <= F + 1e-4 * t * slope:
                    accepted = True
                    break
                t *= 0.5
            if not accepted:
                converged = float(np.max(np.abs(draw), initial=0.0)) <= _ROUNDING * float(
                    np.max(np.abs(raw), initial=0.0))
                break
            grad_new, hv_new = derivatives(raw_new, coef_new)
        change = t * float(np.max(np.abs(draw), initial=0.0))
        coef, intercept, raw, grad, hv = coef_new, intercept + t * db, raw_new, grad_new, hv_new
        if change <= _ROUNDING * float(np.max(np.abs(raw), initial=0.0)) and t == 1.0:
            gnorm = float(np.max(np.abs(grad * inv_c))) if nfree else 0.0
            converged = True
            it += 1
            break
    if converged and refine and nfree and np.any(grad):
        if diag is None:
            diag = _cg_diagonal(X, hv, v, cscale, alpha, fit_intercept, unit)
            base = _preconditioner(hv, alpha, diag, coarse)
        coef, intercept, raw, grad, gnorm = _refine_cg(X, XT, hv, alpha, fit_intercept, coef, intercept, raw,
                                                       grad, base, mem, inv_c, derivatives)
    return LinearFit(coef, intercept, raw, it + start_iter, np.nan, gnorm, converged, fam)


def _refine_cg(X, XT, hv, alpha, fit_intercept, coef, intercept, raw, grad, base, mem, inv_c, derivatives):
    """Iterative refinement for ``newton_cg`` at the gradient test: one Newton step solved to REFINE_CG_RTOL.

    The truncated Newton steps stop their conjugate gradients at a residual of
    the order of the gradient, so at the gradient test the coefficients are
    accurate to about tol divided by the smallest eigenvalue of the
    equilibrated Newton matrix (one-hot designs have one small eigenvalue per
    categorical factor: each factor's columns nearly add up to the
    intercept).  This step solves d2F d = -dF until ||C^-1 r|| <=
    REFINE_CG_RTOL ||C^-1 dF||, which shrinks that error by about the same
    factor (the quadratic term of the step is of the order of the squared
    error, negligible here).  It is kept only if it lowers ||C^-1 dF||
    (checked with one more gradient) and moves some raw score beyond rounding.
    """
    p = coef.shape[0]
    sg = grad * inv_c
    m0 = float(sg @ sg)
    d, _ = _conjugate_gradients(X, XT, hv, alpha, fit_intercept, -grad, base, mem, inv_c,
                                REFINE_CG_RTOL * float(np.sqrt(m0)), 0.0)
    dc = d[:p]
    db = d[p] if fit_intercept else 0.0
    draw = _raw(X, dc, db, None)
    if not np.all(np.isfinite(draw)) or float(np.max(np.abs(draw), initial=0.0)) <= _ROUNDING * float(
            np.max(np.abs(raw), initial=0.0)):
        return coef, intercept, raw, grad, float(np.sqrt(np.max(sg * sg, initial=0.0)))
    raw_new = raw + draw
    del draw
    grad_new, _ = derivatives(raw_new, coef + dc)
    sg_new = grad_new * inv_c
    if not float(sg_new @ sg_new) < m0:
        return coef, intercept, raw, grad, float(np.sqrt(np.max(sg * sg, initial=0.0)))
    return coef + dc, intercept + db, raw_new, grad_new, float(np.max(np.abs(sg_new)))


def _refine(solve, X, coef, intercept, raw, grad, h, inv_c, derivatives, fit_intercept, rounds=3):
    """Iterative refinement at the stopping point: Newton steps with the last factorisation.

    The gradient test alone stops an ill-conditioned problem early (a gradient
    below tol can leave the coefficients wrong by tol times the condition
    number).  Each round solves with the factorisation already at hand (no new
    pass to form a Hessian) and is kept only while it lowers ||C^-1 dF|| and
    still moves some raw score beyond rounding; the rounds stop once one
    shrinks ||C^-1 dF||^2 less than a hundredfold (rounding level reached).
    A round is made only while the step's bound sum_j c_j |d_j| + |d_0| (a
    bound on the weighted RMS of its raw-score change, computed without a pass
    over X) exceeds 1e-11 max |raw|.
    """
    p = coef.shape[0]
    sg = grad * inv_c
    m0 = float(sg @ sg)
    scale = 1e-11 * float(np.max(np.abs(raw), initial=0.0))
    for _ in range(rounds):
        d = -solve(grad)
        dc = d[:p]
        db = d[p] if fit_intercept else 0.0
        if not float(np.sum(np.abs(dc) / inv_c[:p])) + abs(db) > scale:
            break
        draw = _raw(X, dc, db, None) if p else np.full(raw.shape[0], db)
        if float(np.max(np.abs(draw), initial=0.0)) <= _ROUNDING * float(np.max(np.abs(raw), initial=0.0)):
            break
        raw_new = raw + draw
        coef_new = coef + dc
        grad_new, h_new = derivatives(raw_new, coef_new)
        sg = grad_new * inv_c
        m1 = float(sg @ sg)
        if not (m1 < m0):
            break
        coef, intercept, raw, grad, h, m_prev, m0 = coef_new, intercept + db, raw_new, grad_new, h_new, m0, m1
        if m1 > CHORD_SHRINK * m_prev:
            break
    return coef, intercept, raw, grad, h, float(np.sqrt(np.max(grad * grad * inv_c * inv_c, initial=0.0)))


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


def _pow2(a):
    """The power of two nearest to a > 0 (dividing by it is exact in binary floating point)."""
    return float(np.ldexp(1.0, int(np.round(np.log2(a)))))


def _lp_columns(Xk, w, fit_intercept, names=None):
    """Centred (dense, with an intercept) and power-of-two scaled columns for HiGHS.

    HiGHS treats matrix entries above 1e15 as errors and drops those below 1e-9,
    so raw columns such as nanosecond timestamps (~1.6e18) cannot be passed as
    they are.  Centring a column at its weighted mean is absorbed by the
    intercept and scaling it by a power of two is exact, so neither changes the
    fitted values.  Returns (columns, centre, scale); a column whose scaled
    values are still not finite numbers of order one raises a ValueError naming it.
    """
    m, p = Xk.shape
    center = np.zeros(p)
    if fit_intercept and not sparse.issparse(Xk) and m:
        center = (w @ Xk) / w.sum()
        Xc = Xk - center
    else:
        Xc = Xk
    amax = (abs(Xc).max(axis=0).toarray().ravel() if sparse.issparse(Xc) else np.max(np.abs(Xc), axis=0, initial=0.0))
    with np.errstate(divide="ignore", over="ignore", invalid="ignore"):
        scale = np.array([_pow2(a) if a > 0 and np.isfinite(a) else 1.0 for a in amax])
        bad = ~np.isfinite(amax) | ~np.isfinite(center) | ~((amax / scale <= 2.0) & ((amax == 0) | (amax / scale >= 0.5)))
    if np.any(bad):
        j = int(np.flatnonzero(bad)[0])
        label = repr(str(names[j])) if names is not None else str(j)
        raise ValueError(
            f"column {label} cannot be represented in the linear programme of the quantile fit: "
            f"its largest centred magnitude {amax[j]!r} has no finite power-of-two scale (values "
            "between about 1e-300 and 1e300 are needed); rescale this column")
    Xs = Xc @ sparse.diags(1.0 / scale) if sparse.issparse(Xc) else Xc / scale
    return Xs, center, scale


def quantile_lp(X, y, v, offset, tau, fit_intercept, names=None) -> LinearFit:
    """Exact minimiser of sum v rho_tau(y - raw) by linear programming (HiGHS).

    The columns are centred and scaled (``_lp_columns``), the target scaled by a
    power of two.  HiGHS stops at its feasibility tolerance (~1e-7 of the scaled
    data), so the vertex it returns is then polished: the rows it fits to that
    tolerance are fitted exactly by least squares (a vertex of this programme
    interpolates nfree rows), and the polished point is kept if its objective is
    not larger.
    """
    n, p = X.shape
    keep = v > 0
    Xk, vk = X[keep], v[keep]
    target = y[keep] - (offset[keep] if offset is not None else 0.0)
    m = Xk.shape[0]
    Xs, center, scale = _lp_columns(Xk, vk, fit_intercept, names)
    tmax = float(np.max(np.abs(target), initial=0.0))
    ts = _pow2(tmax) if tmax > 0 and np.isfinite(tmax) else 1.0
    tgt = target / ts
    blocks = [sparse.csr_matrix(Xs)]
    if fit_intercept:
        blocks.append(sparse.csr_matrix(np.ones((m, 1))))
    eye = sparse.identity(m, format="csr")
    blocks += [eye, -eye]
    A = sparse.hstack(blocks, format="csr")
    nfree = p + int(fit_intercept)
    c = np.concatenate([np.zeros(nfree), tau * vk, (1.0 - tau) * vk])
    bounds = [(None, None)] * nfree + [(0, None)] * (2 * m)
    # interior point with crossover to a vertex: on tall problems many times faster than the
    # dual simplex, which needs about one iteration per row; the simplex is the fallback
    res = optimize.linprog(c, A_eq=A, b_eq=tgt, bounds=bounds, method="highs-ipm")
    if res.status != 0:
        res = optimize.linprog(c, A_eq=A, b_eq=tgt, bounds=bounds, method="highs")
    if res.status != 0:
        raise RuntimeError(f"the linear programme for the quantile fit failed: {res.message}")
    sol = np.asarray(res.x[:nfree], dtype=float)

    def pinball(s):
        r = tgt - (np.asarray(Xs @ s[:p]).ravel() + (s[p] if fit_intercept else 0.0))
        return float(np.dot(vk, np.maximum(tau * r, (tau - 1.0) * r))), r

    obj, r = pinball(sol)
    Z = np.abs(r) <= 1e-6
    if Z.sum() >= nfree:
        Az = Xs[Z].toarray() if sparse.issparse(Xs) else Xs[Z]
        if fit_intercept:
            Az = np.column_stack([Az, np.ones(Az.shape[0])])
        polished = np.linalg.lstsq(Az, tgt[Z], rcond=None)[0]
        obj_p, _ = pinball(polished)
        if obj_p <= obj:
            sol = polished
    coef = sol[:p] / scale * ts
    intercept = (float(sol[p]) * ts - float(center @ coef)) if fit_intercept else 0.0
    raw = _raw(X, coef, intercept, offset)
    r = y - raw
    obj = float(np.dot(v, np.maximum(tau * r, (tau - 1.0) * r)))
    return LinearFit(coef, intercept, raw, int(res.nit), obj, np.nan, True, None)


def unbounded_margin(X, sign, v, fit_intercept) -> float:
    """Detect a direction along which the likelihood rises without bound, by linear programming.

    ``sign[i]`` says in which direction row i's nll keeps falling towards a
    finite limit as its raw score moves: +1 (raw -> +inf: bernoulli y = 1),
    -1 (raw -> -inf: bernoulli y = 0, poisson y = 0) or 0 (neither: the nll
    grows both ways).  With z_i = [x_i, 1] . beta, the maximum-likelihood
    estimate is infinite exactly when some beta has sign_i z_i >= 0 on the
    signed rows, z_i = 0 on the others, and sign_i z_i > 0 somewhere: moving
    along beta then lowers the nll of some rows and changes no other.  The
    linear programme

        maximise sum_i sign_i z_i   subject to  sign_i z_i >= 0,  z_i = 0 (sign_i = 0),  -1 <= beta_j <= 1

    has optimum 0 when the estimate is finite and a positive optimum when it
    is not.  For bernoulli this is the detection programme of (quasi-)complete
    separation (Konis, 2007, Linear programming algorithms for detecting
    separated data in binary logistic regression models, DPhil thesis, Oxford
    -- recalled from memory); for poisson it finds e.g. a category whose counts
    are all zero.  The columns are scaled by powers of two first.  Returns that
    optimum divided by sum |sign_i z_i| (0 means a finite estimate).
    """
    keep = v > 0
    Xk, sg = X[keep], np.asarray(sign, dtype=float)[keep]
    if Xk.shape[1]:
        Xk, _, _ = _lp_columns(Xk, v[keep], False)
    cols = [Xk] if Xk.shape[1] else []
    if fit_intercept:
        cols.append(np.ones((Xk.shape[0], 1)))
    if not cols or not np.any(sg):
        return 0.0
    Z = sparse.hstack([sparse.csr_matrix(c) for c in cols], format="csr")
    signed, zero = np.flatnonzero(sg != 0), np.flatnonzero(sg == 0)
    S = sparse.diags(sg[signed]) @ Z[signed]
    total = np.asarray(S.sum(axis=0)).ravel()
    res = optimize.linprog(-total, A_ub=-S, b_ub=np.zeros(S.shape[0]),
                           A_eq=Z[zero] if zero.size else None, b_eq=np.zeros(zero.size) if zero.size else None,
                           bounds=[(-1.0, 1.0)] * Z.shape[1], method="highs")
    if res.status != 0:
        return 0.0
    return max(0.0, -float(res.fun)) / max(float(abs(S).sum()), 1e-300)


def separation_margin(X, y01, v, fit_intercept) -> float:
    """``unbounded_margin`` for binary labels: positive when the classes are (quasi-)separated."""
    return unbounded_margin(X, 2.0 * np.asarray(y01, dtype=float) - 1.0, v, fit_intercept)


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
    Xk = X[keep] if sparse.issparse(X) else np.ascontiguousarray(X[keep])
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
    r = t - np.asarray(Xk @ coef).ravel() - b
    scale_t = 1.0 + float(np.max(np.abs(t)))
    Z = np.abs(r) <= mu
    P = ~Z & (r > 0)
    N = ~Z & (r < 0)
    tol = 1e-9
    for rounds in range(1, max_iter + 1):
        g = np.asarray(Xk[P].T @ c[P]).ravel() * tau + np.asarray(Xk[N].T @ c[N]).ravel() * (tau - 1.0)
        g0 = tau * c[P].sum() + (tau - 1.0) * c[N].sum()
        XZ = Xk[Z].toarray() if sparse.issparse(Xk) else Xk[Z]
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
        r = t - np.asarray(Xk @ coef).ravel() - b
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


def censored_direct(fam, X, target, w, v, offset, alpha, fit_intercept, max_iter, tol, coef, intercept):
    r"""Censored fits of families with a surrogate Hessian (laplace, student_t): direct minimisation
    of the exact objective F (module docstring) jointly over the coefficients, the intercept and the
    logs of the parameters in ``fam.censored_fit``, with ``nll`` the censored nll
    (lossfam.families._censored).

    Newton's iteration is not used here: laplace's nll has a kink at every exact row
    (|y - raw|) and student_t's is not convex, so their Hessians are surrogates, and alternating
    majorise-minimise steps with the scale fit converges too slowly.  Instead, on standardised
    columns x_j / c_j (c_j = sqrt(sum_i v_i x_ij^2), as in ``newton``):

    1. BFGS (scipy.optimize.minimize) with the exact gradient in the coefficients and intercept
       (X^T (v g) + alpha coef, sum v g; g the censored gradient) and central differences
       (step 1e-6) in the log parameters, to a gradient below ``tol``;
    2. where BFGS stops without meeting that tolerance (a kink: laplace's exact rows where
       raw = y), rounds of: Nelder-Mead from the best point (xatol 1e-10, fatol 1e-15); the
       family's own maximum-likelihood fit of the parameters given the coefficients
       (``Family.fit_nuisance``, smooth and one-dimensional, where a direct search stalls
       first); and BFGS on the kinks held: the exact rows nearest their kink (|y - raw| <=
       1e-4 scale, at most one per coefficient) are constrained to raw = y (coefficients in the
       null space of those rows, from a particular solution by least squares), where the
       objective is smooth, so BFGS meets the gradient tolerance there if the set is right; a
       held row whose multiplier lies outside its subgradient range is released and the solve
       repeated (``_on_kinks``); ``converged`` when the gradient tolerance and the ranges hold.  Each step is kept only where it
       lowers F; the rounds stop when one no longer lowers F by more than its rounding.  A direct search: meant for a handful of columns (it is slow
       and may stop short beyond about ten parameters; ``converged`` is then False).
    """
    import dataclasses

    from ..families._censored import censored_grad_hess, censored_nll

    names = [n for n in fam.censored_fit if n in fam.params]
    p = X.shape[1]
    c = column_scales(X, v)
    inv_c = 1.0 / c
    o = 0.0 if offset is None else offset
    k = p + (1 if fit_intercept else 0)

    def unpack(theta):
        beta = theta[:p] * inv_c
        b = theta[p] if fit_intercept else 0.0
        return beta, b, theta[k:]

    def family_at(logp):
        if not names:
            return fam
        try:
            with np.errstate(over="ignore", under="ignore"):
                return dataclasses.replace(fam, **{n: float(np.exp(x)) for n, x in zip(names, logp)})
        except ValueError:
            return None

    def objective(theta):
        beta, b, logp = unpack(theta)
        f2 = family_at(logp)
        if f2 is None:
            return np.inf
        raw = X @ beta + b + o
        with np.errstate(all="ignore"):
            val = float(np.dot(v, censored_nll(f2, target, raw))) + 0.5 * alpha * float(beta @ beta)
        return val if np.isfinite(val) else np.inf

    def gradient(theta, drop=None):
        """dF/dtheta; ``drop``: rows left out of the coefficient part (kink rows, whose share is a
        multiplier)."""
        beta, b, logp = unpack(theta)
        f2 = family_at(logp)
        out = np.zeros_like(theta)
        if f2 is None:
            return out
        raw = X @ beta + b + o
        with np.errstate(all="ignore"):
            g = censored_grad_hess(f2, target, raw)[0]
        vg = v * g
        if drop is not None:
            vg[drop] = 0.0
        out[:p] = (X.T @ vg + alpha * beta) * inv_c
        if fit_intercept:
            out[p] = vg.sum()
        for j in range(len(names)):
            e = np.zeros_like(theta)
            e[k + j] = 1e-6
            out[k + j] = (objective(theta + e) - objective(theta - e)) / 2e-6
        return out

    theta = np.concatenate([np.asarray(coef, dtype=float) * c, [intercept] if fit_intercept else [],
                            np.log([fam.params[n] for n in names])])
    res = optimize.minimize(objective, theta, jac=gradient, method="BFGS",
                            options={"gtol": tol, "maxiter": max(50, 20 * max_iter)})
    theta, n_iter = res.x, int(res.nit)
    grad_norm = float(np.max(np.abs(gradient(theta)))) if theta.size else 0.0
    converged = grad_norm <= tol
    if not converged:
        f = objective(theta)
        for _ in range(20):
            f0 = f
            nm = optimize.minimize(objective, theta, method="Nelder-Mead",
                                   options={"xatol": 1e-10, "fatol": 1e-15, "maxfev": 4000 * theta.size,
                                            "adaptive": theta.size > 4})
            n_iter += int(nm.nit)
            if nm.fun < f:
                theta, f = nm.x, nm.fun
            if names:  # the parameters given the coefficients, by the family's own (smooth, 1-D) fit
                beta, b, logp = unpack(theta)
                refit = family_at(logp).fit_nuisance(target, X @ beta + b + o, w)
                trial = np.concatenate([theta[:k], np.log([refit.params[n] for n in names])])
                ft = objective(trial)
                if ft < f:
                    theta, f = trial, ft
            # the exact rows at the kink (raw = y) held there: a smooth problem on the rest
            trial, ok, it = _on_kinks(objective, gradient, family_at, theta, X, target, v, o, inv_c, p, k,
                                      fit_intercept, tol)
            n_iter += it
            ft = objective(trial)
            if ft <= f:
                theta, f = trial, ft
                converged = ok
            if not f0 - f > 64 * np.finfo(float).eps * max(1.0, abs(f0)):
                converged = converged or bool(nm.success)
                break
    beta, b, logp = unpack(theta)
    f2 = family_at(logp)
    raw = X @ beta + b + o
    return LinearFit(coef=beta, intercept=float(b), raw=raw, n_iter=n_iter, objective=objective(theta),
                     grad_norm=grad_norm, converged=converged, family=f2)


def _on_kinks(objective, gradient, family_at, theta, X, target, v, o, inv_c, p, k, fit_intercept, tol):
    """BFGS with the exact rows near their kink (|y - raw| <= 1e-4 scale, at most as many as there
    are coefficients, nearest first) held at raw = y (``censored_direct``, step 2), then the optimality check of the held rows: the multipliers
    lambda solving Z^T lambda = -(gradient without those rows) must lie within each row's
    subgradient range, v_i |g_i| just off the kink (v_i / b for laplace); the row with the largest
    excess is released and the solve repeated.  Returns (theta, converged, iterations)."""
    beta = theta[:p] * inv_c
    b = theta[p] if fit_intercept else 0.0
    raw = X @ beta + b + o
    ex = target.exact
    r = np.where(ex, target.lower - raw, np.inf)
    scale = float(np.exp(theta[k])) if theta.size > k else 1.0
    near = np.abs(r) <= 1e-4 * scale
    rows = np.flatnonzero(near)
    rows = rows[np.argsort(np.abs(r[rows]), kind="stable")[:k]]  # at most one per free coefficient
    iters = 0
    while rows.size:
        Xa = X[rows]
        Xa = Xa.toarray() if sparse.issparse(Xa) else np.asarray(Xa)
        Z = Xa * inv_c
        if fit_intercept:
            Z = np.column_stack([Z, np.ones(rows.size)])
        y_a = target.lower[rows]
        rhs = y_a - (o[rows] if isinstance(o, np.ndarray) else o)
        base = linalg.lstsq(Z, rhs)[0]
        N = linalg.null_space(Z)
        m = N.shape[1]

        def full(u):
            return np.concatenate([base + N @ u[:m], u[m:]])

        def reduced_grad(u):
            g = gradient(full(u), drop=rows)
            return np.concatenate([N.T @ g[:k], g[k:]])

        u0 = np.concatenate([N.T @ (theta[:k] - base), theta[k:]])
        res = optimize.minimize(lambda u: objective(full(u)), u0, jac=reduced_grad, method="BFGS",
                                options={"gtol": tol, "maxiter": 1000})
        iters += int(res.nit)
        new = full(res.x)
        ok = bool(np.max(np.abs(reduced_grad(res.x)), initial=0.0) <= tol)
        if not ok:
            return new, False, iters
        # the multipliers of the held rows, and each row's subgradient range at the kink
        g = gradient(new, drop=rows)[:k]
        lam = linalg.lstsq(Z.T, -g)[0]
        fam = family_at(new[k:])
        with np.errstate(all="ignore"):
            step = 1e-8 * max(1.0, float(np.max(np.abs(y_a))))
            bound = v[rows] * np.minimum(np.abs(fam._grad_hess(y_a, y_a + step)[0]),
                                         np.abs(fam._grad_hess(y_a, y_a - step)[0]))
        excess = np.abs(lam) - bound * (1.0 + 1e-6) - tol
        if not np.any(excess > 0):
            return new, True, iters
        rows = np.delete(rows, int(np.argmax(excess)))
        theta = new
    return theta, False, iters
