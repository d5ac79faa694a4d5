"""Property-based fuzz of every registered family over the whole float64 range of legal input.

Promises checked (hypothesis draws targets from each family's domain, raw
scores, weights and nuisance parameters anywhere in float64, subnormals
included):

* nll, grad_hess and deviance never return NaN, and raise no NumPy warning;
  where the true value exceeds float64 they return +-inf, otherwise finite;
* baseline and fit_nuisance return a finite answer or raise ValueError,
  promptly (hypothesis' deadline catches a hang);
* nothing raises anything but ValueError.

The default run draws 40 examples per family and property; ``-m slow`` 400.
"""
from __future__ import annotations

import dataclasses
import warnings

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import lossfam

FAMILIES = lossfam.available(scores="one")

FAST = settings(max_examples=40, deadline=2000, suppress_health_check=[HealthCheck.too_slow], derandomize=True)
SLOW = settings(max_examples=400, deadline=2000, suppress_health_check=[HealthCheck.too_slow], derandomize=True)

finite = st.floats(allow_nan=False, allow_infinity=False)
positive = st.floats(min_value=5e-324, allow_nan=False, allow_infinity=False)
count = st.one_of(st.integers(0, 10**6).map(float), st.floats(0, 1e308).map(np.floor))


def _target(fam):
    name = fam.target_domain.rule
    if fam.discrete and fam.name == "bernoulli" or name == "0 or 1":
        return st.sampled_from([0.0, 1.0])
    if name == "a non-negative integer" or (fam.nll_domain is not None and fam.nll_domain.rule == "a non-negative integer"):
        return count
    if name.startswith("finite and > 0"):
        return positive
    if name.startswith("finite and >= 0"):
        return st.one_of(positive, st.just(0.0))
    if name.startswith("strictly between 0 and 1"):
        return st.floats(min_value=5e-324, max_value=1.0, exclude_max=True)
    return finite


def _param(domain_rule):
    if domain_rule.startswith("strictly between 0 and 1"):
        return st.floats(min_value=1e-12, max_value=1 - 1e-12)
    if domain_rule.startswith("strictly between 1 and 2"):
        return st.floats(min_value=1.0, max_value=2.0, exclude_min=True, exclude_max=True)
    return st.floats(min_value=1e-300, max_value=1e300)


def _family(name):
    cls = type(lossfam.family(name))
    fields = [f.name for f in dataclasses.fields(cls)]
    doms = cls.param_domains
    return st.fixed_dictionaries({k: _param(doms[k].rule) for k in fields if k in doms}).map(lambda p: cls(**p))


@st.composite
def case(draw, name, n_max=6):
    fam = draw(_family(name))
    n = draw(st.integers(1, n_max))
    y = np.array(draw(st.lists(_target(fam), min_size=n, max_size=n)))
    raw = np.array(draw(st.lists(st.one_of(finite, st.floats(-50, 50)), min_size=n, max_size=n)))
    w = np.array(draw(st.lists(st.one_of(positive, st.floats(0.1, 10)), min_size=n, max_size=n)))
    return fam, y, raw, w


def _no_nan(*arrays):
    for a in arrays:
        assert not np.isnan(np.asarray(a)).any(), arrays


def _pointwise(fam, y, raw, w):
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        if fam.nll_domain is None or np.all(fam.nll_domain.inside(y)):
            _no_nan(fam.nll(y, raw))
        g, h = fam.grad_hess(y, raw, weight=w)
        _no_nan(g, h)
        assert np.all(h >= 0)
        d = fam.deviance(y, raw)
        _no_nan(d)
        assert np.all(d >= 0)


def _fits(fam, y, raw, w):
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        for call in (lambda: fam.baseline(y, w), lambda: fam.baseline(y, w, offset=raw)):
            try:
                c = call()
            except ValueError:
                continue
            assert np.isfinite(c)
        if fam.params:
            try:
                new = fam.fit_nuisance(y, raw, w)
            except ValueError:
                return
            assert all(np.isfinite(v) and v > 0 for v in new.params.values() if not isinstance(v, bool))


@pytest.mark.parametrize("name", FAMILIES)
def test_pointwise_math_never_gives_nan(name):
    FAST(given(case(name))(lambda c: _pointwise(*c)))()


@pytest.mark.parametrize("name", FAMILIES)
def test_baseline_and_nuisance_fits_are_finite_or_refused(name):
    FAST(given(case(name))(lambda c: _fits(*c)))()


@pytest.mark.slow
@pytest.mark.parametrize("name", FAMILIES)
def test_pointwise_math_never_gives_nan_long(name):
    SLOW(given(case(name, 40))(lambda c: _pointwise(*c)))()


@pytest.mark.slow
@pytest.mark.parametrize("name", FAMILIES)
def test_baseline_and_nuisance_fits_are_finite_or_refused_long(name):
    SLOW(given(case(name, 40))(lambda c: _fits(*c)))()
