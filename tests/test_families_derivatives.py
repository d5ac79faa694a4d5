"""Gradients and Hessians against finite differences of nll (property tests with hypothesis).

Each test draws arrays of up to 64 rows per example and runs 150 examples, so every family is
checked on several thousand (y, raw) cases.  The reference is a fourth-order central difference
(error O(step^4)) of the nll in the raw score; Hessians are differenced from the gradient.
Surrogate Hessians (laplace, asymmetric_laplace, huber outside its core) are checked positive and
finite instead, and huber's is checked exact inside its quadratic core.
"""
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

import lossfam
from lossfam.testing import finite_difference

SETTINGS = settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])

floats = dict(allow_nan=False, allow_infinity=False)
raw_identity = st.floats(-1e3, 1e3, **floats)
raw_log = st.floats(-30.0, 30.0, **floats)
raw_logit = st.floats(-35.0, 35.0, **floats)


def rows(elements, n):
    return hnp.arrays(np.float64, n, elements=elements)


@st.composite
def cases(draw, name):
    n = draw(st.integers(1, 64))
    if name == "bernoulli":
        raw = draw(rows(raw_logit, n))
        y = draw(rows(st.sampled_from([0.0, 1.0]), n))
    elif name == "poisson":
        raw = draw(rows(raw_log, n))
        y = draw(rows(st.integers(0, 10**6).map(float), n))
    elif name == "gamma":
        raw = draw(rows(raw_log, n))
        y = draw(rows(st.floats(1e-8, 1e8, **floats), n))
    else:
        raw = draw(rows(raw_identity, n))
        y = raw + draw(rows(st.floats(-50.0, 50.0, **floats), n))
    return y, raw


PARAMS = {
    "gaussian": [{}, {"scale": 0.3}, {"scale": 20.0}],
    "laplace": [{}, {"scale": 0.05}, {"scale": 9.0}],
    "asymmetric_laplace": [{"quantile": 0.1}, {"quantile": 0.5, "scale": 2.0}, {"quantile": 0.93, "scale": 0.2}],
    "huber": [{}, {"delta": 0.3, "scale": 2.0}, {"delta": 3.0, "scale": 0.5}],
    "bernoulli": [{}],
    "poisson": [{}],
    "gamma": [{}, {"shape": 0.4}, {"shape": 30.0}],
}


def _close(a, b, rtol=2e-6):
    return np.abs(a - b) <= rtol * np.maximum(np.abs(b), 1e-6 * np.maximum(1.0, np.abs(b)) + 1e-8)


@pytest.mark.parametrize("name,params", [(n, p) for n, ps in PARAMS.items() for p in ps])
def test_gradient_and_hessian_match_finite_differences(name, params):
    fam = lossfam.family(name, **params)

    @SETTINGS
    @given(cases(name))
    def check(case):
        y, raw = case
        g, h = fam.grad_hess(y, raw)
        assert g.dtype == h.dtype == np.float64 and np.all(np.isfinite(g)) and np.all(np.isfinite(h))
        step = 1e-3 * np.maximum(1.0, np.abs(raw)) if fam.link_function.name == "identity" else np.full_like(raw, 1e-3)
        scale_g = np.maximum(np.abs(g), 1.0 / params.get("scale", 1.0))
        r = np.abs(y - raw)
        if name in ("laplace", "asymmetric_laplace"):
            smooth = r > 3 * step
        elif name == "huber":
            smooth = np.abs(r / fam.scale - fam.delta) > 3 * step / fam.scale
        else:
            smooth = np.ones_like(y, dtype=bool)
        fd_g = finite_difference(lambda t: fam.nll(y, t) if name != "poisson" else _poisson_nll_any(fam, y, t), raw, step)
        # nll is a sum of terms as large as |nll|; the difference quotient carries their rounding error
        nll_size = np.abs(fam.nll(y, raw)) if name != "poisson" else np.abs(_poisson_nll_any(fam, y, raw))
        tol_g = 1e-6 * scale_g + 4e-15 * np.maximum(nll_size, 1.0) / step
        assert np.all(~smooth | (np.abs(g - fd_g) <= tol_g)), (y, raw, g, fd_g)
        if fam.exact_hessian:
            fd_h = finite_difference(lambda t: fam.grad_hess(y, t)[0], raw, step)
            tol_h = 1e-6 * np.maximum(np.abs(h), 1e-3 * scale_g) + 4e-15 * np.maximum(np.abs(g), 1.0) / step
            assert np.all(np.abs(h - fd_h) <= tol_h), (y, raw, h, fd_h)
        else:
            assert np.all(h > 0)
            if name == "huber":
                core = (r / fam.scale) < fam.delta * (1 - 1e-9)
                assert np.allclose(h[core], 1.0 / fam.scale**2, rtol=1e-12)
                fd_h = finite_difference(lambda t: fam.grad_hess(y, t)[0], raw, step)
                inner = core & smooth & (r / fam.scale < fam.delta - 3 * step / fam.scale)
                assert np.allclose(h[inner], fd_h[inner], rtol=1e-6)

    check()


def _poisson_nll_any(fam, y, raw):
    """Poisson nll without the integer check (the y-only lgamma term does not affect derivatives)."""
    return fam._nll(y, raw)


def test_surrogate_hessian_is_scale_aware():
    # Scaling y and raw by 1000 must scale the Newton step -g/h by 1000 (a unit Hessian would not).
    y = np.array([3.0, -1.0, 0.5, 10.0])
    raw = np.zeros(4)
    for name in ("laplace", "asymmetric_laplace", "huber"):
        fam = lossfam.family(name)
        g1, h1 = fam.grad_hess(y, raw)
        big = fam.with_params(scale=1000 * fam.scale)
        g2, h2 = big.grad_hess(1000 * y, raw)
        assert np.allclose(g2.sum() / h2.sum(), 1000 * g1.sum() / h1.sum(), rtol=1e-12), name


@pytest.mark.parametrize("name", ["laplace", "asymmetric_laplace", "huber"])
def test_surrogate_step_follows_the_target_units_at_fixed_scale(name):
    # At the default scale, residuals in the thousands give Newton steps in the thousands.
    fam = lossfam.family(name)
    y = np.array([3000.0, -1000.0, 500.0, 10000.0, 2500.0])
    g, h = fam.grad_hess(y, np.zeros(5))
    step = -g.sum() / h.sum()
    assert 100 < step < 10000
