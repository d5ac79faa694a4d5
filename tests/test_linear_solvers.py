"""The fast paths of the linear solvers: one-pass dense Newton sweeps, secant-corrected chord
steps, and truncated Newton with conjugate gradients for sparse X with many columns.

Outside references, named beside each check:
* scikit-learn's GLM estimators with their newton-cholesky solver at tol=1e-12 (PoissonRegressor,
  GammaRegressor, LogisticRegression without penalty) and LinearRegression, on the dense matrix;
* the gradient and Newton matrix written out directly with numpy (X^T (v g), [X 1]^T diag(v h) [X 1]);
* the secant property of the BFGS update (Nocedal & Wright, Numerical Optimization, 2nd ed.,
  2006, eq. 6.17 and Algorithm 7.4 -- recalled from memory): the updated inverse maps the
  last gradient change to the last step, and on a quadratic with conjugate steps it inverts
  the matrix on their span.
"""
import numpy as np
import pytest
from scipy import linalg, sparse
from sklearn.linear_model import GammaRegressor, LinearRegression, LogisticRegression, PoissonRegressor

import lossfam
from lossfam._sk import _solvers
from lossfam.sklearn import LikelihoodClassifier, LikelihoodRegressor


def params(est):
    return np.r_[est.intercept_, est.coef_]


def onehot_design(n, factors, levels, seed):
    """Categorical factors one-hot encoded (first level dropped) plus one numeric column, as CSR."""
    rng = np.random.default_rng(seed)
    codes = rng.integers(0, levels, size=(n, factors))
    rows, cols = [], []
    for f in range(factors):
        keep = codes[:, f] > 0
        rows.append(np.flatnonzero(keep))
        cols.append(f * (levels - 1) + codes[keep, f] - 1)
    rows, cols = np.concatenate(rows), np.concatenate(cols)
    onehot = sparse.csr_matrix((np.ones(rows.size), (rows, cols)), shape=(n, factors * (levels - 1)))
    numeric = sparse.csr_matrix(rng.standard_normal((n, 1)) * 3.0)
    return sparse.hstack([onehot, numeric], format="csr"), rng


def targets(family, raw, rng):
    mu = np.exp(raw)
    if family == "poisson":
        return rng.poisson(mu).astype(float)
    if family == "gamma":
        return rng.gamma(2.0, mu / 2.0)
    return raw + rng.normal(0.0, 0.5, raw.size)


SK_REFERENCE = {
    "poisson": lambda: PoissonRegressor(alpha=0.0, solver="newton-cholesky", tol=1e-12, max_iter=200),
    "gamma": lambda: GammaRegressor(alpha=0.0, solver="newton-cholesky", tol=1e-12, max_iter=200),
    "gaussian": lambda: LinearRegression(),
}


@pytest.mark.parametrize("family", ["poisson", "gamma", "gaussian"])
def test_sparse_many_columns_uses_conjugate_gradients_and_matches_sklearn(family, monkeypatch):
    X, rng = onehot_design(6000, 3, 80, seed=5)  # 238 columns: above CHORD_MIN_COLUMNS
    assert X.shape[1] + 1 > _solvers.CHORD_MIN_COLUMNS
    raw = 0.2 + X @ rng.normal(0.0, 0.2, X.shape[1])
    y = targets(family, raw, rng)
    w = rng.uniform(0.5, 2.0, X.shape[0])
    calls = []
    real = _solvers.newton_cg
    monkeypatch.setattr(_solvers, "newton_cg", lambda *a, **k: calls.append(1) or real(*a, **k))
    ours = LikelihoodRegressor(family=family, tol=1e-10).fit(X, y, sample_weight=w)
    assert calls, "the sparse fit did not use the conjugate-gradient solver"
    # reference: scikit-learn's newton-cholesky GLM (least squares for gaussian) on the dense matrix
    ref = SK_REFERENCE[family]().fit(X.toarray(), y, sample_weight=w)
    np.testing.assert_allclose(params(ours), params(ref), rtol=1e-6, atol=1e-8, err_msg=family)


@pytest.mark.parametrize("alpha", [0.0, 0.01])
def test_sparse_many_columns_agrees_with_the_dense_fit_with_offset_and_penalty(alpha):
    # reference: the dense fit of the same matrix (exact Newton matrix, Cholesky) with tight tolerance
    X, rng = onehot_design(5000, 3, 80, seed=8)
    offset = rng.normal(0.0, 0.3, X.shape[0])
    y = rng.poisson(np.exp(-0.3 + offset + X @ rng.normal(0.0, 0.2, X.shape[1]))).astype(float)
    w = rng.uniform(0.5, 2.0, X.shape[0])
    dense = LikelihoodRegressor(family="poisson", alpha=alpha, tol=1e-12).fit(X.toarray(), y, sample_weight=w,
                                                                               offset=offset)
    sp = LikelihoodRegressor(family="poisson", alpha=alpha, tol=1e-12).fit(X, y, sample_weight=w, offset=offset)
    np.testing.assert_allclose(params(sp), params(dense), rtol=1e-7, atol=1e-9)


@pytest.mark.parametrize("family", ["poisson", "gamma"])
def test_sparse_many_columns_at_default_tolerance_agrees_with_the_dense_fit_to_1e8(family, monkeypatch):
    # the truncated Newton path stops its conjugate gradients early; its refinement at the gradient
    # test must bring the coefficients to the dense fit's (exact Newton matrix, Cholesky) at the
    # default tol.  Reference: the dense fit of the same matrix, also at the default tol.
    X, rng = onehot_design(6000, 4, 60, seed=12)  # 237 columns: above CHORD_MIN_COLUMNS
    raw = 0.3 + X @ rng.normal(0.0, 0.3, X.shape[1])
    y = targets(family, raw, rng)
    refined = []
    real = _solvers._refine_cg
    monkeypatch.setattr(_solvers, "_refine_cg", lambda *a, **k: refined.append(1) or real(*a, **k))
    sp = LikelihoodRegressor(family=family).fit(X, y)
    assert refined, "the sparse fit did not refine"
    dense = LikelihoodRegressor(family=family).fit(X.toarray(), y)
    np.testing.assert_allclose(params(sp), params(dense), rtol=1e-8, atol=1e-10, err_msg=family)


def test_sparse_many_columns_classifier_matches_sklearn():
    X, rng = onehot_design(8000, 3, 80, seed=9)
    raw = -0.2 + X @ rng.normal(0.0, 0.3, X.shape[1])
    y = (rng.random(X.shape[0]) < 1.0 / (1.0 + np.exp(-raw))).astype(int)
    ours = LikelihoodClassifier(alpha=0.0, tol=1e-10).fit(X, y)
    ref = LogisticRegression(C=np.inf, solver="newton-cholesky", tol=1e-12, max_iter=200).fit(X.toarray(), y)
    np.testing.assert_allclose(params(ours), np.r_[ref.intercept_, ref.coef_.ravel()], rtol=1e-6, atol=1e-8)


def test_sparse_many_columns_non_unit_entries():
    # entries other than 0 and 1 take the blocked path for the Jacobi diagonal (sum h x^2)
    X, rng = onehot_design(6000, 3, 80, seed=10)
    X = X.multiply(rng.uniform(0.5, 2.0, X.shape[0])[:, None]).tocsr()
    assert not _solvers._is_unit(X)
    y = rng.poisson(np.exp(0.1 + X @ rng.normal(0.0, 0.1, X.shape[1]))).astype(float)
    ours = LikelihoodRegressor(family="poisson", tol=1e-10).fit(X, y)
    ref = SK_REFERENCE["poisson"]().fit(X.toarray(), y)
    np.testing.assert_allclose(params(ours), params(ref), rtol=1e-6, atol=1e-8)


@pytest.mark.parametrize("weights", ["varying", "equal"])  # equal: sums formed unweighted, scaled once
@pytest.mark.parametrize("order", ["C", "F"])  # F: column-major X, whole-array products
@pytest.mark.parametrize("hessian", [None, "sub", "full"])
@pytest.mark.parametrize("fit_intercept", [True, False])
def test_dense_sweep_matches_the_direct_formulas(hessian, fit_intercept, order, weights):
    rng = np.random.default_rng(3)
    n, p = 20_000, 5
    X = np.asarray(rng.standard_normal((n, p)), order=order)
    y = rng.poisson(2.0, n).astype(float)
    v = rng.uniform(0.5, 2.0, n) if weights == "varying" else np.ones(n)
    v /= v.sum()
    vconst = v[0] if weights == "equal" else None
    fam = lossfam.family("poisson")
    raw0 = rng.normal(0.5, 0.2, n)
    dc, db = rng.normal(0, 0.1, p), 0.05
    draw = np.empty(n)
    buf = np.empty((_solvers._BLOCK, p))
    squares = np.zeros(p)
    raw, grad, H = _solvers.dense_sweep(fam, X, y, v, raw0, 0.5, dc, db, draw, True, hessian, fit_intercept, buf,
                                        squares, vconst)
    np.testing.assert_allclose(squares, v @ X ** 2, rtol=1e-12)
    # direct formulas with numpy, all rows at once
    np.testing.assert_allclose(draw, X @ dc + db, rtol=1e-12, atol=1e-14)
    np.testing.assert_allclose(raw, raw0 + 0.5 * (X @ dc + db), rtol=1e-12)
    g, h = fam._grad_hess(y, raw)
    Z = np.column_stack([X, np.ones(n)]) if fit_intercept else X
    np.testing.assert_allclose(grad, Z.T @ (v * g), rtol=1e-10, atol=1e-14)
    if hessian is None:
        assert H is None
        return
    if hessian == "full":
        rows = np.arange(n)
    else:  # the first 1/SUBSAMPLE_FRACTION of every block of rows (rounded up), reweighted to total weight 1
        m, f = _solvers._BLOCK, _solvers.SUBSAMPLE_FRACTION
        rows = np.concatenate([np.arange(s, s + -(-(min(n, s + m) - s) // f)) for s in range(0, n, m)])
    hv = h[rows] * v[rows] / (v[rows].sum() if hessian == "sub" else 1.0)
    np.testing.assert_allclose(H, Z[rows].T @ (hv[:, None] * Z[rows]), rtol=1e-10, atol=1e-14)


def test_secant_solve_has_the_bfgs_secant_and_quadratic_properties():
    rng = np.random.default_rng(4)
    p = 6
    A = rng.standard_normal((p, p))
    A = A @ A.T + p * np.eye(p)  # the true matrix
    M = A + 0.3 * np.diag(rng.uniform(0.5, 1.5, p))  # an inexact factorised approximation
    fac = linalg.cho_factor(M)

    def solve(r):
        return linalg.cho_solve(fac, r)

    # conjugate steps of A (Gram-Schmidt in the A inner product), gradient changes y = A s
    S = []
    for _ in range(p):
        s = rng.standard_normal(p)
        for t in S:
            s -= (t @ A @ s) / (t @ A @ t) * t
        S.append(s)
    pairs = [(s, A @ s) for s in S[:3]]
    apply = _solvers._secant_solve(solve, pairs)
    s_last, y_last = pairs[-1]
    np.testing.assert_allclose(apply(y_last), s_last, rtol=1e-10)  # secant condition
    for s, y in pairs:  # hereditary on a quadratic: exact on the span of the conjugate steps
        np.testing.assert_allclose(apply(y), s, rtol=1e-10)
    full = _solvers._secant_solve(solve, [(s, A @ s) for s in S])
    r = rng.standard_normal(p)
    np.testing.assert_allclose(full(r), np.linalg.solve(A, r), rtol=1e-9)  # p conjugate pairs: A^-1
    assert _solvers._secant_solve(solve, []) is solve


def test_large_dense_badly_scaled_fit_matches_its_standardised_twin_and_sklearn():
    # n >= SUBSAMPLE_MIN_ROWS takes the subsampled-then-chord path; columns in very different
    # units and correlated.  References: the fit on standardised columns mapped back (the model
    # is invariant to column units), and scikit-learn's newton-cholesky GammaRegressor on those.
    rng = np.random.default_rng(21)
    n = 120_000
    Z = rng.standard_normal((n, 3))
    Z[:, 2] = 0.9 * Z[:, 0] + 0.1 * Z[:, 2]  # strongly correlated with the first column
    scale = np.array([1e-3, 1.0, 1e6])
    X = 5.0 * scale + Z * scale  # units and offsets of the columns differ by nine orders
    y = rng.gamma(2.0, np.exp(0.4 + Z @ np.array([0.2, -0.1, 0.15])) / 2.0)
    ours = LikelihoodRegressor(family="gamma").fit(X, y)
    mean, sd = X.mean(axis=0), X.std(axis=0)
    Xs = (X - mean) / sd
    twin = LikelihoodRegressor(family="gamma").fit(Xs, y)
    coef = twin.coef_ / sd
    np.testing.assert_allclose(ours.coef_, coef, rtol=1e-7)
    np.testing.assert_allclose(ours.intercept_, twin.intercept_ - mean @ coef, rtol=1e-7)
    ref = GammaRegressor(alpha=0.0, solver="newton-cholesky", tol=1e-12, max_iter=200).fit(Xs, y)
    np.testing.assert_allclose(twin.coef_, ref.coef_, rtol=1e-7)


def test_column_scales_from_the_subsample_are_unit_free_and_exact_where_it_sees_zeros():
    # direct formula: c_j = sqrt(sum_i v_i x_ij^2); a column the subsample saw only as zeros gets it from all rows
    rng = np.random.default_rng(5)
    n = 4000
    X = rng.standard_normal((n, 3))
    X[:, 1] = 0.0
    X[1::8, 1] = 7.0  # non-zero only on rows the subsample (every 8th row from 0) leaves out
    v = rng.uniform(0.5, 1.5, n)
    v /= v.sum()
    sub = slice(0, None, _solvers.SUBSAMPLE_FRACTION)
    vs = v[sub] / v[sub].sum()
    squares = vs @ X[sub] ** 2
    assert squares[1] == 0.0
    c = _solvers._scales_from_subsample(X, v, squares)
    np.testing.assert_allclose(c[1], np.sqrt(v @ X[:, 1] ** 2), rtol=1e-12)
    np.testing.assert_allclose(c[[0, 2]], np.sqrt(squares[[0, 2]]), rtol=1e-12)
    scale = np.array([1e-8, 1e12, 3.0])  # units: every scale moves with its column
    Xs = X * scale
    c_s = _solvers._scales_from_subsample(Xs, v, vs @ Xs[sub] ** 2)
    np.testing.assert_allclose(c_s, c * scale, rtol=1e-12)


def test_large_dense_fit_with_a_column_the_start_never_sees_matches_sklearn():
    # n >= SUBSAMPLE_MIN_ROWS: the start's rows (every 8th) hold only zeros in the last column,
    # which is in tiny units; reference: scikit-learn's newton-cholesky PoissonRegressor (tol=1e-12)
    # on the columns standardised, mapped back
    rng = np.random.default_rng(22)
    n = _solvers.SUBSAMPLE_MIN_ROWS + 4000
    X = rng.standard_normal((n, 3))
    rare = np.zeros(n)
    rows = np.flatnonzero((np.arange(n) % _solvers.SUBSAMPLE_FRACTION != 0) & (rng.random(n) < 0.02))
    rare[rows] = 1e-6
    X = np.column_stack([X, rare])
    y = rng.poisson(np.exp(0.2 + X[:, :3] @ np.array([0.2, -0.1, 0.15]) + 0.4e6 * rare)).astype(float)
    ours = LikelihoodRegressor(family="poisson").fit(X, y)
    sd = X.std(axis=0)
    ref = PoissonRegressor(alpha=0.0, solver="newton-cholesky", tol=1e-12, max_iter=200).fit(X / sd, y)
    np.testing.assert_allclose(ours.coef_, ref.coef_ / sd, rtol=1e-7)
    np.testing.assert_allclose(ours.intercept_, ref.intercept_, rtol=1e-7)


@pytest.mark.parametrize("family", ["poisson", "gamma"])
def test_dense_fit_stopped_by_an_unchecked_correction_has_its_gradient_below_tol(family, monkeypatch):
    # the fit stops by applying a correction below tol without a pass to check it (early, or as the
    # refinement after the gradient test).  With means near 1 the standardised Newton matrix is near
    # the identity, so the correction's error (a contraction factor times tol) leaves the gradient at
    # the returned coefficients, written out with numpy, below tol in the standardised units;
    # reference: scikit-learn's newton-cholesky solver at tol=1e-12
    rng = np.random.default_rng(23)
    n = _solvers.SUBSAMPLE_MIN_ROWS + 8000
    X = rng.standard_normal((n, 6)) * np.array([1.0, 2.0, 1e-3, 1e4, 1.0, 0.5])
    mu = np.exp(0.3 + (X / X.std(axis=0)) @ rng.normal(0.0, 0.15, 6))
    y = rng.poisson(mu).astype(float) if family == "poisson" else rng.gamma(2.0, mu / 2.0)
    stops = []
    real = _solvers._raw

    def counting(X_, coef, intercept, offset):
        if X_.shape[0] == n and offset is None:
            stops.append(1)  # only an unchecked correction computes X d this way
        return real(X_, coef, intercept, offset)
    monkeypatch.setattr(_solvers, "_raw", counting)
    tol = 1e-8
    est = LikelihoodRegressor(family=family, tol=tol).fit(X, y)
    assert stops  # the final correction was applied
    raw = X @ est.coef_ + est.intercept_
    g, _ = lossfam.family(family)._grad_hess(y, raw)
    grad = np.r_[X.T @ g, g.sum()] / n
    c = np.r_[np.sqrt(np.mean(X ** 2, axis=0)), 1.0]
    assert np.max(np.abs(grad) / c) <= tol
    cls = PoissonRegressor if family == "poisson" else GammaRegressor
    sd = X.std(axis=0)
    ref = cls(alpha=0.0, solver="newton-cholesky", tol=1e-12, max_iter=200).fit(X / sd, y)
    np.testing.assert_allclose(est.coef_ * sd, ref.coef_, rtol=1e-7, atol=1e-9)


@pytest.mark.parametrize("family", ["poisson", "gamma"])
def test_column_major_and_dataframe_input_fit_like_row_major_without_a_copy(family, monkeypatch):
    # the same data as a C-ordered array, an F-ordered array and a DataFrame (whose values are
    # column-major) give the same fit; the F-ordered data reach the solver as they are, not copied
    pd = pytest.importorskip("pandas")
    rng = np.random.default_rng(24)
    n = _solvers.SUBSAMPLE_MIN_ROWS + 2000
    X = rng.standard_normal((n, 5))
    mu = np.exp(0.2 + X @ rng.normal(0.0, 0.2, 5))
    y = rng.poisson(mu).astype(float) if family == "poisson" else rng.gamma(2.0, mu / 2.0)
    XF = np.asfortranarray(X)
    seen = []
    real = _solvers.newton_dense

    def spying(fam, X_, *a, **k):
        if X_.shape[0] == n:
            seen.append(X_)
        return real(fam, X_, *a, **k)
    monkeypatch.setattr(_solvers, "newton_dense", spying)
    fits = [LikelihoodRegressor(family=family).fit(data, y)
            for data in (X, XF, pd.DataFrame(X, columns=list("abcde")))]
    assert np.shares_memory(seen[1], XF)
    for est in fits[1:]:
        np.testing.assert_allclose(params(est), params(fits[0]), rtol=1e-9, atol=1e-12)


def test_onehot_blocks_finds_the_factors_and_nothing_in_general_sparse_data():
    X, rng = onehot_design(5000, 3, 40, seed=21)  # factors in columns 0-38, 39-77, 78-116; a numeric column 117
    block_of, k = _solvers.onehot_blocks(X)
    assert k == 3
    np.testing.assert_array_equal(block_of, np.r_[np.repeat([0, 1, 2], 39), -1])
    # the definition, checked by brute force: a block's columns never share a row
    for f in range(k):
        assert X[:, block_of == f].sum(axis=1).max() <= 1
    # 0/1 entries without factor structure (columns share rows at random): no block, Jacobi alone
    R = sparse.random(5000, 300, density=0.02, format="csr", random_state=3, data_rvs=np.ones)
    assert _solvers.onehot_blocks(R)[1] == 0
    assert _solvers._CoarseSpace.of(R, True) is None
    # non-unit entries take no part
    Xs = X.multiply(rng.uniform(0.5, 2.0, X.shape[0])[:, None]).tocsr()
    assert _solvers._CoarseSpace.of(Xs, True) is None


def test_onehot_blocks_splits_a_run_whose_columns_share_a_row_further_apart():
    # columns 0..5 never share a row except 1 and 4 (one row, not adjacent): a boundary is needed in
    # (1, 4]; the fewest blocks are two, e.g. [0, 4) and [4, 6), each covering >= half of the rows
    n = 400
    rng = np.random.default_rng(4)
    first = rng.integers(0, 4, n)  # columns 0-3
    second = 4 + rng.integers(0, 2, n)  # columns 4-5
    rows = np.r_[np.arange(n), np.arange(n)]
    cols = np.r_[first, second]
    X = sparse.csr_matrix((np.ones(rows.size), (rows, cols)), shape=(n, 6))
    block_of, k = _solvers.onehot_blocks(X)
    assert k == 2
    for f in range(k):
        assert X[:, block_of == f].sum(axis=1).max() <= 1
    assert np.all(block_of >= 0)


@pytest.mark.parametrize("fit_intercept", [True, False])
def test_two_level_preconditioner_is_symmetric_positive_definite_and_deflates_the_factor_directions(fit_intercept):
    # balancing two-level preconditioner P = (I - Q A) D^-1 (I - A Q) + Q, Q = Z (Z^T A Z)^-1 Z^T
    # (Tang, Nabben, Vuik & Erlangga, J. Sci. Comput. 39, 2009 -- recalled from memory): P is
    # symmetric positive definite and P A Z = Z; A is the Newton matrix written out with numpy
    X, rng = onehot_design(3000, 3, 30, seed=8)
    n, p = X.shape
    hv = rng.uniform(0.5, 2.0, n) / n
    alpha = 1e-4
    Xd = X.toarray()
    if fit_intercept:
        Xd = np.c_[Xd, np.ones(n)]
    A = Xd.T @ (hv[:, None] * Xd)
    A[np.arange(p), np.arange(p)] += alpha
    diag = _solvers._cg_diagonal(X, hv, np.full(n, 1.0 / n), np.ones(p), alpha, fit_intercept, _solvers._is_unit(X))
    np.testing.assert_allclose(diag, np.diag(A), rtol=1e-12)
    coarse = _solvers._CoarseSpace.of(X, fit_intercept)
    assert coarse.k == 3
    apply = coarse.preconditioner(hv, alpha, diag)
    P = np.column_stack([apply(e) for e in np.eye(A.shape[0])])
    np.testing.assert_allclose(P, P.T, atol=1e-10 * np.abs(P).max())
    assert np.linalg.eigvalsh(0.5 * (P + P.T)).min() > 0
    np.testing.assert_allclose(P @ A @ coarse.Z, coarse.Z, atol=1e-9)
    # the point of it: the spread of the preconditioned spectrum shrinks against Jacobi alone
    jac = np.sort(np.linalg.eigvals(A / diag[:, None]).real)
    two = np.sort(np.linalg.eigvals(P @ A).real)
    assert two[-1] / two[0] < 0.2 * jac[-1] / jac[0]


@pytest.mark.parametrize("n", [6000, pytest.param(_solvers.SUBSAMPLE_MIN_ROWS, marks=pytest.mark.slow)])  # the second:
# the coarse space built on the start's row subsample
def test_sparse_fit_with_the_coarse_space_needs_fewer_products_and_matches_without(n, monkeypatch):
    X, rng = onehot_design(n, 4, 60, seed=12)
    y = rng.poisson(np.exp(0.3 + X @ rng.normal(0.0, 0.3, X.shape[1]))).astype(float)
    counts = {}
    real = _solvers._conjugate_gradients

    def counting(*a, **k):
        d, pairs = real(*a, **k)
        counts[mode] = counts.get(mode, 0) + len(pairs)
        return d, pairs
    monkeypatch.setattr(_solvers, "_conjugate_gradients", counting)
    mode = "two-level"
    with_coarse = LikelihoodRegressor(family="poisson").fit(X, y)
    mode = "jacobi"
    monkeypatch.setattr(_solvers._CoarseSpace, "of", classmethod(lambda cls, X, fit_intercept: None))
    without = LikelihoodRegressor(family="poisson").fit(X, y)
    assert counts["two-level"] < counts["jacobi"]
    ref = SK_REFERENCE["poisson"]().fit(X.toarray(), y)  # scikit-learn newton-cholesky, tol=1e-12
    for est in (with_coarse, without):
        np.testing.assert_allclose(params(est), params(ref), rtol=1e-8, atol=1e-10)
