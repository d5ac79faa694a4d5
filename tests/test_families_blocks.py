"""Kernels evaluated in row blocks (families._base.by_row_blocks) give the bits of one whole-array pass.

A block-wise kernel ``_fill_grad_hess`` runs the same numpy operations on each block of rows as it
would on the whole arrays; numpy's elementwise loops must then give identical bits, whatever the
block length, the position of a block in the arrays, or the strides of the inputs.
"""
import inspect

import numpy as np
import pytest

import lossfam
from lossfam.families._base import BLOCK_ROWS, by_row_blocks

SETTINGS = [
    ("tweedie", {}), ("tweedie", {"power": 1.2, "dispersion": 0.3}), ("tweedie", {"power": 1.9, "dispersion": 7.0}),
    ("negative_binomial", {}), ("negative_binomial", {"dispersion": 0.01}), ("negative_binomial", {"dispersion": 40.0}),
    ("bernoulli", {}), ("huber", {}), ("huber", {"delta": 0.5, "scale": 3.0}),
]


def draw(name, n, rng):
    raw = rng.normal(scale=4.0, size=n)
    raw[::97] *= 60.0  # some rows far out, where exp over- or underflows
    if name == "bernoulli":
        y = (rng.uniform(size=n) < 0.5).astype(float)
    elif name == "huber":
        y = raw + rng.standard_cauchy(n)
    else:
        y = np.floor(rng.gamma(0.5, 5.0, size=n)) * (rng.uniform(size=n) < 0.7)
    return y, raw


def scratch(fam):
    """How many work arrays the family's block kernel takes (after y, raw, gradient, Hessian)."""
    return len(inspect.signature(fam._fill_grad_hess).parameters) - 4


def one_pass(fam, y, raw):
    """The kernel's operations applied once to the whole arrays."""
    return by_row_blocks(fam._fill_grad_hess, (y, raw), n_out=2, n_scratch=scratch(fam), rows=y.size + 1)


@pytest.mark.parametrize("name, params", SETTINGS)
def test_block_wise_kernels_give_the_bits_of_one_pass(name, params, rng):
    fam = lossfam.family(name, **params)
    assert hasattr(fam, "_fill_grad_hess"), f"{name} no longer evaluates its kernel in blocks"
    for n in (1, 5, BLOCK_ROWS - 1, BLOCK_ROWS, 3 * BLOCK_ROWS + 17):
        y, raw = draw(name, n, rng)
        with np.errstate(all="ignore"):
            ref_g, ref_h = one_pass(fam, y, raw)
            for g, h in (fam._grad_hess(y, raw),  # the default block length
                         by_row_blocks(fam._fill_grad_hess, (y, raw), 2, scratch(fam), rows=7),
                         fam.grad_hess(y, raw)):  # the checked path
                np.testing.assert_array_equal(g, ref_g)
                np.testing.assert_array_equal(h, ref_h)


@pytest.mark.parametrize("name, params", SETTINGS[:1] + SETTINGS[3:4] + SETTINGS[6:8])
def test_block_wise_kernels_on_strided_and_float32_inputs(name, params, rng):
    fam = lossfam.family(name, **params)
    y, raw = draw(name, 2 * BLOCK_ROWS + 10, rng)
    yy, rr = np.repeat(y, 2)[::2], np.repeat(raw, 2)[::2]  # the same values as strided views
    assert not yy.flags.c_contiguous
    with np.errstate(all="ignore"):
        ref = one_pass(fam, y, raw)
        for a, b in zip(fam._grad_hess(yy, rr), ref):
            np.testing.assert_array_equal(a, b)
        # float32 inputs take one pass over the whole arrays, in numpy's result type
        y32, r32 = y.astype(np.float32), raw.astype(np.float32)
        out = fam._grad_hess(y32, r32)
        for a, b in zip(out, one_pass(fam, y32, r32)):
            np.testing.assert_array_equal(a, b)


def test_by_row_blocks_fills_fresh_arrays_from_each_block():
    rng = np.random.default_rng(4)
    x, w = rng.normal(size=1000), rng.normal(size=1000)
    calls = []

    def fill(x, w, out, work):
        calls.append(x.size)
        assert work.size == x.size
        np.multiply(x, w, out=work)
        np.add(work, 1.0, out=out)

    (out,) = by_row_blocks(fill, (x, w), n_out=1, n_scratch=1, rows=300)
    assert calls == [300, 300, 300, 100]
    np.testing.assert_array_equal(out, x * w + 1.0)
    assert not np.shares_memory(out, x) and not np.shares_memory(out, w)
