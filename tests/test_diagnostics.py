"""Quantile residuals, PIT, QQ data, calibration, coverage and the diagnostic plots.

References used below:
* Dunn, P. K. and Smyth, G. K. (1996), "Randomized quantile residuals",
  J. Comput. Graph. Stat. 5(3), 236-244: u ~ Uniform(F(y-1), F(y)) for discrete
  laws, and z = Phi^{-1}(u) is exactly N(0, 1) under the model.
* scipy.stats laws (cdf, ppf, interval) as the outside reference for F.
* scipy.stats.kstest for the Kolmogorov-Smirnov test against N(0, 1).
Data are simulated with numpy generators whose seeds are given at each check.
"""
import subprocess
import sys

import numpy as np
import pytest
from scipy import stats

import lossfam
from lossfam import diagnostics as dg

N = 4000


def _simulate(name, seed):
    """(family with its true parameters, y, true raw) for one family; seed documented per call."""
    rng = np.random.default_rng(seed)
    raw = rng.normal(0.0, 0.7, N)
    if name == "gaussian":
        fam = lossfam.family("gaussian", scale=1.7)
        y = rng.normal(raw, 1.7)
    elif name == "laplace":
        fam = lossfam.family("laplace", scale=0.8)
        y = rng.laplace(raw, 0.8)
    elif name == "asymmetric_laplace":
        fam = lossfam.family("asymmetric_laplace", quantile=0.8, scale=0.5)
        y = fam.distribution(raw).rvs(random_state=rng)
    elif name == "huber":
        fam = lossfam.family("huber", scale=1.2)
        y = fam.distribution(raw).rvs(random_state=rng)
    elif name == "gamma":
        fam = lossfam.family("gamma", shape=2.5)
        y = rng.gamma(2.5, np.exp(raw) / 2.5)
    elif name == "poisson":
        fam = lossfam.family("poisson")
        raw = raw + 1.0
        y = rng.poisson(np.exp(raw)).astype(float)
    elif name == "bernoulli":
        fam = lossfam.family("bernoulli")
        y = rng.binomial(1, 1.0 / (1.0 + np.exp(-raw))).astype(float)
    else:  # pragma: no cover
        raise AssertionError(name)
    return fam, y, raw


BUILT_IN = ["gaussian", "laplace", "asymmetric_laplace", "huber", "gamma", "poisson", "bernoulli"]


# ---------------------------------------------------------------------- KS: right and wrong models
@pytest.mark.parametrize("name", BUILT_IN)
def test_residuals_of_the_true_model_pass_ks(name):
    # seed 11 for the data, seed 0 for the randomized residuals; the true law is used,
    # so z ~ N(0, 1) exactly (Dunn and Smyth 1996, section 3) and kstest must not reject at 1%.
    fam, y, raw = _simulate(name, 11)
    z = dg.quantile_residuals(fam, y, raw, seed=0)
    assert np.all(np.isfinite(z))
    p = stats.kstest(z, "norm").pvalue
    assert p > 0.01, f"{name}: KS p-value {p:.3g} for the true model"


@pytest.mark.parametrize(
    "truth, fitted, kw",
    [
        ("gamma", "gaussian", {}),  # skewed data, symmetric law with the right mean and sd
        ("laplace", "gaussian", {}),  # heavy tails, light-tailed law with the right sd
        ("poisson", "poisson", {"overdispersed": True}),  # negative binomial counts as poisson
        ("bernoulli", "bernoulli", {"shifted": True}),  # probabilities off by 1.5 on the logit scale
    ],
)
def test_residuals_of_a_misspecified_model_fail_ks(truth, fitted, kw):
    # seed 12 for the data, 0 for the randomized residuals
    fam, y, raw = _simulate(truth, 12)
    rng = np.random.default_rng(13)
    if fitted != truth:
        mean = fam.distribution(raw).mean()
        sd = float(np.std(y - mean))
        fam, raw = lossfam.family(fitted, scale=sd), mean
    elif kw.get("overdispersed"):
        # NB with mean mu and size 2 (variance mu + mu^2 / 2): numpy's negative_binomial(n, p), p = n / (n + mu)
        mu = np.exp(raw)
        y = rng.negative_binomial(2, 2.0 / (2.0 + mu)).astype(float)
    elif kw.get("shifted"):
        raw = raw + 1.5
    z = dg.quantile_residuals(fam, y, raw, seed=0)
    p = stats.kstest(z, "norm").pvalue
    assert p < 0.01, f"{truth} data under {fitted}: KS p-value {p:.3g} should reject"


# ---------------------------------------------------------------------- against scipy
@pytest.mark.parametrize("name", ["gaussian", "laplace", "asymmetric_laplace", "gamma"])
def test_continuous_residuals_match_scipy_in_the_bulk(name):
    fam, y, raw = _simulate(name, 21)
    law = fam.distribution(raw)
    z = dg.quantile_residuals(fam, y, raw)
    ref = stats.norm.ppf(law.cdf(y))  # Phi^{-1}(F(y)) straight from scipy
    bulk = np.abs(ref) < 5
    np.testing.assert_allclose(z[bulk], ref[bulk], rtol=1e-9, atol=1e-9)
    np.testing.assert_allclose(dg.pit(fam, y, raw), law.cdf(y), rtol=1e-12, atol=1e-14)


def test_huber_residuals_use_the_huber_law_cdf():
    fam, y, raw = _simulate("huber", 22)
    law = fam.distribution(raw)
    # HuberLaw.cdf is tested against quadrature of its density in the family tests
    np.testing.assert_allclose(dg.pit(fam, y, raw), law.cdf(y), rtol=1e-12, atol=1e-14)
    z = dg.quantile_residuals(fam, y, raw)
    np.testing.assert_allclose(stats.norm.cdf(z), law.cdf(y), rtol=1e-9, atol=1e-12)


def test_gaussian_residuals_are_exact_far_in_the_tails():
    # For the gaussian law z = (y - mu) / sigma exactly.  The naive Phi^{-1}(F(y)) gives +inf from
    # about 8.3 sigma up (F rounds to 1); the log-space computation stays exact out to 37 sigma.
    fam = lossfam.family("gaussian", scale=2.0)
    zs = np.array([-37.0, -30.0, -12.0, -8.5, 0.3, 8.5, 12.0, 30.0, 37.0])
    y = 1.0 + 2.0 * zs
    z = dg.quantile_residuals(fam, y, np.ones_like(y))
    np.testing.assert_allclose(z, zs, rtol=1e-9)
    assert np.isinf(stats.norm.ppf(stats.norm.cdf(12.0)))  # what the naive route gives


def test_residuals_stay_finite_where_the_law_underflows():
    # scipy's gamma logcdf underflows to -inf at y = 1e-200; the residual is clipped to Phi^{-1}(TINY)
    fam = lossfam.family("gamma", shape=2.0)
    y = np.array([1e-200, 1.0, 1e4, 1e300])
    z = dg.quantile_residuals(fam, y, np.zeros(4))
    assert np.all(np.isfinite(z))
    limit = -stats.norm.ppf(dg.TINY)
    assert z[0] == pytest.approx(-limit) and z[-1] == pytest.approx(limit)
    assert abs(z[0]) <= 37.6
    assert y[0] == 1e-200  # the data are not touched


def test_randomized_pit_lies_in_the_jump_of_the_cdf():
    # Dunn and Smyth (1996): u ~ Uniform(F(y - 1), F(y)); F from scipy.stats.poisson
    fam, y, raw = _simulate("poisson", 31)
    u = dg.pit(fam, y, raw, seed=5)
    mu = np.exp(raw)
    lo, hi = stats.poisson.cdf(y - 1, mu), stats.poisson.cdf(y, mu)
    assert np.all(u >= lo - 1e-12) and np.all(u <= hi + 1e-12)
    # the position inside the jump is the seeded uniform: (u - lo) / (hi - lo) ~ Uniform(0, 1)
    v = (u - lo) / (hi - lo)
    assert stats.kstest(v, "uniform").pvalue > 0.01
    np.testing.assert_array_equal(u, dg.pit(fam, y, raw, seed=5))  # reproducible
    assert not np.array_equal(u, dg.pit(fam, y, raw, seed=6))


def test_bernoulli_pit_intervals():
    fam, y, raw = _simulate("bernoulli", 32)
    u = dg.pit(fam, y, raw, seed=1)
    p = 1.0 / (1.0 + np.exp(-raw))
    # P(Y = 0) = 1 - p: u in [0, 1 - p] for y = 0 and in [1 - p, 1] for y = 1
    assert np.all(u[y == 0] <= 1 - p[y == 0] + 1e-12)
    assert np.all(u[y == 1] >= 1 - p[y == 1] - 1e-12)


def test_unit_interval_pit_for_a_continuous_law_on_integers():
    rng = np.random.default_rng(33)
    raw = rng.normal(5.0, 1.0, N)
    y = np.round(rng.normal(raw, 0.6))  # a rounded gaussian: the unit-interval PIT is exactly uniform
    fam = lossfam.family("gaussian", scale=0.6)
    u = dg.pit(fam, y, raw, seed=2, unit_interval=True)
    lo, hi = stats.norm.cdf(y - 0.5, raw, 0.6), stats.norm.cdf(y + 0.5, raw, 0.6)
    assert np.all((u >= lo - 1e-12) & (u <= hi + 1e-12))
    z = dg.quantile_residuals(fam, y, raw, seed=2, unit_interval=True)
    assert stats.kstest(z, "norm").pvalue > 0.01
    # the plain continuous PIT of the rounded values is lumpy (not uniform): KS rejects it
    assert stats.kstest(dg.quantile_residuals(fam, y, raw), "norm").pvalue < 0.01
    with pytest.raises(ValueError, match="integer-valued"):
        dg.pit(fam, y + 0.25, raw, unit_interval=True)


def test_log_interval_probability_against_scipy():
    fam = lossfam.family("gaussian", scale=1.0)
    y = np.array([-30.0, -3.0, 0.0, 2.0, 30.0])
    got = dg.log_interval_probability(fam, y, np.zeros(5))
    # reference by the side that does not cancel: cdf differences below 0, sf differences above
    with np.errstate(divide="ignore"):
        ref = np.where(
            y <= 0,
            np.log(stats.norm.cdf(y + 0.5) - stats.norm.cdf(y - 0.5)),
            np.log(stats.norm.sf(y - 0.5) - stats.norm.sf(y + 0.5)),
        )
    np.testing.assert_allclose(got, ref, rtol=1e-10)
    # Poisson-rounded gamma: compare with scipy.integrate.quad of the density
    from scipy import integrate

    g = lossfam.family("gamma", shape=3.0)
    val = dg.log_interval_probability(g, [4.0], [np.log(2.0)])[0]
    dens = stats.gamma(a=3.0, scale=2.0 / 3.0).pdf
    assert val == pytest.approx(np.log(integrate.quad(dens, 3.5, 4.5)[0]), rel=1e-10)


def test_log_interval_probability_is_finite_beyond_underflow():
    from scipy.special import log_ndtr

    fam = lossfam.family("gaussian", scale=1.0)
    got = dg.log_interval_probability(fam, [80.0, -80.0], [0.0, 0.0])
    # P(79.5 < Y <= 80.5) = Phi(-79.5) (1 - Phi(-80.5) / Phi(-79.5)), and the ratio is ~e^-80:
    # log P = log_ndtr(-79.5) to double precision (scipy.special.log_ndtr)
    np.testing.assert_allclose(got, [log_ndtr(-79.5)] * 2, rtol=1e-12)
    # scipy's gamma logsf underflows to -inf at y = 1e4 (mean 1): the midpoint rule log p(y) takes over
    g = lossfam.family("gamma", shape=2.0)
    far = dg.log_interval_probability(g, [1e4], [0.0])
    assert np.isfinite(far[0])
    assert far[0] == pytest.approx(stats.gamma(a=2.0, scale=0.5).logpdf(1e4), rel=1e-12)


# ---------------------------------------------------------------------- QQ, KS statistic
def test_qq_data():
    z = np.random.default_rng(41).normal(size=500)
    theo, sample = dg.qq_data(z)
    np.testing.assert_array_equal(sample, np.sort(z))
    np.testing.assert_allclose(theo, -theo[::-1], atol=1e-12)  # symmetric plotting positions
    assert np.all(np.diff(theo) > 0)
    with pytest.raises(ValueError, match="finite"):
        dg.qq_data([0.0, np.nan])
    assert dg.ks_statistic(z) == pytest.approx(stats.kstest(z, "norm").statistic)


# ---------------------------------------------------------------------- calibration
def test_calibration_table_of_a_calibrated_model():
    fam, y, raw = _simulate("bernoulli", 51)
    tab = dg.calibration_table(fam, y, raw, bins=8)
    assert tab["count"].sum() == N
    assert np.all(np.diff(tab["lower"]) > 0)
    # binomial standard error of the observed rate in each bin; 4 SE is a loose band
    se = np.sqrt(tab["predicted"] * (1 - tab["predicted"]) / tab["count"])
    assert np.all(np.abs(tab["observed"] - tab["predicted"]) < 4 * se + 1e-3)
    # quantile bins hold about equal counts
    assert tab["count"].min() >= N / 8 - 2
    uni = dg.calibration_table(fam, y, raw, bins=10, binning="equal_width")
    assert uni["count"].sum() == N and np.all(uni["upper"] - uni["lower"] == pytest.approx(0.1))


def test_calibration_table_detects_miscalibration_and_checks_input():
    fam, y, raw = _simulate("bernoulli", 52)
    tab = dg.calibration_table(fam, y, raw + 1.5, bins=5)  # over-confident in y = 1
    assert np.all(tab["predicted"] > tab["observed"])
    w = np.random.default_rng(53).uniform(0.5, 2.0, N)
    tw = dg.calibration_table(fam, y, raw, bins=5, weight=w)
    assert tw["weight"].sum() == pytest.approx(w.sum())
    with pytest.raises(ValueError, match="0 or 1"):
        dg.calibration_table(fam, y + 2, raw)
    with pytest.raises(ValueError, match="binning must be one of 'equal_count', 'equal_width'"):
        dg.calibration_table(fam, y, raw, binning="equal")
    with pytest.raises(ValueError, match="probability"):
        dg.binned_calibration(y, raw)  # raw scores are not probabilities


# ---------------------------------------------------------------------- coverage
@pytest.mark.parametrize("name", ["gaussian", "laplace", "asymmetric_laplace", "huber", "gamma"])
def test_interval_coverage_of_the_true_model(name):
    fam, y, raw = _simulate(name, 61)
    cov = dg.interval_coverage(fam, y, raw, levels=(0.5, 0.9))
    # binomial sd of an observed fraction at n = 4000 is <= 0.008; allow 4 sd
    np.testing.assert_allclose(cov["observed"], [0.5, 0.9], atol=0.032)
    assert np.all(cov["mean_width"] > 0)


def test_interval_coverage_of_counts_is_conservative_and_too_narrow_law_undercovers():
    fam, y, raw = _simulate("poisson", 62)
    cov = dg.interval_coverage(fam, y, raw, levels=(0.5, 0.8, 0.9))
    assert np.all(cov["observed"] >= cov["level"] - 0.02)  # quantile end points: mass >= level
    g, yg, rg = _simulate("gaussian", 63)
    narrow = dg.interval_coverage(g.with_params(scale=1.0), yg, rg, levels=[0.9])
    # the true sd is 1.7: P(|Z| <= 1.645 / 1.7) = 0.667 (scipy.stats.norm)
    expect = 2 * stats.norm.cdf(stats.norm.ppf(0.95) / 1.7) - 1
    assert narrow["observed"][0] == pytest.approx(expect, abs=0.03)
    with pytest.raises(ValueError, match="levels"):
        dg.interval_coverage(g, yg, rg, levels=[0.9, 1.0])


# ---------------------------------------------------------------------- plots
def test_plots_render_under_agg_and_save_png(tmp_path):
    mpl = pytest.importorskip("matplotlib")
    mpl.use("Agg")
    from matplotlib.figure import Figure
    from matplotlib.image import imread

    from lossfam import plot

    fam, y, raw = _simulate("bernoulli", 71)
    figs = {
        "qq": plot.qq_plot(dg.quantile_residuals(fam, y, raw)),
        "pit": plot.pit_histogram(dg.pit(fam, y, raw)),
        "calibration": plot.calibration_plot(dg.calibration_table(fam, y, raw)),
        "coverage": plot.coverage_plot(dg.interval_coverage(fam, y, raw)),
    }
    for kind, fig in figs.items():
        assert isinstance(fig, Figure)
        path = tmp_path / f"{kind}.png"
        fig.savefig(path)
        assert path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
        img = imread(path)
        assert img.ndim == 3 and img.shape[0] > 100 and img.shape[1] > 100
    # drawing into a given Axes returns that Axes' figure
    fig = Figure()
    ax = fig.add_subplot()
    assert plot.qq_plot(np.array([0.1, -0.2, 0.3]), ax=ax) is fig
    with pytest.raises(ValueError, match="PIT"):
        plot.pit_histogram([0.5, 1.5])


def test_plot_without_matplotlib_names_the_extra(monkeypatch):
    from lossfam import plot

    for mod in [m for m in sys.modules if m == "matplotlib" or m.startswith("matplotlib.")]:
        monkeypatch.delitem(sys.modules, mod)
    monkeypatch.setitem(sys.modules, "matplotlib", None)  # makes `import matplotlib` fail
    with pytest.raises(ImportError, match=r'pip install "lossfam\[plot\]"'):
        plot.qq_plot([0.0, 1.0])


def test_import_lossfam_loads_no_engine_pandas_or_matplotlib():
    code = (
        "import sys, lossfam; lossfam.rank_families; import lossfam.diagnostics, lossfam.plot, lossfam.cli; "
        "bad = sorted(m for m in sys.modules if m.split('.')[0] in "
        "('lightgbm', 'xgboost', 'sklearn', 'pandas', 'matplotlib')); print(bad)"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "[]"
