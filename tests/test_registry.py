"""The registry: available(), family(), and registering a user family in one call."""
from dataclasses import dataclass

import numpy as np
import pytest
from scipy import stats

import lossfam
from lossfam.testing import verify_family
from user_families import LogisticErrors


def test_available_is_sorted_and_complete():
    names = lossfam.available(scores="one")
    assert names == sorted(names)
    assert set(names) >= {"gaussian", "laplace", "asymmetric_laplace", "huber", "bernoulli", "poisson", "gamma"}
    several = lossfam.available(scores="several")
    assert "gaussian_spread" in several and not set(several) & set(names)
    assert lossfam.available() == sorted(names + several)
    assert all(isinstance(lossfam.family(n), lossfam.SeveralScoreFamily) for n in several)
    with pytest.raises(ValueError, match="scores must be"):
        lossfam.available(scores="two")


@pytest.mark.parametrize("name", lossfam.available(scores="one"))
def test_family_objects(name):
    f = lossfam.family(name)
    assert f.name == name
    assert isinstance(f.params, dict)
    assert lossfam.family(f) is f
    assert f == lossfam.family(name, **f.params)  # frozen dataclasses compare by value
    with pytest.raises(Exception):
        f.name = "other"


def test_register_a_user_family(rng):
    lossfam.register(LogisticErrors)
    try:
        assert "logistic_errors_test" in lossfam.available(scores="one")
        f = lossfam.family("logistic_errors_test", scale=2.0)
        y = rng.logistic(1.0, 2.0, size=400)
        raw = np.full_like(y, 0.8)
        # outside reference: scipy.stats.logistic
        assert np.allclose(f.nll(y, raw), -stats.logistic.logpdf(y, loc=0.8, scale=2.0), rtol=1e-12)
        verify_family(f, y, raw + rng.normal(size=400), weight=rng.uniform(0.5, 2, 400))
        # generic baseline (Brent) and generic parameter fit (Nelder-Mead on log scale)
        c = f.baseline(y)
        assert abs(c - stats.logistic.fit(y, fscale=2.0)[0]) < 1e-4
        s = f.fit_nuisance(y, np.full_like(y, c)).scale
        assert abs(s - stats.logistic.fit(y, floc=c)[1]) < 1e-3
        with pytest.raises(ValueError, match="already registered"):
            lossfam.register(type("Other", (LogisticErrors,), {"name": "gaussian"}))
        with pytest.raises(ValueError, match="unknown parameter"):
            lossfam.family("logistic_errors_test", shape=1.0)
    finally:
        lossfam.unregister("logistic_errors_test")
    assert "logistic_errors_test" not in lossfam.available(scores="one")


def test_verify_family_catches_a_wrong_gradient(rng):
    @dataclass(frozen=True)
    class Broken(LogisticErrors):
        name = "broken_test"

        def _grad_hess(self, y, raw):
            g, h = super()._grad_hess(y, raw)
            return 1.1 * g, h

    y = rng.logistic(size=50)
    with pytest.raises(AssertionError, match="gradient != finite difference"):
        verify_family(Broken(), y, np.zeros(50))


def test_register_refuses_non_families():
    with pytest.raises(TypeError, match="subclass of lossfam.Family"):
        lossfam.register(dict)
