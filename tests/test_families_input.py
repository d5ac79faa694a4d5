"""Bad input raises ValueError naming the rows and the rule; legal extremes never give NaN."""
import re
import subprocess
import sys
import warnings

import numpy as np
import pytest

import lossfam

pytestmark = pytest.mark.filterwarnings("error")

# (family, y, message pattern): targets outside each family's support
BAD_TARGETS = [
    ("poisson", [1.0, -1.0, 2.0], r"poisson: y must be (finite and >= 0|a non-negative integer); 1 row outside, e\.g\. row \[1\] = \[-1\.0\]"),
    ("poisson", [1.0, 2.5, 3.0, 0.5], r"poisson: y must be a non-negative integer; 2 rows outside, e\.g\. rows \[1, 3\] = \[2\.5, 0\.5\]"),
    ("gamma", [1.0, 0.0, 2.0], r"gamma: y must be finite and > 0; 1 row outside, e\.g\. row \[1\] = \[0\.0\]"),
    ("gamma", [-3.0, 2.0], r"gamma: y must be finite and > 0.*row \[0\] = \[-3\.0\]"),
    ("bernoulli", [0.0, 1.0, 2.0, 0.5], r"bernoulli: y must be 0 or 1; 2 rows outside, e\.g\. rows \[2, 3\]"),
    ("gaussian", [0.0, np.nan, 1.0], r"gaussian: y must be a finite real number; 1 row outside, e\.g\. row \[1\] = \[nan\]"),
    ("laplace", [np.inf, 0.0], r"laplace: y must be a finite real number.*row \[0\] = \[inf\]"),
    ("huber", [0.0, -np.inf], r"huber: y must be a finite real number.*row \[1\]"),
    ("asymmetric_laplace", [np.nan] * 9, r"9 rows outside, e\.g\. rows \[0, 1, 2, 3, 4\]"),
]


@pytest.mark.parametrize("name,y,pattern", BAD_TARGETS)
def test_targets_outside_support_are_refused_by_nll(name, y, pattern):
    fam = lossfam.family(name)
    y = np.asarray(y)
    with pytest.raises(ValueError, match=pattern):
        fam.nll(y, np.zeros(y.shape))


@pytest.mark.parametrize("name,y,pattern", [c for c in BAD_TARGETS if "integer" not in c[2]])
@pytest.mark.parametrize("method", ["grad_hess", "deviance"])
def test_targets_outside_support_are_refused_by_derivatives(name, y, pattern, method):
    fam = lossfam.family(name)
    y = np.asarray(y)
    with pytest.raises(ValueError, match=pattern):
        getattr(fam, method)(y, np.zeros(y.shape))


@pytest.mark.parametrize("name,y,pattern", [c for c in BAD_TARGETS if "integer" not in c[2]])
def test_targets_outside_support_are_refused_by_baseline(name, y, pattern):
    with pytest.raises(ValueError, match=pattern):
        lossfam.family(name).baseline(np.asarray(y))


def test_poisson_rates_are_accepted_where_the_math_allows():
    f = lossfam.family("poisson")
    y = np.array([0.5, 2.25, 0.0])
    g, h = f.grad_hess(y, np.zeros(3), weight=np.array([2.0, 4.0, 1.0]))
    assert np.allclose(g, [1.0, -5.0, 1.0]) and np.allclose(h, [2.0, 4.0, 1.0])
    assert np.all(f.deviance(y, np.zeros(3)) >= 0)
    assert np.isclose(f.baseline(y, [2.0, 4.0, 1.0]), np.log((1.0 + 9.0) / 7.0))


def test_raw_nan_and_shape_mismatch():
    f = lossfam.family("gaussian")
    with pytest.raises(ValueError, match=r"gaussian: raw \(the raw score\) must be a finite real number; 1 row outside, e\.g\. row \[2\]"):
        f.nll(np.zeros(3), np.array([0.0, 1.0, np.nan]))
    with pytest.raises(ValueError, match=r"raw has shape \(2,\) but y has shape \(3,\)"):
        f.grad_hess(np.zeros(3), np.zeros(2))
    with pytest.raises(ValueError, match="y must be numeric"):
        f.nll(np.array(["a", "b"]), np.zeros(2))


def test_bad_weights():
    f = lossfam.family("poisson")
    y, raw = np.ones(4), np.zeros(4)
    with pytest.raises(ValueError, match=r"poisson: weight must be finite and >= 0; 1 row outside, e\.g\. row \[2\] = \[-1\.0\]"):
        f.grad_hess(y, raw, weight=[1.0, 1.0, -1.0, 1.0])
    with pytest.raises(ValueError, match=r"weight must be finite and >= 0.*row \[0\] = \[nan\]"):
        f.grad_hess(y, raw, weight=[np.nan, 1.0, 1.0, 1.0])
    with pytest.raises(ValueError, match=r"weight has shape \(3,\), which does not broadcast to y's shape \(4,\)"):
        f.grad_hess(y, raw, weight=np.ones(3))


def test_weight_broadcasts():
    f = lossfam.family("gamma", shape=2.0)
    y, raw = np.array([1.0, 2.0, 3.0]), np.array([0.1, 0.2, 0.3])
    g, h = f.grad_hess(y, raw)
    g2, h2 = f.grad_hess(y, raw, weight=2.5)
    assert np.allclose(g2, 2.5 * g) and np.allclose(h2, 2.5 * h)


@pytest.mark.parametrize("name,params,pattern", [
    ("gaussian", {"scale": 0.0}, r"gaussian: parameter scale must be finite and > 0, got 0\.0"),
    ("gaussian", {"scale": np.nan}, r"parameter scale must be finite and > 0, got nan"),
    ("asymmetric_laplace", {"quantile": 1.0}, r"parameter quantile must be strictly between 0 and 1, got 1\.0"),
    ("huber", {"delta": -1.0}, r"huber: parameter delta must be finite and > 0"),
    ("gamma", {"shape": "big"}, r"gamma: parameter shape must be a number, got 'big'"),
    ("gaussian", {"sigma": 2.0}, r"gaussian: unknown parameter\(s\) \['sigma'\]; valid parameters: scale"),
    ("poisson", {"scale": 2.0}, r"poisson: unknown parameter\(s\) \['scale'\]; valid parameters: none"),
    ("poison", {}, r"unknown family 'poison'; choose one of: " + re.escape(", ".join(lossfam.available()))),
])
def test_bad_family_construction(name, params, pattern):
    with pytest.raises(ValueError, match=pattern):
        lossfam.family(name, **params)


# ---------------------------------------------------------------------------- numerics at extremes
def test_logit_extremes_are_finite_and_accurate():
    f = lossfam.family("bernoulli")
    raw = np.array([-1e4, -800.0, -40.0, 40.0, 800.0, 1e4])
    for label in (0.0, 1.0):
        y = np.full(6, label)
        nll = f.nll(y, raw)
        g, h = f.grad_hess(y, raw)
        assert np.all(np.isfinite(nll)) and np.all(np.isfinite(g)) and np.all(np.isfinite(h))
        # wrong-side nll equals |raw| (log(1 + e^|raw|) = |raw| + log1p(e^-|raw|)), right side ~ e^-|raw|
        wrong = (raw > 0) if label == 0 else (raw < 0)
        assert np.allclose(nll[wrong], np.abs(raw[wrong]), rtol=1e-15)
        assert np.all(nll[~wrong] < 1e-17)
        assert np.allclose(np.abs(g[wrong]), 1.0) and np.all(np.abs(g[~wrong]) < 1e-17)


@pytest.mark.parametrize("name", ["poisson", "gamma"])
def test_log_link_finite_below_700_and_inf_beyond(name):
    f = lossfam.family(name)
    y = np.array([3.0, 3.0, 3.0, 3.0])
    raw = np.array([-699.9, 699.9, -5000.0, 5000.0])
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        nll = f.nll(y, raw)
        g, h = f.grad_hess(y, raw)
        dev = f.deviance(y, raw)
    assert np.all(np.isfinite(nll[:2])) and np.all(np.isfinite(g[:2])) and np.all(np.isfinite(h[:2]))
    for arr in (nll, h, dev):
        assert not np.any(np.isnan(arr))
    # beyond the representable mean the nll is +inf, not NaN
    big = 3 if name == "poisson" else 2  # poisson overflows at +5000, gamma at -5000
    assert nll[big] == np.inf and h[big] == np.inf
    assert np.isfinite(nll[5 - big])


@pytest.mark.parametrize("name", lossfam.available(scores="one"))
def test_float32_input_gives_float64(name):
    f = lossfam.family(name)
    raw = np.array([0.1, -0.2, 0.3, 0.0], dtype=np.float32)
    # targets inside the family's support: draws from its own predictive law
    y = np.asarray(f.distribution(raw.astype(float)).rvs(random_state=3), dtype=np.float32)
    for arr in (f.nll(y, raw), *f.grad_hess(y, raw, weight=np.float32(2.0)), f.deviance(y, raw)):
        assert arr.dtype == np.float64 and np.all(np.isfinite(arr))
    ref = f.nll(y.astype(np.float64), raw.astype(np.float64))
    assert np.array_equal(f.nll(y, raw), ref)


def test_grad_hess_does_not_modify_inputs():
    f = lossfam.family("poisson")
    y, raw, w = np.array([1.0, 2.0]), np.array([0.5, -0.5]), np.array([2.0, 3.0])
    copies = [a.copy() for a in (y, raw, w)]
    f.grad_hess(y, raw, w)
    assert all(np.array_equal(a, b) for a, b in zip((y, raw, w), copies))


# ---------------------------------------------------------------------------- links
@pytest.mark.parametrize("name", lossfam.available(scores="one"))
def test_link_round_trip(name, rng):
    f = lossfam.family(name)
    mu = f.link_function.inverse(rng.normal(size=20))  # predictions inside the link's domain
    assert np.allclose(f.inverse_link(f.link(mu)), mu, rtol=1e-13)


def test_link_refuses_predictions_outside_its_domain():
    with pytest.raises(ValueError, match=r"log link: the prediction must be finite and > 0; 1 row outside, e\.g\. row \[1\] = \[-2\.0\]"):
        lossfam.family("poisson").link([1.0, -2.0])
    with pytest.raises(ValueError, match=r"logit link: the prediction must be strictly between 0 and 1"):
        lossfam.family("bernoulli").link([1.0])


def test_core_imports_no_engine():
    code = ("import sys, lossfam; lossfam.family('poisson'); "
            "bad = [m for m in ('lightgbm', 'xgboost', 'sklearn', 'pandas', 'matplotlib', 'dask') if m in sys.modules]; "
            "print(bad); sys.exit(1 if bad else 0)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert out.returncode == 0, out.stdout + out.stderr
