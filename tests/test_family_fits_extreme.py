"""Nuisance fits and baselines of tweedie, student_t, beta and negative_binomial: accurate, and finite
or refused with rows named on extreme but legal input (each case one the fuzz found)."""
from __future__ import annotations

import json
import warnings

import numpy as np
import pytest
from scipy import optimize

import lossfam
from lossfam import selection
from lossfam.families.student_t import StudentT, _log_norm
from lossfam.families.tweedie import Tweedie, TweedieLaw, _series_mean_count, log_series


@pytest.fixture
def strict_warnings():
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        yield


# --------------------------------------------------------------------------- tweedie dispersion
@pytest.mark.parametrize("p", [1.05, 1.3, 1.5, 1.9])
@pytest.mark.parametrize("phi", [1e-3, 0.1, 1.0, 30.0])
def test_tweedie_series_score_is_the_derivative_of_the_series(p, phi):
    # d log sum W_j / d log phi = -E_W[j] / (p-1), against central differences of log_series
    y = np.array([1e-8, 1e-3, 0.3, 1.0, 7.0, 300.0, 1e5])
    h = 1e-5
    fd = (log_series(y, p, phi * np.exp(h)) - log_series(y, p, phi * np.exp(-h))) / (2 * h)
    np.testing.assert_allclose(-_series_mean_count(y, p, phi) / (p - 1), fd, rtol=1e-8, atol=1e-8)


def test_tweedie_dispersion_maximises_the_likelihood():
    rng = np.random.default_rng(4)
    raw = rng.normal(0.5, 0.7, 2000)
    y = TweedieLaw(np.exp(raw), 1.6, 2.5).rvs(random_state=rng)
    phi = Tweedie(power=1.6).fit_nuisance(y, raw).dispersion

    def mean_nll(v):
        return float(np.mean(Tweedie(power=1.6, dispersion=v).nll(y, raw)))

    grid = phi * np.exp(np.linspace(-0.5, 0.5, 201))
    assert mean_nll(phi) <= min(mean_nll(v) for v in grid) + 1e-13
    # and against an independent bounded minimisation of the same likelihood, to its ~sqrt(eps)
    ref = optimize.minimize_scalar(lambda lv: mean_nll(np.exp(lv)), bounds=(np.log(phi) - 1, np.log(phi) + 1),
                                   method="bounded", options={"xatol": 1e-10}).x
    assert phi == pytest.approx(np.exp(ref), rel=1e-6)


def test_tweedie_dispersion_refuses_rows_where_the_nll_overflows(strict_warnings):
    with pytest.raises(ValueError, match=r"tweedie: mu\^\(2-p\) or y mu\^\(1-p\) overflows float64 in 1 row, "
                                         r"e\.g\. rows? \[1\] = \[1420\.0\]"):
        Tweedie().fit_nuisance([0.0, 1.0, 2.0], [0.0, 1420.0, 0.0])


def test_tweedie_fits_ignore_rows_of_underflowed_weight(strict_warnings):
    y = np.array([0.0, 1.0, 1.0, 0.0, 0.0, 0.0, 1.0, 0.0])
    raw = np.array([0.0, 1420.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0])
    w = np.array([1, 5e-324, 1, 1, 1, 1, 1, 1.0])
    keep = w > 1e-300
    assert Tweedie().fit_nuisance(y, raw, w).dispersion == pytest.approx(
        Tweedie().fit_nuisance(y[keep], raw[keep]).dispersion, rel=1e-12)
    assert Tweedie().baseline(y, w, offset=raw) == pytest.approx(np.log(2.0 / 7.0), rel=1e-14)


def test_tweedie_baseline_with_offsets_beyond_exp_range(strict_warnings):
    # log(sum w y e^((1-p) o) / sum w e^((2-p) o)) with o = -794: 794 (p = 1.0625)
    assert Tweedie(power=1.0625).baseline([1.0], [1.0], offset=[-794.0]) == pytest.approx(794.0, rel=1e-15)


# --------------------------------------------------------------------------- student_t
def test_student_t_constant_matches_mpmath_for_large_df():
    mpmath = pytest.importorskip("mpmath")
    mpmath.mp.dps = 80
    for nu in [0.05, 4.0, 999.0, 1e3, 1e6, 1e12, 1e30]:
        n = mpmath.mpf(nu)
        ref = mpmath.loggamma(n / 2) - mpmath.loggamma((n + 1) / 2) + mpmath.log(n * mpmath.pi) / 2
        assert _log_norm(nu) == pytest.approx(float(ref), rel=1e-14), nu


@pytest.mark.parametrize("df, scale, y, raw", [
    (1.0, 1e-300, 0.0, 0.0), (5.39e259, 1.36e-275, 0.0, 0.0), (5.6e102, 1.0, 0.0, 0.0),
    (4.0, 1.0, 1e308, -1e308), (4.0, 1e-300, 1.0, 0.0), (1e300, 1e10, 0.0, 1e300), (1e-300, 1.0, 0.0, 1e-200),
])
def test_student_t_pointwise_math_is_finite_or_inf_never_nan(df, scale, y, raw, strict_warnings):
    fam = StudentT(df=df, scale=scale)
    nll = fam.nll([y], [raw])
    g, h = fam.grad_hess([y], [raw])
    d = fam.deviance([y], [raw])
    assert not np.isnan(np.concatenate([nll, g, h, d])).any()
    assert h[0] >= 0 and d[0] >= 0


def test_student_t_gradient_keeps_its_size_where_nu_s2_overflows(strict_warnings):
    # nu s^2 = 1e320 overflows, yet g = (nu+1) r / (nu s^2 + r^2) = ((nu+1)/r) / (1 + nu s^2 / r^2)
    # = 1 / (1 + 1e-280) = 1 (r = 1e300), and h = g / r; before, h was 0 and g 0 * inf
    g, h = StudentT(df=1e300, scale=1e10).grad_hess([0.0], [1e300])
    assert g[0] == pytest.approx(1.0, rel=1e-12)
    assert h[0] == pytest.approx(1e-300, rel=1e-12)


def test_student_t_baseline_with_an_offset_whose_residual_overflows(strict_warnings):
    y = np.array([0.0] * 7 + [2.08392941e307])
    off = np.array([0.0] * 7 + [-1.58930019e308])
    c = StudentT(df=1.0).baseline(y, offset=off)
    assert np.isfinite(c) and abs(c) < 1e-6  # the overflowing row has an EM weight of ~0


def test_student_t_scale_fit_on_residuals_near_the_float64_limit(strict_warnings):
    s = StudentT(df=4.0).fit_nuisance([1.34078079e154, 1e300, -1e308], [0.0, -1e300, 1e308]).scale
    assert np.isfinite(s) and s > 0


def test_student_t_estimate_df_stays_a_bool_in_params_ranking_and_files(tmp_path):
    fam = StudentT(estimate_df=True)
    assert fam.params["estimate_df"] is True and "estimate_df=True" in repr(fam)
    assert StudentT(estimate_df=0).estimate_df is False  # a switch read back as a number
    with pytest.raises(ValueError, match="estimate_df must be True or False"):
        StudentT(estimate_df=2)
    rng = np.random.default_rng(2)
    x = rng.normal(size=400)
    y = 0.5 * x + rng.standard_t(3.0, 400)
    rows = list(selection.rank_families(x[:, None], y, families=[fam, "gaussian"], folds=2, as_frame=False))
    row = next(r for r in rows if r["family"].startswith("student_t"))
    assert row["family"] == "student_t(estimate_df=True)"
    assert row["nuisance"]["estimate_df"] is True
    assert json.loads(json.dumps(row["nuisance"]))["estimate_df"] is True
    from lossfam import cli
    assert "estimate_df=True" in cli.format_table(rows)
    lightgbm = pytest.importorskip("lightgbm")
    from lossfam import lightgbm as lfl

    model = lfl.train(fam, {"verbose": -1, "num_threads": 1}, lightgbm.Dataset(x[:, None], y), 5)
    path = tmp_path / "t.json"
    model.save(path)
    back = lfl.load(path)
    assert back.fitted_family.estimate_df is True and back.family.estimate_df is True
    assert back.fitted_family == model.fitted_family


# --------------------------------------------------------------------------- beta, negative_binomial
def test_beta_baseline_with_an_offset_ignores_rows_of_underflowed_weight(strict_warnings):
    y = np.array([0.5] * 35 + [5e-324])
    off = np.array([0.0] * 35 + [1.7976911e308])
    w = np.array([1.0] * 35 + [5e-324])
    fam = lossfam.family("beta", precision=2.7e299)
    c = fam.baseline(y, w, offset=off)
    assert np.isfinite(c)
    assert c == pytest.approx(fam.baseline(y[:35], offset=off[:35]), abs=1e-8)


def test_negative_binomial_baseline_with_offsets_spread_over_float64(strict_warnings):
    y = np.array([0.0] * 32 + [1.0])
    off = np.array([0.0] * 32 + [-8.98846567e307])
    fam = lossfam.family("negative_binomial")
    c = fam.baseline(y, offset=off)
    # the root of 32 mu/(1+mu) = 1 (the last row's mean is 0): mu = 1/31
    assert c == pytest.approx(np.log(1.0 / 31.0), rel=1e-12)


def test_negative_binomial_nll_where_scipy_betaln_fails(strict_warnings):
    # log C(y, r) = -log y - log B(y, r) at y = 1e100, r = 1e300 (betaln returns NaN), against mpmath
    mpmath = pytest.importorskip("mpmath")
    mpmath.mp.dps = 400
    y, alpha = 1e100, 1e-300
    r = mpmath.mpf(1) / mpmath.mpf(alpha)
    ref = mpmath.loggamma(y + r) - mpmath.loggamma(r) - mpmath.loggamma(y + 1)
    from lossfam.families.negative_binomial import log_binomial_term
    assert log_binomial_term(np.array([y]), 1.0 / alpha)[0] == pytest.approx(float(ref), rel=1e-12)


@pytest.mark.parametrize("power", [1.2, 1.5, 1.75])
def test_tweedie_zero_targets_stay_finite_where_the_amount_term_overflows(power):
    # y = 0 with a raw score so low that e^((1-p) raw) overflows: the amount term y e^((1-p) raw)
    # is exactly 0, so only the zero-mass part lam = e^((2-p) raw) / (phi (2-p)) remains
    # (P(Y = 0) = exp(-lam) for the compound Poisson-gamma law; Dunn & Smyth 2005, Statistics and
    # Computing 15, "Series evaluation of Tweedie exponential dispersion model densities"; section
    # number recalled from memory).
    import warnings

    fam = lossfam.family("tweedie", power=power, dispersion=0.7)
    raw = np.array([-710.0 / (power - 1.0) - 5.0])
    y = np.zeros(1)
    lam = np.exp((2.0 - power) * raw) / (0.7 * (2.0 - power))
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        g, h = fam.grad_hess(y, raw)
        dev = fam.deviance(y, raw)
        nll = fam.nll(y, raw)
    np.testing.assert_allclose(nll, lam, rtol=1e-12)
    np.testing.assert_allclose(g, (2.0 - power) * lam, rtol=1e-12)  # d lam / d raw
    np.testing.assert_allclose(h, (2.0 - power) ** 2 * lam, rtol=1e-12)
    np.testing.assert_allclose(dev, 2.0 * 0.7 * lam, rtol=1e-12)  # unit deviance = 2 phi (nll - saturated nll)
