"""Censored and interval targets: the target form, the censored nll / gradient / Hessian of every
family that declares tail pieces, the censored baseline and nuisance fits, and the weibull family.

Outside references: scipy.stats (logcdf / logsf / logpdf, weibull_min.fit), mpmath (tails where
scipy rounds), scipy.optimize (direct maximisation of the same likelihood written from scipy.stats).
"""
import re

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy import optimize, stats

import lossfam
from lossfam.censoring import IntervalTarget, interval_target, right_censored
from lossfam.testing import finite_difference

CENSORING = ["gaussian", "lognormal", "weibull", "gamma", "laplace", "student_t"]
POSITIVE = {"lognormal", "weibull", "gamma"}
PARAMS = {"gaussian": {"scale": 1.7}, "lognormal": {"scale": 0.6}, "weibull": {"shape": 1.8},
          "gamma": {"shape": 2.5}, "laplace": {"scale": 0.8}, "student_t": {"df": 3.0, "scale": 1.4}}
#: parameter values served by closed forms of their own in the censored kernel (integer gamma
#: shapes, integer student_t df; PARAMS' df = 3 is one too), and student_t at df = 2.5, which
#: keeps scipy's special functions: checked by the same tests as PARAMS
CLOSED_FORMS = {"gamma_k2": ("gamma", {"shape": 2.0}), "gamma_k7": ("gamma", {"shape": 7.0}),
                "student_t_df4": ("student_t", {"df": 4.0, "scale": 1.4}),
                "student_t_df2": ("student_t", {"df": 2.0, "scale": 0.7}),
                "student_t_df2.5": ("student_t", {"df": 2.5, "scale": 1.2})}


def family_for(key):
    """A family from a name of CENSORING (with PARAMS) or a key of CLOSED_FORMS."""
    if key in CLOSED_FORMS:
        name, params = CLOSED_FORMS[key]
        return lossfam.family(name, **params)
    return lossfam.family(key, **PARAMS[key])


def scipy_law(fam, raw):
    """The same law built from scipy.stats directly (not from fam.distribution)."""
    p = fam.params
    if fam.name == "gaussian":
        return stats.norm(raw, p["scale"])
    if fam.name == "lognormal":
        return stats.lognorm(s=p["scale"], scale=np.exp(raw))
    if fam.name == "weibull":
        return stats.weibull_min(c=p["shape"], scale=np.exp(raw))
    if fam.name == "gamma":
        return stats.gamma(a=p["shape"], scale=np.exp(raw) / p["shape"])
    if fam.name == "laplace":
        return stats.laplace(raw, p["scale"])
    if fam.name == "student_t":
        return stats.t(p["df"], raw, p["scale"])
    raise AssertionError(fam.name)


def reference_nll(fam, lo, hi, raw):
    """-log P(lo <= Y <= hi) (-log f for exact rows) from scipy.stats: logsf for right-censored rows,
    logcdf for left-censored rows, the difference of the sf or the cdf (whichever side is smaller)
    for closed intervals."""
    law = scipy_law(fam, raw)
    pos = fam.name in POSITIVE
    a = np.where(np.isfinite(lo), lo, 1.0)
    b = np.where(np.isfinite(hi), hi, 1.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        exact = -law.logpdf(a)
        right = -law.logsf(a)
        left = -law.logcdf(b)
        by_cdf = -np.log(law.cdf(b) - law.cdf(a))
        by_sf = -np.log(law.sf(a) - law.sf(b))
    closed = np.where(law.cdf(b) <= law.sf(a), by_cdf, by_sf)
    open_below = ~np.isfinite(lo) | (pos & (lo <= 0))
    return np.where(lo == hi, exact, np.where(~np.isfinite(hi), right, np.where(open_below, left, closed)))


def mixed_rows(fam, rng, n=40):
    """Exact, right-, left- and interval-censored rows around the law at raw."""
    raw = rng.normal(scale=0.4, size=n) + (0.5 if fam.name in POSITIVE else 0.0)
    y = scipy_law(fam, raw).rvs(random_state=rng)
    kind = np.arange(n) % 4
    lo, hi = y.copy(), y.copy()
    hi[kind == 1] = np.inf                       # right-censored at y
    lo[kind == 2] = 0.0 if fam.name in POSITIVE else -np.inf   # left-censored at y
    hi[kind == 3] = y[kind == 3] * 1.5 + 0.5 if fam.name in POSITIVE else y[kind == 3] + 1.0
    return interval_target(lo, hi), raw


# ---------------------------------------------------------------------------- the target form
@pytest.mark.parametrize("lower,upper,message", [
    ([1.0, np.nan], [1.0, 2.0], r"interval target: lower bound is NaN in 1 row, e\.g\. row \[1\] = \[nan\]"),
    ([1.0, 2.0], [np.nan, 3.0], r"upper bound is NaN in 1 row, e\.g\. row \[0\] = \[nan\]"),
    ([1.0, 5.0, 4.0], [2.0, 3.0, 1.0], r"lower > upper in 2 rows, e\.g\. rows \[1, 2\] = \[\(5\.0, 3\.0\), \(4\.0, 1\.0\)\]"),
    ([np.inf], [np.inf], r"lower bound is \+inf in 1 row"),
    ([-np.inf], [-np.inf], r"upper bound is -inf in 1 row"),
    ([1.0, 2.0], [3.0], r"lower has 2 rows but upper has 1"),
    ([[1.0]], [[2.0]], r"must be one-dimensional"),
])
def test_interval_target_refuses_bad_bounds(lower, upper, message):
    with pytest.raises(ValueError, match=message):
        interval_target(lower, upper)


def test_right_censored_layout():
    t = right_censored([2.0, 3.0, 5.0], [1, 0, True])
    assert np.array_equal(t.lower, [2.0, 3.0, 5.0])
    assert np.array_equal(t.upper, [2.0, np.inf, 5.0])
    assert np.array_equal(t.exact, [True, False, True])
    assert t.censored_fraction == pytest.approx(1 / 3)
    with pytest.raises(ValueError, match=r"event must be 0/1 or boolean; 1 row, e\.g\. row \[1\] = \[2\.0\]"):
        right_censored([1.0, 2.0], [1, 2])
    with pytest.raises(ValueError, match=r"time has shape \(2,\) but event has shape \(3,\)"):
        right_censored([1.0, 2.0], [1, 0, 1])


@pytest.mark.parametrize("name,lower,upper,message", [
    ("lognormal", [-1.0, 1.0], [2.0, 1.0], r"lognormal: a censored row's lower bound must be -inf or in \[0\.0, inf\) .*row \[0\] = \[-1\.0\]"),
    ("weibull", [1.0, 0.0], [2.0, 0.0], r"weibull: an exact row \(lower == upper\) must be finite and > 0; 1 row outside, e\.g\. row \[1\] = \[0\.0\]"),
    ("gamma", [-np.inf], [0.0], r"gamma: a censored row's upper bound must be \+inf or in \(0\.0, inf\]"),
    ("poisson", [1.0], [np.inf], r"poisson: this family has no censored likelihood"),
    ("beta", [0.2], [0.3], r"beta: this family has no censored likelihood"),
])
def test_family_refuses_bounds_outside_its_support(name, lower, upper, message):
    fam = lossfam.family(name)
    with pytest.raises(ValueError, match=message):
        fam.nll(interval_target(lower, upper), np.zeros(len(lower)))


def test_raw_must_match_the_rows():
    with pytest.raises(ValueError, match="raw has shape"):
        lossfam.family("gaussian").nll(interval_target([0.0, 1.0], [1.0, 2.0]), np.zeros(3))


# ---------------------------------------------------------------------------- nll against scipy.stats
@pytest.mark.parametrize("name", CENSORING)
def test_censored_nll_equals_scipy_tails_on_mixed_rows(rng, name):
    # outside reference: scipy.stats logpdf / logsf / logcdf of the same law, built separately
    fam = lossfam.family(name, **PARAMS[name])
    t, raw = mixed_rows(fam, rng)
    got = fam.nll(t, raw)
    ref = reference_nll(fam, t.lower, t.upper, raw)
    assert np.allclose(got, ref, rtol=1e-10, atol=1e-12), np.max(np.abs(got - ref))
    # exact rows reduce to today's nll, bit for bit
    ex = t.exact
    assert np.array_equal(got[ex], fam.nll(t.lower[ex], raw[ex]))
    g, h = fam.grad_hess(t, raw)
    g0, h0 = fam.grad_hess(t.lower[ex], raw[ex])
    assert np.array_equal(g[ex], g0) and np.array_equal(h[ex], h0)


def test_all_exact_target_is_todays_math(rng):
    fam = lossfam.family("weibull", shape=1.3)
    y = rng.weibull(1.3, 50) * 2.0
    raw = rng.normal(size=50)
    t = interval_target(y, y)
    assert np.array_equal(fam.nll(t, raw), fam.nll(y, raw))
    assert fam.baseline(t) == fam.baseline(y)
    assert fam.fit_nuisance(t, raw) == fam.fit_nuisance(y, raw)
    assert np.array_equal(fam.deviance(t, raw), fam.deviance(y, raw))


@pytest.mark.parametrize("name,bounds,raw", [
    # far tails where F or S rounds to 1 (the complement underflows): scipy's logsf / logcdf
    ("gaussian", (40.0, np.inf), 0.0), ("gaussian", (-np.inf, -40.0), 0.0), ("gaussian", (-np.inf, 40.0), 0.0),
    ("gaussian", (-1e3, np.inf), 0.0), ("gaussian", (38.0, 39.0), 0.0), ("gaussian", (-39.0, -38.0), 0.0),
    ("lognormal", (1e20, np.inf), 0.0), ("lognormal", (0.0, 1e-20), 0.0),
    ("weibull", (1e3, np.inf), 0.0), ("weibull", (30.0, 31.0), 0.0),
    ("student_t", (1e8, np.inf), 0.0), ("student_t", (-np.inf, -1e8), 0.0),
    ("laplace", (200.0, np.inf), 0.0), ("laplace", (-np.inf, -200.0), 0.0), ("laplace", (-np.inf, 200.0), 0.0),
])
def test_censored_nll_far_in_the_tails(name, bounds, raw):
    fam = lossfam.family(name, **PARAMS[name])
    lo, hi = np.array([bounds[0]]), np.array([bounds[1]])
    got = fam.nll(interval_target(lo, hi), np.array([raw]))
    if np.isfinite(lo[0]) and lo[0] > 0 and np.isfinite(hi[0]) and lo[0] != -np.inf and (name not in POSITIVE or lo[0] > 0):
        # a closed interval in a far tail: log S(lo) + log(1 - e^(log S(hi) - log S(lo))) from scipy's logsf
        law = scipy_law(fam, np.array([raw]))
        a, b = law.logsf(lo)[0], law.logsf(hi)[0]
        ref = -(a + np.log(-np.expm1(b - a)))
    elif np.isfinite(lo[0]) and lo[0] < 0 and np.isfinite(hi[0]):
        law = scipy_law(fam, np.array([raw]))
        a, b = law.logcdf(hi)[0], law.logcdf(lo)[0]
        ref = -(a + np.log(-np.expm1(b - a)))
    else:
        ref = reference_nll(fam, lo, hi, np.array([raw]))[0]
    assert np.isfinite(got[0]) and np.isfinite(ref)
    assert got[0] == pytest.approx(ref, rel=1e-10, abs=1e-12)
    g, h = fam.grad_hess(interval_target(lo, hi), np.array([raw]))
    assert np.isfinite(g[0]) and np.isfinite(h[0]) and h[0] >= 0  # 0 where P rounds to 1 (g = 0 too)


@pytest.mark.parametrize("name,v,raw", [("gamma", 1e-150, 0.0), ("gamma", 3000.0, 0.0), ("gamma", 1e-3, 0.0),
                                        ("weibull", 1e-150, 0.0), ("weibull", 1e-3, 1.0)])
def test_tails_where_scipy_rounds_against_mpmath(name, v, raw):
    # outside reference: mpmath at 50 digits (scipy's gamma logcdf / logsf and weibull_min logcdf
    # return -inf or lose digits there)
    mpmath = pytest.importorskip("mpmath")
    mpmath.mp.dps = 50
    fam = lossfam.family(name, **PARAMS[name])
    vv = mpmath.mpf(v)
    if name == "gamma":
        k = mpmath.mpf(PARAMS[name]["shape"])
        x = k * vv / mpmath.e ** raw
        log_f = mpmath.log(mpmath.gammainc(k, 0, x, regularized=True))
        log_s = mpmath.log(mpmath.gammainc(k, x, mpmath.inf, regularized=True))
    else:
        k = mpmath.mpf(PARAMS[name]["shape"])
        t = (vv / mpmath.e ** raw) ** k
        log_f, log_s = mpmath.log(-mpmath.expm1(-t)), -t
    left = fam.nll(interval_target([-np.inf], [v]), np.array([raw]))[0]
    right = fam.nll(interval_target([v], [np.inf]), np.array([raw]))[0]
    assert left == pytest.approx(-float(log_f), rel=1e-12, abs=1e-300)
    assert right == pytest.approx(-float(log_s), rel=1e-12, abs=1e-300)


# ---------------------------------------------------------------------------- derivatives
@st.composite
def censored_case(draw, name):
    n = draw(st.integers(1, 12))
    pos = name in POSITIVE
    raw = np.array(draw(st.lists(st.floats(-3.0, 3.0), min_size=n, max_size=n)))
    centre = np.array(draw(st.lists(st.floats(-6.0, 6.0), min_size=n, max_size=n)))
    width = np.array(draw(st.lists(st.floats(1e-3, 5.0), min_size=n, max_size=n)))
    kind = np.array(draw(st.lists(st.integers(0, 3), min_size=n, max_size=n)))
    lo = raw + centre
    hi = lo + width
    lo = np.where(kind == 1, -np.inf, lo)
    hi = np.where(kind == 2, np.inf, hi)
    hi = np.where(kind == 3, lo, hi)
    lo = np.where(np.isneginf(lo) & (kind == 3), raw, lo)
    if pos:  # the same construction on log y
        lo, hi = np.exp(lo), np.exp(hi)
    return interval_target(lo, np.maximum(hi, lo)), raw


@pytest.mark.parametrize("key", CENSORING + list(CLOSED_FORMS))
def test_censored_gradient_and_hessian_match_finite_differences(key):
    fam = family_for(key)
    name = fam.name

    @settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
    @given(censored_case(name))
    def check(case):
        t, raw = case
        step = 1e-4
        g, h = fam.grad_hess(t, raw)
        assert np.all(np.isfinite(g)) and np.all(np.isfinite(h)) and np.all(h >= 0)
        c = ~t.exact
        if not c.any():
            return
        if name == "laplace":  # kinks where a bound meets raw: compare away from them
            smooth = np.ones(t.size, bool)
            for b in (t.lower, t.upper):
                smooth &= ~(np.abs(b - raw) < 4 * step)
            c &= smooth
        fd_g = finite_difference(lambda r: fam.nll(t, r), raw, step)
        nll = fam.nll(t, raw)
        tol = 1e-6 * np.maximum(np.abs(g), 1.0) + 1e-13 * np.maximum(np.abs(nll), 1.0) / step
        assert np.all(~c | (np.abs(g - fd_g) <= tol)), (t.lower, t.upper, raw, g, fd_g)
        fd_h = finite_difference(lambda r: fam.grad_hess(t, r)[0], raw, step)
        exact = c & (fd_h > 1e-6 * np.maximum(g * g, 1e-3))
        tol = 1e-5 * np.maximum(np.abs(h), 1.0) + 1e-13 * np.maximum(np.abs(g), 1.0) / step
        assert np.all(~exact | (np.abs(h - fd_h) <= tol)), (t.lower, t.upper, raw, h, fd_h)
        # the surrogate where the exact curvature is not positive: the squared score
        flat = c & (fd_h < -1e-6 * np.maximum(g * g, 1e-3))
        assert np.allclose(h[flat], g[flat] ** 2, rtol=1e-12)

    check()


def test_log_concave_families_keep_the_exact_hessian_where_a_quadratic_floor_would_not():
    # gaussian right-censored far beyond the prediction: h -> 1/s^2 while g^2 grows like z^2
    fam = lossfam.family("gaussian")
    t = interval_target([30.0], [np.inf])
    g, h = fam.grad_hess(t, np.zeros(1))
    fd_h = finite_difference(lambda r: fam.grad_hess(t, r)[0], np.zeros(1), 1e-4)
    assert h[0] == pytest.approx(fd_h[0], rel=1e-5) and h[0] < 1.01 and g[0] ** 2 > 800


# ---------------------------------------------------------------------------- baseline and nuisance fits
@pytest.mark.parametrize("name", CENSORING)
def test_censored_baseline_and_nuisance_match_direct_maximisation(rng, name):
    # outside reference: scipy.optimize on -sum w log P written from scipy.stats (reference_nll)
    fam = lossfam.family(name, **PARAMS[name])
    t, raw = mixed_rows(fam, rng, n=60)
    w = rng.uniform(0.5, 2.0, t.size)
    c = fam.baseline(t, w)
    ref = optimize.minimize_scalar(lambda v: np.dot(w, reference_nll(fam, t.lower, t.upper, np.full(t.size, v))),
                                   bracket=(c - 0.3, c + 0.3), tol=1e-12).x
    assert c == pytest.approx(ref, abs=1e-7)
    key = fam.censored_fit[0]
    fitted = fam.fit_nuisance(t, raw, w).params[key]

    def objective(log_p):
        f2 = fam.with_params(**{key: float(np.exp(log_p))})
        return np.dot(w, reference_nll(f2, t.lower, t.upper, raw))

    ref = np.exp(optimize.minimize_scalar(objective, bracket=(np.log(fitted) - 0.2, np.log(fitted) + 0.2), tol=1e-12).x)
    assert fitted == pytest.approx(ref, rel=1e-6)


def test_exponential_rate_is_events_over_time_at_risk(rng):
    # textbook closed form: for exponential lifetimes with right-censoring, the maximum-likelihood
    # rate is (number of events) / (total time at risk) (e.g. Lawless, Statistical Models and
    # Methods for Lifetime Data, 2nd ed. 2003, section 2.2; recalled from memory)
    time = rng.exponential(3.0, 500)
    cut = rng.uniform(1.0, 6.0, 500)
    event = time <= cut
    obs = np.minimum(time, cut)
    t = right_censored(obs, event)
    c = lossfam.family("weibull", shape=1.0).baseline(t)
    rate = event.sum() / obs.sum()
    assert np.exp(-c) == pytest.approx(rate, rel=1e-10)


def test_all_right_censored_has_no_finite_baseline():
    with pytest.raises(ValueError, match="no finite constant raw score"):
        lossfam.family("weibull").baseline(right_censored([1.0, 2.0], [0, 0]))


def test_deviance_of_censored_rows_is_refused():
    with pytest.raises(ValueError, match="unit deviance is not defined for censored rows"):
        lossfam.family("gaussian").deviance(right_censored([1.0, 2.0], [1, 0]), np.zeros(2))


# ---------------------------------------------------------------------------- weibull, exact rows
def test_weibull_nll_is_scipy_weibull_min(rng):
    # outside reference: scipy.stats.weibull_min(c = k, scale = e^raw)
    for k in (0.4, 1.0, 3.5):
        fam = lossfam.family("weibull", shape=k)
        raw = rng.normal(size=100)
        y = stats.weibull_min(k, scale=np.exp(raw)).rvs(random_state=rng)
        assert np.allclose(fam.nll(y, raw), -stats.weibull_min.logpdf(y, k, scale=np.exp(raw)), rtol=1e-12)


def test_weibull_fits_match_scipy_fit(rng):
    # outside reference: scipy.stats.weibull_min.fit with the other parameter fixed
    y = stats.weibull_min(1.7, scale=4.0).rvs(2000, random_state=rng)
    fam = lossfam.family("weibull", shape=1.7)
    c = fam.baseline(y)
    _, _, scale = stats.weibull_min.fit(y, f0=1.7, floc=0)
    # scipy's optimiser stops within ~5e-6 of the closed form (mean y^k)^(1/k), whose nll is lower
    assert np.exp(c) == pytest.approx(scale, rel=1e-5)
    assert np.exp(c) == pytest.approx(np.mean(y ** 1.7) ** (1 / 1.7), rel=1e-12)
    k = fam.fit_nuisance(y, np.full_like(y, np.log(4.0))).shape
    k_fit, _, _ = stats.weibull_min.fit(y, floc=0, fscale=4.0)
    assert k == pytest.approx(k_fit, rel=1e-4)  # scipy's fit stops early (2e-5 here)
    # the same likelihood from scipy.stats, maximised with a tight tolerance
    k_ref = np.exp(optimize.minimize_scalar(lambda t: -stats.weibull_min.logpdf(y, np.exp(t), scale=4.0).sum(),
                                            bracket=(0.0, 1.0), tol=1e-12).x)
    assert k == pytest.approx(k_ref, rel=1e-7)
    with pytest.raises(ValueError, match="every log residual is zero"):
        fam.fit_nuisance(np.array([2.0, 2.0]), np.log([2.0, 2.0]))


# ---------------------------------------------------------------------------- a user family
def test_a_user_family_gets_the_censored_likelihood_from_its_tail_pieces(rng):
    # the generic censored math needs only the declared pieces: logistic errors, whose log tails
    # are log_expit(+-z) (outside reference: scipy.stats.logistic logcdf / logsf)
    from dataclasses import dataclass

    from scipy.special import expit, log_expit
    from user_families import LogisticErrors

    from lossfam.families._censored import location_scale_pieces

    @dataclass(frozen=True)
    class CensoredLogistic(LogisticErrors):
        name = "censored_logistic_test"
        support_edges = (-np.inf, np.inf)
        censored_fit = ("scale",)

        def _tail_pieces(self, v, raw):
            return location_scale_pieces((v - raw) / self.scale, self.scale, log_expit, lambda z: log_expit(-z),
                                         lambda z: log_expit(z) + log_expit(-z), lambda z: 1.0 - 2.0 * expit(z))

    fam = CensoredLogistic(scale=1.5)
    raw = rng.normal(size=30)
    y = stats.logistic(raw, 1.5).rvs(random_state=rng)
    kind = np.arange(30) % 3                               # 0 exact, 1 left-, 2 right-censored at y
    lo = np.where(kind == 1, -np.inf, y)
    hi = np.where(kind == 2, np.inf, y)
    t = interval_target(lo, hi)
    law = stats.logistic(raw, 1.5)
    ref = np.where(t.exact, -law.logpdf(y), np.where(np.isinf(hi), -law.logsf(np.where(np.isinf(lo), 0.0, lo)),
                                                     -law.logcdf(hi)))
    assert np.allclose(fam.nll(t, raw), ref, rtol=1e-12)
    g, h = fam.grad_hess(t, raw)
    assert np.allclose(g, finite_difference(lambda r: fam.nll(t, r), raw, 1e-4), rtol=1e-6, atol=1e-9)
    assert np.allclose(h, finite_difference(lambda r: fam.grad_hess(t, r)[0], raw, 1e-4), rtol=1e-5, atol=1e-9)
    assert np.isfinite(fam.baseline(t)) and fam.fit_nuisance(t, raw).scale > 0


# ---------------------------------------------------------------------------- the fast kernel
@pytest.mark.parametrize("key", CENSORING + ["gamma_k1"] + list(CLOSED_FORMS))
def test_fast_kernel_agrees_with_the_log_space_terms(key):
    # the linear-space formulas (TailLaw) and the log-space pieces are two writings of the same
    # derivatives: they must agree row by row, from the bulk to far tails, on every kind of row
    from lossfam.families._censored import _grad_hess_log_space, censored_grad_hess

    fam = lossfam.family("gamma", shape=1.0) if key == "gamma_k1" else family_for(key)
    name = fam.name
    pos = fam.support_edges[0] == 0
    z = np.concatenate([np.linspace(-12.0, 12.0, 97), [-40.0, -30.0, -8.0, 8.0, 30.0, 40.0]])
    if name == "student_t":
        z = np.concatenate([z, [-1e6, 1e6]])
    raw = np.zeros(z.size) + (0.3 if pos else 0.0)
    v = raw + z
    lo_open = 0.0 if pos else -np.inf
    lo = np.concatenate([v, np.full(z.size, lo_open), v, v])
    hi = np.concatenate([np.full(z.size, np.inf), v, v + 0.7, v])
    if pos:
        lo = np.where(lo == 0.0, 0.0, np.exp(lo))
        hi = np.exp(hi)
    t = interval_target(lo, hi)
    r4 = np.tile(raw, 4)
    with np.errstate(all="ignore"):
        g, h = censored_grad_hess(fam, t, r4)
        g0, h0 = _grad_hess_log_space(fam, t, r4)
    assert np.all(np.isfinite(g)) and np.all(np.isfinite(h)) and np.all(h >= 0)
    # the log-space terms lose about eps * nll of relative accuracy (exp(log D - log P) with both
    # logs of the size of the nll): compare where that is below 1e-13, i.e. nll < 1e3; the Hessian
    # is a difference of terms of the size of g^2 in both writings, so it is compared to that size
    nll = fam.nll(t, r4)
    trusted = nll < 1e3
    # a closed interval's P is a difference of tails: both writings lose eps times the condition
    # number (larger tail) / P of that difference (1e6 on student_t's (1e6, 1e6 + 0.7))
    law = scipy_law(fam, r4)
    with np.errstate(all="ignore"):
        log_big = np.minimum(law.logsf(np.where(np.isfinite(lo), lo, 1.0)),
                             law.logcdf(np.where(np.isfinite(hi), hi, 1.0)))
        cond = np.where(np.isfinite(lo) & np.isfinite(hi) & (lo < hi) & (lo > 0 if pos else True),
                        np.exp(np.minimum(log_big + nll, 700.0)), 1.0)
    ok_g = (np.abs(g - g0) <= (1e-9 + 64 * np.finfo(float).eps * cond) * np.abs(g0) + 1e-300) | ~trusted
    ok_h = (np.abs(h - h0) <= 1e-7 * np.abs(h0) + 1e-11 * g0 * g0) | ~trusted
    # where the log-space Hessian is lost to cancellation it takes the surrogate g^2; the linear
    # space keeps the exact value there: check it against finite differences of the gradient
    if name == "laplace":  # a bound at raw sits on the density's kink: no second derivative there
        ok_h |= (lo == r4) | (hi == r4)
    took = trusted & ~ok_h & (h0 == g0 * g0) & (h < h0)
    step = 1e-4
    with np.errstate(all="ignore"):
        fd_h = finite_difference(lambda r: censored_grad_hess(fam, t, r)[0], r4, step)
    ok_h |= took & (np.abs(h - fd_h) <= 1e-5 * h + 1e-13 * np.maximum(np.abs(g), 1.0) / step)
    assert ok_g.all(), (name, lo[~ok_g], hi[~ok_g], g[~ok_g], g0[~ok_g])
    assert ok_h.all(), (name, lo[~ok_h], hi[~ok_h], h[~ok_h], h0[~ok_h])


def test_normal_hazard_continued_fraction_against_mpmath():
    # outside reference: mpmath at 50 digits, r = phi(z) / Phi(-z) and r - z
    mpmath = pytest.importorskip("mpmath")
    mpmath.mp.dps = 50
    from lossfam.families._censored import NORMAL

    z = np.array([-30.0, -3.0, 0.0, 2.0, 4.9, 5.1, 12.0, 37.0, 1e3, 1e8])
    with np.errstate(all="ignore"):
        r, c = NORMAL.right(z)
    for zi, ri, ci in zip(z, r, c):
        zz = mpmath.mpf(zi)
        rr = mpmath.npdf(zz) / mpmath.ncdf(-zz)
        assert ri == pytest.approx(float(rr), rel=1e-14, abs=1e-300)
        assert ci == pytest.approx(float(rr - zz), rel=1e-12)


def test_extreme_value_left_ratio_against_mpmath():
    # outside reference: mpmath at 50 digits, q = f0 / F0 and q - psi for the minimum extreme-value law
    mpmath = pytest.importorskip("mpmath")
    mpmath.mp.dps = 50
    from lossfam.families.weibull import EXTREME_VALUE

    z = np.array([-700.0, -30.0, -5.0, -4.7, -4.5, 0.0, 3.0, 6.5, 6.6])
    with np.errstate(all="ignore"):
        q, c = EXTREME_VALUE.left(z)
    for zi, qi, ci in zip(z, q, c):
        x = mpmath.mpf(float(np.exp(zi)))  # the same x = e^z as float64 (its rounding is not the law's)
        qq = x * mpmath.e ** (-x) / -mpmath.expm1(-x)
        assert qi == pytest.approx(float(qq), rel=1e-14, abs=1e-300)
        assert ci == pytest.approx(float(qq - 1 + x), rel=1e-13)


# ---------------------------------------------------------------------------- closed forms of the tails
def _gamma_z_law(k, z):
    """(S0, F0, f0) of z = log(G / k), G ~ Gamma(k, 1), from scipy.stats.gamma (logs exponentiated)."""
    x = k * np.exp(z)
    law = stats.gamma(k)
    log_f0 = law.logpdf(x) + np.log(x)
    return np.exp(law.logsf(x)), np.exp(law.logcdf(x)), np.exp(log_f0), law.logsf(x), law.logcdf(x), log_f0


@pytest.mark.parametrize("k", [2.0, 3.0, 7.0, 30.0])
def test_integer_gamma_tails_against_scipy(k):
    # outside reference: scipy.stats.gamma logsf / logcdf / logpdf at x = k e^z, from the lower
    # tail where F rounds to 0 (the series) to the upper tail where F rounds to 1
    from lossfam.families.gamma import IntegerGammaLaw

    law = IntegerGammaLaw(k)
    z = np.concatenate([np.linspace(-30.0, 4.0, 341), [np.log(law.x0 / k) + d for d in (-1e-9, 0.0, 1e-9)]])
    s0, f0_cdf, f0, log_s, log_f, log_pdf = _gamma_z_law(k, z)
    upper = np.arange(z.size) % 2 == 0
    with np.errstate(all="ignore"):
        tail, pdf = law.tail_pdf(z, upper)
        r, c_right = law.right(z)
        q, c_left = law.left(z)
    ok = pdf > 1e-300
    assert np.allclose(pdf[ok], f0[ok], rtol=1e-12, atol=0)
    ref = np.where(upper, s0, f0_cdf)
    ok = ref > 1e-280
    assert np.allclose(tail[ok], ref[ok], rtol=1e-12, atol=0)
    # the hazard and the reversed hazard against exp of scipy's log differences
    with np.errstate(all="ignore"):
        r_ref = np.exp(log_pdf - log_s)
        q_ref = np.exp(log_pdf - log_f)
    ok = np.isfinite(log_s) & np.isfinite(log_pdf) & (r_ref > 1e-300)
    assert ok.sum() > 200
    assert np.allclose(r[ok], r_ref[ok], rtol=1e-10, atol=0)
    ok = np.isfinite(log_f) & np.isfinite(log_pdf) & (q_ref > 1e-300)
    assert ok.sum() > 200
    assert np.allclose(q[ok], q_ref[ok], rtol=1e-10, atol=0)


@pytest.mark.parametrize("k", [2.0, 7.0])
def test_integer_gamma_curvature_terms_against_mpmath(k):
    # outside reference: mpmath at 50 digits, r + psi and q - psi (psi = k - x) from the regularised
    # incomplete gamma functions; these are differences of close terms in float64
    mpmath = pytest.importorskip("mpmath")
    mpmath.mp.dps = 50
    from lossfam.families.gamma import IntegerGammaLaw

    law = IntegerGammaLaw(k)
    z = np.array([-40.0, -12.0, -3.0, np.log(law.x0 / k) - 1e-9, np.log(law.x0 / k), -0.2, 0.0, 0.5, 2.0, 4.0, 25.0])
    with np.errstate(all="ignore"):
        r, c_right = law.right(z)
        q, c_left = law.left(z)
    kk = mpmath.mpf(k)
    for i, zi in enumerate(z):
        x = kk * mpmath.e ** mpmath.mpf(zi)
        f0 = x ** kk * mpmath.e ** (-x) / mpmath.gamma(kk)
        s0 = mpmath.gammainc(kk, x, mpmath.inf, regularized=True)
        f_0 = mpmath.gammainc(kk, 0, x, regularized=True)
        assert c_right[i] == pytest.approx(float(f0 / s0 + kk - x), rel=1e-12), zi
        if zi < 5:  # beyond, q underflows and c = x - k
            assert c_left[i] == pytest.approx(float(f0 / f_0 - kk + x), rel=1e-11), zi
    assert np.all(np.isfinite(r[:-1])) and np.all(np.isfinite(q)) and np.all(np.isfinite(c_left))
    # right-censored where x = k e^z is near the top of float64: r = x - (k - 1) + O(1/x) = x
    # in float64 (the asymptotic of the hazard), finite, c -> 1
    r, c = law.right(np.array([700.0]))
    assert r[0] == pytest.approx(k * np.exp(700.0), rel=1e-13) and c[0] == pytest.approx(1.0, rel=1e-13)


@pytest.mark.parametrize("df", [1.0, 2.0, 3.0, 4.0, 5.0, 9.0, 10.0, 60.0])
def test_integer_df_student_t_tails_against_scipy(df):
    # outside reference: scipy.stats.t logsf / logcdf / logpdf, from the bulk to |z| = 1e6 where
    # F rounds to 1 (compared through logsf / logcdf, never 1 - cdf)
    from lossfam.families.student_t import EvenStudentTTails, OddStudentTTails

    law = (EvenStudentTTails if df % 2 == 0 else OddStudentTTails)(df)
    assert type(lossfam.family("student_t", df=df)._tail_law()[0]) is type(law)
    z = np.concatenate([np.linspace(-60.0, 60.0, 481), [-1e6, -1e3, 1e3, 1e6]])
    ref = stats.t(df)
    upper = np.arange(z.size) % 2 == 0
    with np.errstate(all="ignore"):
        tail, pdf = law.tail_pdf(z, upper)
        r, c = law.right(z)
    log_tail = np.where(upper, ref.logsf(z), ref.logcdf(z))
    ok = log_tail > np.log(1e-300)
    assert np.allclose(np.log(tail[ok]), log_tail[ok], rtol=0, atol=1e-10)
    ok = pdf > 1e-300
    assert np.allclose(np.log(pdf[ok]), ref.logpdf(z[ok]), rtol=0, atol=1e-10)
    r_ref = np.exp(ref.logpdf(z) - ref.logsf(z))
    ok = r_ref > 1e-300
    assert ok.sum() > 400
    assert np.allclose(r[ok], r_ref[ok], rtol=1e-10, atol=0)
    # c = r + psi where it is kept (else 0: the surrogate), against the same reference
    psi = -(df + 1.0) * z / (df + z * z)
    c_ref = r_ref + psi
    size = r_ref + np.abs(psi)  # c is a difference of terms of this size: compared to it
    kept = (c > 0) & ok
    assert np.all(np.abs(c[kept] - c_ref[kept]) <= 1e-10 * np.abs(c_ref[kept]) + 1e-13 * size[kept])
    dropped = (c == 0) & ok
    assert np.all(c_ref[dropped] <= 1e-8 * size[dropped])


def test_closed_forms_serve_the_declared_parameters_only():
    # the closed forms are chosen from the family's own parameter: integer gamma shapes from 2,
    # even student_t df up to 60, odd up to 9; other values keep scipy's special functions
    from lossfam.families.gamma import IntegerGammaLaw
    from lossfam.families.student_t import EvenStudentTTails
    from lossfam.families.weibull import EXTREME_VALUE

    assert isinstance(lossfam.family("gamma", shape=3.0)._tail_law()[0], IntegerGammaLaw)
    assert not isinstance(lossfam.family("gamma", shape=2.5)._tail_law()[0], IntegerGammaLaw)
    assert lossfam.family("gamma", shape=1.0)._tail_law()[0] is EXTREME_VALUE
    from lossfam.families.student_t import OddStudentTTails

    assert isinstance(lossfam.family("student_t", df=4.0)._tail_law()[0], EvenStudentTTails)
    assert isinstance(lossfam.family("student_t", df=3.0)._tail_law()[0], OddStudentTTails)
    for df in (4.5, 0.5, 62.0, 11.0, 59.0):
        assert type(lossfam.family("student_t", df=df)._tail_law()[0]).__name__ == "StudentTTails"


# ---------------------------------------------------------------------------- no NaN far in the tails
def _censoring_families():
    from lossfam.families._censored import _has_pieces
    out = []
    for name in lossfam.available(scores="one"):
        fam = lossfam.family(name)
        if fam.support_edges is not None and _has_pieces(fam):
            out.append(name)
    return out


#: every continuous one-score family with a censored likelihood
ALL_CENSORING = _censoring_families()


@st.composite
def far_case(draw, name):
    """A family of ``name`` (parameters from 0.1 to 10, integers 1 to 7 included: the closed forms),
    raw scores over +-1e3 (log links) or up to +-1e300 (identity links), and exact, right-, left-
    and interval-censored rows with bounds anywhere in the support, far tails and tiny values
    included."""
    cls = type(lossfam.family(name))
    params = {k: draw(st.one_of(st.floats(0.1, 10.0), st.integers(1, 7).map(float)))
              for k in cls.param_domains}
    fam = cls(**params)
    pos = fam.support_edges[0] == 0
    n = draw(st.integers(1, 8))
    if pos:
        mag = st.floats(-323.0, 307.0).map(lambda u: 10.0 ** u)
        point = st.one_of(mag, st.floats(1e-3, 1e3), st.sampled_from([5e-324, 1e-300, 1e300, 1.7e308]))
        score = st.floats(-1e3, 1e3)
    else:
        mag = st.tuples(st.sampled_from([-1.0, 1.0]), st.floats(-300.0, 300.0)).map(lambda p: p[0] * 10.0 ** p[1])
        point = st.one_of(mag, st.floats(-1e3, 1e3), st.sampled_from([-1.7e308, 1.7e308, 0.0]))
        score = st.one_of(st.floats(-1e3, 1e3), mag)
    a = np.array(draw(st.lists(point, min_size=n, max_size=n)))
    b = np.array(draw(st.lists(point, min_size=n, max_size=n)))
    raw = np.array(draw(st.lists(score, min_size=n, max_size=n)))
    kind = np.array(draw(st.lists(st.integers(0, 3), min_size=n, max_size=n)))
    lo, hi = np.minimum(a, b), np.maximum(a, b)
    open_lo = 0.0 if pos else -np.inf
    lo = np.where(kind == 1, open_lo, np.where(kind == 3, a, lo))
    hi = np.where(kind == 2, np.inf, np.where(kind == 3, a, hi))
    return fam, interval_target(lo, hi), raw


@pytest.mark.parametrize("name", ALL_CENSORING)
def test_censored_math_is_never_nan_far_in_the_tails(name):
    # Promise: legal bounds and raw scores give no NaN.  The nll is finite except +inf where -log P
    # itself exceeds float64 (P = e^-nll below e^-1.8e308), and the gradient and Hessian are finite
    # except +-inf where the exact value exceeds float64 (e.g. weibull right-censored rows, where
    # g = -k e^(k z) overflows for k z > 709); the Hessian is >= 0 (the surrogate g^2 where the
    # exact one is not positive).  All three are finite on rows whose standardised distance from the
    # bulk is moderate (|z| <= 1e100 on identity links, |k (log v - raw)| <= 600 on log links;
    # exact rows are the family's own kernel, fuzzed in test_fuzz_families).
    @settings(max_examples=150, deadline=None, derandomize=True,
              suppress_health_check=[HealthCheck.too_slow, HealthCheck.filter_too_much])
    @given(far_case(name))
    def check(case):
        fam, t, raw = case
        with np.errstate(all="ignore"):
            nll = fam.nll(t, raw)
            g, h = fam.grad_hess(t, raw)
        rows = (fam.params, t.lower.tolist(), t.upper.tolist(), raw.tolist())
        assert not np.isnan(nll).any(), ("nll", nll, *rows)
        assert not np.isnan(g).any(), ("g", g, *rows)
        assert not np.isnan(h).any(), ("h", h, *rows)
        assert np.all(nll > -np.inf) and np.all(h >= 0), (nll, h, *rows)
        # a bound's standardised distance from the law's bulk
        pos = fam.support_edges[0] == 0
        spread = fam.params.get("scale", 1.0)
        with np.errstate(all="ignore"):
            far = np.zeros(t.size, bool)
            for v in (t.lower, t.upper):
                inside = np.isfinite(v) & (v > 0 if pos else True)
                if pos:
                    k = max(fam.params.get("shape", 1.0), 1.0 / spread)
                    d = k * np.abs(np.log(np.where(inside, v, 1.0)) - raw)
                    far |= inside & ~(d <= 600.0)
                else:
                    far |= inside & ~(np.abs((v - raw) / spread) <= 1e100)
        near = ~far & ~t.exact  # exact rows: the family's own kernel, fuzzed on its own
        assert np.all(np.isfinite(nll[near])), ("nll", nll, *rows)
        assert np.all(np.isfinite(g[near])) and np.all(np.isfinite(h[near])), (g, h, *rows)

    check()


@pytest.mark.parametrize("df", [0.3, 1.0, 2.5, 4.0, 9.0])
def test_student_t_far_tail_against_mpmath(df):
    # outside reference: mpmath at 50 digits, F0(z) = I_x(nu/2, 1/2) / 2 with x = nu / (nu + z^2)
    # (scipy.stats.t.logcdf returns -inf once F0 underflows, e.g. df = 2 at z = -1e155)
    mpmath = pytest.importorskip("mpmath")
    mpmath.mp.dps = 50
    fam = lossfam.family("student_t", df=df)
    for z in (-3e8, -1e155, -1.7e308):
        zz = mpmath.mpf(z)
        x = df / (df + zz * zz)
        ref = mpmath.log(mpmath.betainc(mpmath.mpf(df) / 2, mpmath.mpf(1) / 2, 0, x, regularized=True) / 2)
        left = fam.nll(interval_target([-np.inf], [z]), np.zeros(1))[0]
        right = fam.nll(interval_target([-z], [np.inf]), np.zeros(1))[0]
        assert left == pytest.approx(-float(ref), rel=1e-12) and right == pytest.approx(-float(ref), rel=1e-12)
        g, h = fam.grad_hess(interval_target([-np.inf], [z]), np.zeros(1))
        assert np.isfinite(g[0]) and np.isfinite(h[0]) and h[0] >= 0


def test_intervals_whose_log_tails_round_equal_or_underflow():
    # gaussian [-1, 0] at raw -1e15: P = S(z_lo) (1 - e^(-1e15)) is S(z_lo) to rounding, z_lo = 1e15 - 1:
    # the right-censored row's g = -r(z_lo), r = z + 1/z - ... (the Mills ratio, A&S 26.2.12, recalled
    # from memory), h = r (r - z) -> 1
    fam = lossfam.family("gaussian")
    g, h = fam.grad_hess(interval_target([-1.0], [0.0]), np.array([-1e15]))
    assert g[0] == pytest.approx(-(1e15 - 1.0), rel=1e-14) and h[0] == pytest.approx(1.0, rel=1e-9)
    # at raw -1e16 the two bounds give the same z: P = f(m) w to rounding (m the midpoint, w = 1)
    t = interval_target([-1.0], [0.0])
    nll = fam.nll(t, np.array([-1e16]))[0]
    assert nll == pytest.approx(0.5 * (1e16 - 0.5) ** 2 + 0.5 * np.log(2 * np.pi), rel=1e-15)
    g, h = fam.grad_hess(t, np.array([-1e16]))
    assert g[0] == pytest.approx(-1e16, rel=1e-15) and h[0] == 1.0
    # gaussian [1.7e214, 3.9e245] at raw 4.85: -log P ~ z^2 / 2 exceeds float64 (+inf); the gradient
    # is the hazard at the near bound, -z_lo (finite)
    t = interval_target([1.7e214], [3.9e245])
    assert fam.nll(t, np.array([4.85]))[0] == np.inf
    g, h = fam.grad_hess(t, np.array([4.85]))
    assert g[0] == pytest.approx(-1.7e214, rel=1e-14) and h[0] == pytest.approx(1.0, rel=1e-9)
    # laplace [-1e200, 1e200] at raw 1e300: log F(hi) and log F(lo) round equal; -log P = |z_hi| + log 2
    # to rounding (1e300), g = 1 / s
    lap = lossfam.family("laplace", scale=2.0)
    t = interval_target([-1e200], [1e200])
    assert lap.nll(t, np.array([1e300]))[0] == pytest.approx(0.5e300, rel=1e-15)
    g, h = lap.grad_hess(t, np.array([1e300]))
    assert g[0] == 0.5 and np.isfinite(h[0]) and h[0] >= 0
    # a subnormal width: P = f(0) 5e-324 (student_t df = 1: f(0) = 1 / pi)
    t1 = lossfam.family("student_t", df=1.0)
    assert t1.nll(interval_target([0.0], [5e-324]), np.zeros(1))[0] == pytest.approx(np.log(np.pi) - np.log(5e-324), rel=1e-12)
    # weibull [1, 10] at raw -355: -log P = (e^355)^2 exceeds float64, and so do g and h: the limits
    w = lossfam.family("weibull", shape=2.0)
    t = interval_target([1.0], [10.0])
    assert w.nll(t, np.array([-355.0]))[0] == np.inf
    assert w.grad_hess(t, np.array([-355.0]))[0][0] == -np.inf and w.grad_hess(t, np.array([-355.0]))[1][0] == np.inf


@pytest.mark.parametrize("k", [0.3, 2.5, 9.3, 29.5])
def test_gamma_right_censored_far_tail_against_mpmath(k):
    # outside reference: mpmath at 80 digits, Gamma(k, x) = x^k E_(1-k)(x) (mpmath.expint): the
    # hazard r = x^k e^-x / Gamma(k, x) and c = r + k - x of the right-censored row (z units,
    # x = k e^z); the log-space pieces lost eps x of relative accuracy here (wrong by 1e-3 at z = 30)
    mpmath = pytest.importorskip("mpmath")
    mpmath.mp.dps = 80
    fam = lossfam.family("gamma", shape=k)
    kk = mpmath.mpf(k)
    for x0 in (4 * k + 49.0, 4 * k + 51.0, 300.0, 705.0, 2000.0, 1e13, 1e20):
        v = x0 / k
        g, h = fam.grad_hess(interval_target([v], [np.inf]), np.zeros(1))
        x = kk * mpmath.mpf(v)
        u = mpmath.expint(1 - kk, x) * x * mpmath.e ** x
        r = x / u
        c = r + kk - x
        assert g[0] == pytest.approx(-float(r), rel=1e-13) and h[0] == pytest.approx(float(r * c), rel=1e-12)


@pytest.mark.parametrize("name,params,zl,zh", [
    ("weibull", {"shape": 1.8}, 29.93, 32.47), ("gamma", {"shape": 2.5}, 30.0, 30.1),
    ("gamma", {"shape": 2.5}, 100.0, 100.5), ("lognormal", {"scale": 0.6}, 28.46, 29.54),
])
def test_closed_intervals_far_in_the_upper_tail_against_mpmath(name, params, zl, zh):
    # outside reference: mpmath at 60 digits, numerical derivatives (mpmath.diff) of
    # -log(S(lo) - S(hi)) in raw (S by exp, gammainc, ncdf); bounds e^zl, e^zh at raw 0 (log y units)
    mpmath = pytest.importorskip("mpmath")
    mpmath.mp.dps = 60
    fam = lossfam.family(name, **params)
    lo, hi = float(np.exp(zl)), float(np.exp(zh))
    p = mpmath.mpf(list(params.values())[0])

    def sf(v, r):
        if name == "weibull":
            return mpmath.e ** (-((v / mpmath.e ** r) ** p))
        if name == "gamma":
            return mpmath.gammainc(p, p * v / mpmath.e ** r, mpmath.inf, regularized=True)
        return mpmath.ncdf(-(mpmath.log(v) - r) / p)

    def nll(r):
        return -mpmath.log(sf(mpmath.mpf(lo), r) - sf(mpmath.mpf(hi), r))

    g, h = fam.grad_hess(interval_target([lo], [hi]), np.zeros(1))
    assert g[0] == pytest.approx(float(mpmath.diff(nll, 0)), rel=1e-12)
    assert h[0] == pytest.approx(float(mpmath.diff(nll, 0, 2)), rel=1e-10)
