"""Families with several raw scores per row: finite differences and scipy.stats, for every one.

Parametrised over ``lossfam.available(scores="several")``: a family added to the registry is
checked here without a new test."""
import numpy as np
import pytest
from scipy import stats

import lossfam

SEVERAL = lossfam.available(scores="several")


def _rows(fam, rng, n=40):
    """Targets drawn from the family's own law at random raw scores (so every formula is exercised
    at typical rows), plus the raw scores."""
    raw = rng.normal(0.0, 0.5, size=(n, fam.n_scores))
    y = np.asarray(fam.distribution(raw).rvs(random_state=rng), dtype=float)
    return y, raw


@pytest.mark.parametrize("name", SEVERAL)
def test_gradient_and_hessian_match_finite_differences(name, rng):
    fam = lossfam.family(name)
    y, raw = _rows(fam, rng)
    g = fam.gradient(y, raw)
    h = fam.hessian(y, raw)
    eps = 1e-6
    for j in range(fam.n_scores):
        step = np.zeros(fam.n_scores)
        step[j] = eps
        num_g = (fam.nll(y, raw + step) - fam.nll(y, raw - step)) / (2 * eps)
        np.testing.assert_allclose(g[:, j], num_g, rtol=1e-6, atol=1e-6)
        num_h = (fam.gradient(y, raw + step) - fam.gradient(y, raw - step)) / (2 * eps)
        np.testing.assert_allclose(h[:, :, j], num_h, rtol=1e-5, atol=1e-6)
    np.testing.assert_allclose(h, np.swapaxes(h, 1, 2))


@pytest.mark.parametrize("name", SEVERAL)
def test_nll_is_minus_the_scipy_log_density(name, rng):
    # outside reference: the scipy.stats density (or mass) of the family's law, row by row
    fam = lossfam.family(name)
    y, raw = _rows(fam, rng)
    law = fam.distribution(raw)
    logp = law.logpmf(y) if fam.discrete else law.logpdf(y)
    np.testing.assert_allclose(fam.nll(y, raw), -logp, rtol=1e-10, atol=1e-12)


@pytest.mark.parametrize("name", SEVERAL)
def test_fisher_is_the_variance_of_the_score(name, rng):
    # Monte Carlo over the family's own law at three fixed rows: E_y[g g^T] -> fisher (the
    # information identity; unlike E_y[hessian] it also holds where the nll has a kink)
    fam = lossfam.family(name)
    raw = rng.normal(0.0, 0.3, size=(3, fam.n_scores))
    m = 200_000
    rep = np.repeat(raw, m, axis=0)
    y = np.asarray(fam.distribution(rep).rvs(random_state=rng), dtype=float)
    g = fam.gradient(y, rep).reshape(3, m, fam.n_scores)
    mc = np.einsum("rmi,rmj->rij", g, g) / m
    f = fam.fisher(raw)
    np.testing.assert_allclose(mc, f, rtol=0.03, atol=0.03 * np.abs(f).max())
    assert np.all(np.linalg.eigvalsh(f) > 0)


@pytest.mark.parametrize("name", SEVERAL)
@pytest.mark.parametrize("curvature", ["newton", "fisher", "natural"])
def test_engine_curvature_is_positive_and_weights_scale(name, curvature, rng):
    fam = lossfam.family(name)
    y, raw = _rows(fam, rng)
    g, d = fam.grad_hess(y, raw, curvature=curvature)
    assert g.shape == d.shape == raw.shape and np.all(d > 0) and np.isfinite(g).all()
    w = rng.uniform(0.5, 2.0, size=y.shape[0])
    gw, dw = fam.grad_hess(y, raw, w, curvature=curvature)
    np.testing.assert_allclose(gw, g * w[:, None])
    np.testing.assert_allclose(dw, d * w[:, None])


def _assert_stationary(fam, y, w, c, offset):
    """The weighted mean nll is stationary at the constant c (+ offset): its gradient is 0 in the
    smooth columns; in a column with a kink (``kinked_scores``), where a minimiser only brackets 0
    between the one-sided derivatives, the nll rises (to rounding) a step away on either side."""
    raw = np.tile(c, (y.shape[0], 1)) + offset
    grad = w @ fam.gradient(y, raw) / w.sum()
    smooth = [j for j in range(fam.n_scores) if j not in fam.kinked_scores]
    np.testing.assert_allclose(grad[smooth], 0.0, atol=1e-6)
    f0 = w @ fam.nll(y, raw) / w.sum()
    for j in fam.kinked_scores:
        for step in (1e-7, -1e-7):
            moved = raw.copy()
            moved[:, j] += step
            assert w @ fam.nll(y, moved) / w.sum() >= f0 - 1e-12, (fam.name, j, step)


@pytest.mark.parametrize("name", SEVERAL)
def test_baseline_minimises_the_weighted_nll(name, rng):
    fam = lossfam.family(name)
    y, _ = _rows(fam, rng, n=300)
    w = rng.uniform(0.2, 3.0, size=y.shape[0])
    c = fam.baseline(y, w)
    _assert_stationary(fam, y, w, c, 0.0)
    # an offset on the location column moves the location baseline by its (constant) value
    c_off = fam.baseline(y, w, offset=np.full(y.shape[0], 0.25))
    _assert_stationary(fam, y, w, c_off, np.column_stack(
        [np.full(y.shape[0], 0.25)] + [np.zeros(y.shape[0])] * (fam.n_scores - 1)))


def test_gaussian_spread_baseline_is_the_mean_and_ml_sd(rng):
    # closed form: the Gaussian MLE is the mean and the 1/n standard deviation
    y = rng.normal(3.0, 2.0, size=500)
    c = lossfam.family("gaussian_spread").baseline(y)
    np.testing.assert_allclose(c, [y.mean(), np.log(y.std())], rtol=1e-12)


def test_bad_raw_shapes_and_rows_are_named():
    fam = lossfam.family("gaussian_spread")
    y = np.array([1.0, 2.0, 3.0])
    with pytest.raises(ValueError, match=r"shape \(n, 2\)"):
        fam.nll(y, np.zeros(3))
    raw = np.zeros((3, 2))
    raw[1, 1] = np.nan
    with pytest.raises(ValueError, match=r"rows \[1\]"):
        fam.nll(y, raw)
    with pytest.raises(ValueError, match="curvature"):
        fam.grad_hess(y, np.zeros((3, 2)), curvature="exact")
    with pytest.raises(ValueError, match="scale is 0"):
        fam.baseline(np.full(4, 2.0))
