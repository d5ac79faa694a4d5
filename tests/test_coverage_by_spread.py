"""Conditional coverage: central intervals per group of predicted spread (lossfam.diagnostics)."""
import numpy as np
import pandas as pd
import pytest
from scipy import stats

import lossfam
from lossfam import diagnostics


def _hetero(rng, n=40_000):
    # y ~ N(0, sigma_i), sigma spread evenly on the log scale over a factor of 10
    sigma = np.exp(rng.uniform(0.0, np.log(10.0), size=n))
    return rng.normal(0.0, sigma), sigma


def test_true_law_covers_the_level_in_every_group(rng):
    y, sigma = _hetero(rng)
    fam = lossfam.family("gaussian_spread")
    raw = np.column_stack([np.zeros_like(y), np.log(sigma)])
    t = diagnostics.coverage_by_spread(fam.distribution(raw), y, level=0.9)
    assert t["group"].size == 10 and t["count"].sum() == y.size
    np.testing.assert_allclose(t["count"], y.size / 10, atol=1)
    np.testing.assert_allclose(t["spread"], [sigma[(sigma >= a) & (sigma <= b)].mean()
                                             for a, b in zip(t["lower"], t["upper"])])
    # each group: 0.9 up to 4 binomial standard errors
    assert np.all(np.abs(t["coverage"] - 0.9) < 4 * t["se"])
    np.testing.assert_allclose(t["se"], np.sqrt(0.09 / (y.size / 10)), rtol=1e-3)


def test_constant_scale_law_misses_in_the_known_way(rng):
    # a constant scale s on N(0, sigma_i) rows covers 2 Phi(z s / sigma_i) - 1 (z = Phi^-1(0.95)),
    # computed here per row and averaged per group: the expected coverage is known exactly
    y, sigma = _hetero(rng)
    s = float(np.sqrt(np.mean(y ** 2)))
    law = stats.norm(loc=np.zeros_like(y), scale=s)
    t = diagnostics.coverage_by_spread(law, y, level=0.9, by=sigma)
    z = stats.norm.ppf(0.95)
    edges = [(a, b) for a, b in zip(t["lower"], t["upper"])]
    expected = [np.mean(2 * stats.norm.cdf(z * s / sigma[(sigma >= a) & (sigma <= b)]) - 1) for a, b in edges]
    assert np.all(np.abs(t["coverage"] - expected) < 4 * t["se"])
    assert t["coverage"][0] > 0.99 and t["coverage"][-1] < 0.75
    # grouped by its own spread (the same on every row) it is one group, covering about 0.9 overall
    one = diagnostics.coverage_by_spread(law, y, level=0.9)
    assert one["group"].size == 1 and abs(one["coverage"][0] - 0.9) < 0.01


def test_one_score_family_with_spread_depending_on_the_mean(rng):
    # poisson: std = sqrt(mean), so rows group by their predicted mean; the law is right, and the
    # discrete interval covers at least its level in every group
    mu = np.exp(rng.uniform(0.0, 3.0, size=20_000))
    y = rng.poisson(mu).astype(float)
    fam = lossfam.family("poisson")
    t = diagnostics.coverage_by_spread(fam.distribution(np.log(mu)), y, level=0.8)
    assert t["group"].size >= 8
    assert np.all(t["coverage"] >= 0.8 - 4 * t["se"])
    assert np.all(np.diff(t["spread"]) > 0)


def test_spread_measures_weights_and_frame(rng):
    y, sigma = _hetero(rng, n=5000)
    law = stats.norm(loc=0.0, scale=sigma)
    a = diagnostics.coverage_by_spread(law, y, spread="std")
    b = diagnostics.coverage_by_spread(law, y, spread="iqr")
    c = diagnostics.coverage_by_spread(law, y, spread="width", level=0.5)
    # for a normal law all three are proportional to sigma, so the groups are the same rows
    np.testing.assert_allclose(b["spread"] / a["spread"], 2 * stats.norm.ppf(0.75), rtol=1e-10)
    np.testing.assert_allclose(c["spread"] / a["spread"], 2 * stats.norm.ppf(0.75), rtol=1e-10)
    np.testing.assert_array_equal(a["count"], b["count"])
    # integer weights are repeated rows
    w = rng.integers(1, 4, size=y.size).astype(float)
    tw = diagnostics.coverage_by_spread(law, y, weight=w, by=sigma)
    rep = np.repeat(np.arange(y.size), w.astype(int))
    tr = diagnostics.coverage_by_spread(stats.norm(loc=0.0, scale=sigma[rep]), y[rep], by=sigma[rep])
    np.testing.assert_allclose(tw["coverage"], tr["coverage"])
    frame = diagnostics.coverage_by_spread(law, y, as_frame=True)
    assert isinstance(frame, pd.DataFrame) and list(frame.columns)[:3] == ["group", "lower", "upper"]
    pd.testing.assert_frame_equal(frame, pd.DataFrame(a))


def test_heavy_tails_need_the_iqr_and_bad_input_is_named(rng):
    y = rng.standard_cauchy(100)
    law = stats.t(df=1.0, loc=0.0, scale=np.linspace(1, 2, 100))
    with pytest.raises(ValueError, match="spread='iqr'"):
        diagnostics.coverage_by_spread(law, y)
    t = diagnostics.coverage_by_spread(law, y, spread="iqr", groups=4)
    assert t["group"].size == 4
    with pytest.raises(ValueError, match="level"):
        diagnostics.coverage_by_spread(law, y, level=1.0)
    with pytest.raises(ValueError, match="spread must be"):
        diagnostics.coverage_by_spread(law, y, spread="sd")
    with pytest.raises(ValueError, match="by has shape"):
        diagnostics.coverage_by_spread(law, y, by=np.ones(3))


def test_several_score_family_in_the_other_diagnostics(rng):
    # the quantile residuals of the right gaussian_spread law are standard normal
    y, sigma = _hetero(rng, n=4000)
    raw = np.column_stack([np.zeros_like(y), np.log(sigma)])
    z = diagnostics.quantile_residuals("gaussian_spread", y, raw)
    np.testing.assert_allclose(z, y / sigma, rtol=1e-9, atol=1e-12)
    cov = diagnostics.interval_coverage("gaussian_spread", y, raw, levels=[0.9])
    assert abs(cov["observed"][0] - 0.9) < 0.02
    with pytest.raises(ValueError, match=r"shape \(n, 2\)"):
        diagnostics.pit("gaussian_spread", y, np.zeros_like(y))


def test_plot_draws_both_models(rng):
    pytest.importorskip("matplotlib")
    from lossfam import plot

    y, sigma = _hetero(rng, n=3000)
    right = diagnostics.coverage_by_spread(stats.norm(0.0, sigma), y)
    const = diagnostics.coverage_by_spread(stats.norm(0.0, np.full_like(y, y.std())), y, by=sigma)
    fig = plot.coverage_by_spread_plot({"spread": right, "constant": const})
    ax = fig.axes[0]
    assert len(ax.get_legend().get_texts()) == 2
    fig2 = plot.coverage_by_spread_plot(right)
    assert fig2.axes[0].get_legend() is None
