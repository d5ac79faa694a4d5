"""The engines' per-round gradient buffers of several-score families (``lossfam._boost.several``).

``SeveralGradients`` computes block by block, straight into reused float32 buffers in each engine's
layout, without re-validating the targets; these checks pin that it hands the engines exactly
``family.grad_hess`` rounded to float32, for every registered several-score family and a user's
one, every curvature, both layouts, with and without weights, and that it still refuses a
gradient that ran off, naming the rows."""
import numpy as np
import pytest

import lossfam
from lossfam._boost.several import SeveralGradients
from lossfam.families._several import CURVATURES

from test_several_boosting import FAMILIES, NormalLogVariance, _draw


@pytest.fixture(autouse=True, scope="module")
def _user_family():
    lossfam.register(NormalLogVariance, replace=True)
    yield
    lossfam.unregister(NormalLogVariance.name)


def _case(name, n=1001, seed=3):
    fam = lossfam.family(name)
    _, y = _draw(name, n=n, seed=seed)
    raw = np.random.default_rng(seed + 1).normal(0.0, 0.4, size=(n, fam.n_scores)) + fam.baseline(y)
    return fam, y, raw


@pytest.mark.parametrize("name", FAMILIES)
def test_direction_curvature_equals_the_separate_hooks(name):
    # a family may fuse the hooks (multinomial: one softmax); the numbers must not change
    fam, y, raw = _case(name, n=300)
    for curvature in CURVATURES:
        g, d = fam._direction_curvature(y, raw, curvature)
        if curvature == "natural":
            assert d is None
            np.testing.assert_array_equal(g, fam._natural_direction(y, raw))
            continue
        np.testing.assert_array_equal(g, fam._gradient(y, raw))
        ref = fam._newton_diagonal(y, raw) if curvature == "newton" else fam._fisher_diagonal(raw)
        np.testing.assert_array_equal(d, ref)


@pytest.mark.parametrize("name", FAMILIES)
@pytest.mark.parametrize("order", ["C", "F"])
@pytest.mark.parametrize("weighted", [False, True])
def test_buffers_equal_grad_hess_in_float32(name, order, weighted):
    fam, y, raw = _case(name)
    raw = np.asarray(raw, order=order)  # LightGBM hands an F-ordered view, XGBoost C-ordered float32
    w = None
    if weighted:
        w = np.random.default_rng(5).uniform(0.5, 2.0, size=y.size)
        w[::7] = 0.0
    for curvature in CURVATURES:
        grads = SeveralGradients(fam, curvature, order=order)
        grads.BLOCK_VALUES = 64 * fam.n_scores  # blocks of 64 rows, the last one short
        g_ref, h_ref = fam.grad_hess(y, raw, w, curvature=curvature)
        for _ in range(2):  # the second call reuses the buffers (the unit curvature is not rewritten)
            g, h = grads(y, raw, w)
            assert g.dtype == h.dtype == np.float32 and g.shape == h.shape == raw.shape
            assert g.flags[f"{order}_CONTIGUOUS"] and h.flags[f"{order}_CONTIGUOUS"]
            np.testing.assert_array_equal(g, g_ref.astype(np.float32), err_msg=f"{name} {curvature} gradient")
            np.testing.assert_array_equal(h, h_ref.astype(np.float32), err_msg=f"{name} {curvature} curvature")
        assert grads(y, raw, w)[0] is g  # one pair of buffers for the whole training
        if order == "F":  # what LightGBM does with a multi-score gradient: no copy
            assert np.shares_memory(g.ravel(order="F"), g)
        if order == "C":  # XGBoost's float32 margins are widened block by block
            r32 = raw.astype(np.float32)
            g_ref32, _ = fam.grad_hess(y, r32.astype(np.float64), w, curvature=curvature)
            np.testing.assert_array_equal(grads(y, r32, w)[0], g_ref32.astype(np.float32))


def test_a_gradient_that_ran_off_names_its_rows():
    fam = lossfam.family("gaussian_spread")
    rng = np.random.default_rng(9)
    y = rng.normal(size=500)
    raw = np.zeros((500, 2))
    raw[[3, 250, 499], 1] = -800.0  # sigma = e^-800: z^2 overflows
    for curvature in CURVATURES:
        grads = SeveralGradients(fam, curvature)
        grads.BLOCK_VALUES = 200
        with pytest.raises(ValueError, match=r"gaussian_spread: the gradient or curvature \(" + curvature
                           + r"\) is not finite and positive at 3 row\(s\) \(rows \[3, 250, 499\]\)"):
            grads(y, raw, None)
        # rows of zero weight count for nothing: gradient and curvature 0 there, no error
        w = np.ones(500)
        w[[3, 250, 499]] = 0.0
        g, h = grads(y, raw, w)
        assert np.all(g[[3, 250, 499]] == 0) and np.all(h[[3, 250, 499]] == 0)
        assert np.isfinite(g).all() and np.isfinite(h).all()
        g_ref, h_ref = fam.grad_hess(y[w > 0], raw[w > 0], curvature=curvature)
        np.testing.assert_array_equal(g[w > 0], g_ref.astype(np.float32))
        np.testing.assert_array_equal(h[w > 0], h_ref.astype(np.float32))
