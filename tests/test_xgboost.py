"""Tests of the XGBoost adapter (lossfam.xgboost).

Outside references: XGBoost's own built-in objectives trained with the same
parameters and rounds (reg:squarederror, reg:absoluteerror, reg:quantileerror,
binary:logistic, count:poisson, reg:gamma, reg:pseudohubererror), scipy.stats
log densities, numpy medians/quantiles, closed-form Poisson rates.

Simulated data (demo scenario of our own): a smooth signal in six Gaussian
features, f = 0.6 x0 - 0.4 x1^2 + 0.3 sin(2 x2) + 0.2 x3 x4, 20 000 training
and 10 000 held-out rows, numpy Generator seeded 20261201; each family draws
its target from its own law around f (see ``_scenario``).
"""
from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pytest
from scipy import stats

import lossfam

xgb = pytest.importorskip("xgboost")
lx = pytest.importorskip("lossfam.xgboost")

from lossfam.families.asymmetric_laplace import pinball  # noqa: E402
from lossfam.families.huber import huber_rho  # noqa: E402

N_TRAIN, N_TEST, N_FEAT = 20_000, 10_000, 6
PARAMS = {"max_depth": 4, "eta": 0.1, "nthread": 2, "tree_method": "hist"}
ROUNDS = 100


@pytest.fixture(scope="module")
def features():
    rng = np.random.default_rng(20261201)
    X = rng.normal(size=(N_TRAIN + N_TEST, N_FEAT))
    f = 0.6 * X[:, 0] - 0.4 * X[:, 1] ** 2 + 0.3 * np.sin(2 * X[:, 2]) + 0.2 * X[:, 3] * X[:, 4]
    return X, f


def _scenario(name, X, f, seed=7):
    rng = np.random.default_rng(seed)
    n = X.shape[0]
    if name == "gaussian":
        return 3.0 + 2.0 * f + rng.normal(size=n)
    if name == "laplace":  # heteroscedastic Laplace noise
        return 10.0 + 5.0 * f + 3.0 * rng.laplace(size=n) * np.exp(0.3 * X[:, -1])
    if name in ("asymmetric_laplace", "huber"):  # heavy tails: Student t with 3 degrees of freedom
        return 10.0 + 5.0 * f + 3.0 * rng.standard_t(3, size=n)
    if name == "poisson":
        return rng.poisson(np.exp(0.5 + f)).astype(float)
    if name == "gamma":
        return rng.gamma(2.0, np.exp(1.0 + f) / 2.0)
    if name == "bernoulli":
        return (rng.uniform(size=n) < 1.0 / (1.0 + np.exp(-2.0 * f))).astype(float)
    # any other family: draws from its own predictive law at raw score f, redrawing the rows that
    # leave the support once rounded to float32 (a DMatrix stores labels in float32)
    fam = lossfam.family(name)
    law = fam.distribution(f)
    y = np.asarray(law.rvs(random_state=rng), dtype=float)
    inside = fam.target_domain.inside
    for _ in range(100):
        bad = ~inside(y.astype(np.float32).astype(float))
        if not bad.any():
            break
        y[bad] = np.asarray(law.rvs(random_state=rng), dtype=float)[bad]
    return y


def _mean_poisson_deviance(y, mu):
    # 2 (y log(y/mu) - y + mu), McCullagh & Nelder, Generalized Linear Models, 2nd ed., Table 2.1
    return float(np.mean(2.0 * (np.where(y > 0, y * np.log(np.where(y > 0, y, 1.0) / mu), 0.0) - y + mu)))


def _mean_gamma_deviance(y, mu):
    # 2 (-log(y/mu) + (y - mu)/mu), McCullagh & Nelder, 2nd ed., Table 2.1
    return float(np.mean(2.0 * (-np.log(y / mu) + (y - mu) / mu)))


def _log_loss(y, p):
    return float(-np.mean(stats.bernoulli.logpmf(y, p)))


CASES = [
    # (family name, family params, built-in params, held-out score of a response-scale prediction)
    ("gaussian", {}, {"objective": "reg:squarederror"}, lambda y, m: float(np.mean((y - m) ** 2))),
    ("laplace", {}, {"objective": "reg:absoluteerror"}, lambda y, m: float(np.mean(np.abs(y - m)))),
    *[
        ("asymmetric_laplace", {"quantile": t}, {"objective": "reg:quantileerror", "quantile_alpha": t},
         (lambda t: lambda y, m: float(np.mean(pinball(y - m, t))))(t))
        for t in (0.1, 0.5, 0.9)
    ],
    ("bernoulli", {}, {"objective": "binary:logistic"}, _log_loss),
    ("poisson", {}, {"objective": "count:poisson"}, _mean_poisson_deviance),
    ("gamma", {}, {"objective": "reg:gamma"}, _mean_gamma_deviance),
]


@pytest.mark.parametrize("name, fam_params, builtin, score", CASES,
                         ids=[c[0] + "".join(f"-{v}" for v in c[1].values()) for c in CASES])
def test_parity_with_builtin_objective(features, name, fam_params, builtin, score):
    X, f = features
    y = _scenario(name, X, f)
    Xtr, Xte, ytr, yte = X[:N_TRAIN], X[N_TRAIN:], y[:N_TRAIN], y[N_TRAIN:]
    dtrain = xgb.DMatrix(Xtr, label=ytr)
    reference = xgb.train({**PARAMS, **builtin}, dtrain, ROUNDS)
    ours = lx.train(lossfam.family(name, **fam_params), PARAMS, dtrain, ROUNDS)
    s_ref = score(yte, reference.predict(xgb.DMatrix(Xte)))
    s_ours = score(yte, ours.predict(Xte))
    assert np.isfinite(s_ours)
    assert s_ours <= 1.01 * s_ref, f"{name} {fam_params}: held-out {s_ours:.5f} vs built-in {s_ref:.5f}"


@pytest.mark.parametrize("scale", [1.0, 2.5])
def test_gaussian_native_path_behaves_like_the_custom_objective(features, scale):
    # builtin_if_exact lets reg:squarederror compute the (scale-free) gaussian gradients; the
    # model must be the same as the pure custom objective's: predictions, metric log, baseline,
    # fitted scale and distribution.
    X, f = features
    y = _scenario("gaussian", X, f)
    fam = lossfam.family("gaussian", scale=scale)
    n = 5000
    runs = {}
    for native in (True, False):
        log = {}
        model = lx.train(fam, dict(PARAMS, nthread=1), xgb.DMatrix(X[:n], label=y[:n]), 30,
                         evals=[(xgb.DMatrix(X[n:2 * n], label=y[n:2 * n]), "valid")], evals_result=log,
                         verbose_eval=False, builtin_if_exact=native)
        runs[native] = (model, log["valid"]["gaussian_nll"])
    (m1, log1), (m0, log0) = runs[True], runs[False]
    assert m1.extra["engine_objective"] == "reg:squarederror" and m0.extra["engine_objective"] == "custom"
    assert m1.baseline == m0.baseline
    assert np.max(np.abs(m1.predict(X[-1000:]) - m0.predict(X[-1000:]))) < 1e-6
    assert np.allclose(log1, log0, rtol=1e-7)
    assert m1.fitted_family.scale == pytest.approx(m0.fitted_family.scale, rel=1e-7)
    assert np.allclose(m1.distribution(X[:5]).std(), m0.distribution(X[:5]).std(), rtol=1e-7)


def test_poisson_damped_guard_native_path_matches_custom_and_builtin(features):
    # step_cap="damped" is count:poisson's own guard (Hessian x e^0.7, leaves clipped at 0.7):
    # the native path (count:poisson computes the gradients) must give the custom objective's
    # model, and both must match the built-in count:poisson started at the same baseline.
    X, f = features
    y = _scenario("poisson", X, f)
    n = 5000
    runs = {}
    for native in (True, False):
        log = {}
        model = lx.train("poisson", dict(PARAMS, nthread=1), xgb.DMatrix(X[:n], label=y[:n]), 30,
                         evals=[(xgb.DMatrix(X[n:2 * n], label=y[n:2 * n]), "valid")], evals_result=log,
                         verbose_eval=False, step_cap="damped", builtin_if_exact=native)
        runs[native] = (model, log["valid"]["poisson_nll"])
    (m1, log1), (m0, log0) = runs[True], runs[False]
    assert m1.extra["engine_objective"] == "count:poisson" and m0.extra["engine_objective"] == "custom"
    assert m1.baseline == m0.baseline
    held = X[-1000:]
    assert np.max(np.abs(m1.predict(held) / m0.predict(held) - 1)) < 1e-6
    assert np.allclose(log1, log0, rtol=1e-7)
    ref = xgb.train(dict(PARAMS, nthread=1, objective="count:poisson", base_score=float(np.exp(m0.baseline))),
                    xgb.DMatrix(X[:n], label=y[:n]), 30)
    assert np.max(np.abs(ref.predict(xgb.DMatrix(held)) / m0.predict(held) - 1)) < 1e-5


def test_huber_no_worse_than_pseudohuber(features):
    # No built-in twin: reg:pseudohubererror is a smooth approximation of the Huber loss.  Both
    # are scored by the held-out Huber loss rho_delta((y - m) / s) with the same threshold
    # delta * s in units of y (huber_slope = delta * s).
    X, f = features
    y = _scenario("huber", X, f)
    delta, s = 1.345, 3.0
    dtrain = xgb.DMatrix(X[:N_TRAIN], label=y[:N_TRAIN])
    reference = xgb.train({**PARAMS, "objective": "reg:pseudohubererror", "huber_slope": delta * s}, dtrain, ROUNDS)
    ours = lx.train(lossfam.family("huber", delta=delta, scale=s), PARAMS, dtrain, ROUNDS)
    yte = y[N_TRAIN:]
    s_ref = float(np.mean(huber_rho((yte - reference.predict(xgb.DMatrix(X[N_TRAIN:]))) / s, delta)))
    s_ours = float(np.mean(huber_rho((yte - ours.predict(X[N_TRAIN:])) / s, delta)))
    assert s_ours <= s_ref, (s_ours, s_ref)


def test_surrogate_alone_is_worse_than_refit(features):
    # Documents why the leaf refit exists: the IRLS surrogate alone stops short of the median.
    X, f = features
    y = _scenario("laplace", X, f)
    dtrain = xgb.DMatrix(X[:N_TRAIN], label=y[:N_TRAIN])
    yte, Xte = y[N_TRAIN:], X[N_TRAIN:]
    plain = lx.train("laplace", PARAMS, dtrain, 30, leaf_refit=False)
    refit = lx.train("laplace", PARAMS, dtrain, 30)
    mae = [float(np.mean(np.abs(yte - m.predict(Xte)))) for m in (plain, refit)]
    assert mae[1] < mae[0]


# --------------------------------------------------------------------- engine wiring

def test_import_lossfam_does_not_import_xgboost():
    code = (
        "import sys, lossfam, lossfam.xgboost as lx\n"
        "assert 'xgboost' not in sys.modules, 'import lossfam pulled in xgboost'\n"
        "lx.objective('poisson')\n"
        "assert 'xgboost' in sys.modules\n"
    )
    subprocess.run([sys.executable, "-c", code], check=True)


def test_missing_engine_names_the_extra(monkeypatch):
    monkeypatch.setitem(sys.modules, "xgboost", None)  # makes `import xgboost` raise ImportError
    with pytest.raises(ImportError, match=r'pip install "lossfam\[xgboost\]"'):
        lx.objective("poisson")


@pytest.mark.parametrize("name", lossfam.available())
def test_objective_call_styles_agree_with_family(name):
    rng = np.random.default_rng(11)
    n = 200
    fam = lossfam.family(name)
    y = _scenario(name if name != "huber" else "gaussian", rng.normal(size=(n, 6)), rng.normal(size=n), seed=3)
    y = y.astype(np.float32).astype(float)  # a DMatrix stores labels and weights in float32
    raw = fam.baseline(y) + 0.1 * rng.normal(size=n)
    w = rng.uniform(0.5, 2.0, n).astype(np.float32).astype(float)
    obj = lx.objective(fam, step_cap=None)
    d = xgb.DMatrix(np.zeros((n, 1)), label=y, weight=w)
    g1, h1 = obj(raw.astype(np.float32), d)
    g2, h2 = obj(y, raw.astype(np.float32), sample_weight=w)
    g0, h0 = fam.grad_hess(y, raw.astype(np.float32).astype(float), weight=w)
    factor = fam.params.get("scale", 1.0) ** 2 if not fam.exact_hessian else 1.0
    np.testing.assert_allclose(g1, g0 * factor, rtol=1e-12)
    np.testing.assert_allclose(h1, h0 * factor, rtol=1e-12)
    np.testing.assert_array_equal(g1, g2)
    np.testing.assert_array_equal(h1, h2)


def test_step_cap_bounds_every_leaf_step():
    # One round, learning rate 1, no L2 shrinkage: a leaf's value is -G/H and the cap bounds it.
    rng = np.random.default_rng(5)
    n = 2000
    X = rng.normal(size=(n, 3))
    y = np.zeros(n)
    y[rng.choice(n, 5, replace=False)] = 3.0
    d = xgb.DMatrix(X, label=y)
    p = {"eta": 1.0, "lambda": 0.0, "min_child_weight": 0.0, "max_depth": 8, "nthread": 2}
    model = lx.train("poisson", p, d, 1, step_cap=0.5)
    step = model.predict_raw(X) - model.baseline
    assert np.max(np.abs(step)) <= 0.5 + 1e-6
    # without the guard the same problem blows up (tiny mean, positive count: Newton step y/mu)
    with pytest.raises(ValueError, match="NaN, infinite or negative"):
        lx.train("poisson", p, d, 60, step_cap=None)
    guarded = lx.train("poisson", p, d, 60)
    assert np.all(np.isfinite(guarded.predict(X)))


def test_zero_hessian_is_not_passed_to_the_engine():
    obj = lx.objective("poisson", step_cap=None)
    y = np.array([0.0, 2.0, 1.0])
    g, h = obj(y, np.array([-800.0, -800.0, 0.0]))  # e^-800 underflows to a zero Hessian
    assert h[0] == 0.0 and g[0] == 0.0  # an exact fit: nothing to move
    assert g[1] == -2.0 and h[1] == 2.0  # unit Newton step instead of a row the engine would ignore
    assert h[2] == 1.0


def test_nan_prediction_is_reported_with_rows():
    obj = lx.objective("gaussian")
    with pytest.raises(ValueError, match=r"rows \[1\]"):
        obj(np.array([0.0, 1.0]), np.array([0.0, np.nan]))


def test_bad_targets_are_refused_with_rows():
    d = xgb.DMatrix(np.zeros((3, 1)), label=np.array([1.0, -2.0, 0.0]))
    with pytest.raises(ValueError, match=r"poisson: y must be finite and >= 0; 1 row outside, e.g. row \[1\]"):
        lx.train("poisson", {"nthread": 1}, d, 2)


@pytest.mark.parametrize("key", ["objective", "base_score"])
def test_params_owned_by_lossfam_are_refused(key):
    d = xgb.DMatrix(np.zeros((3, 1)), label=np.ones(3))
    with pytest.raises(ValueError, match="set by lossfam"):
        lx.train("gaussian", {key: 0.5}, d, 1)


def test_metric_matches_scipy_and_names_the_log():
    rng = np.random.default_rng(2)
    n = 3000
    X = rng.normal(size=(n, 3))
    y = rng.poisson(np.exp(0.5 * X[:, 0])).astype(float)
    w = rng.integers(1, 4, n).astype(float)
    dtr = xgb.DMatrix(X[:2000], label=y[:2000], weight=w[:2000])
    dva = xgb.DMatrix(X[2000:], label=y[2000:], weight=w[2000:])
    history = {}
    model = lx.train("poisson", {**PARAMS, "max_depth": 3}, dtr, 20, evals=[(dva, "valid")],
                     evals_result=history, verbose_eval=False)
    logged = history["valid"]["poisson_nll"]
    assert len(logged) == 20
    mu = model.predict(X[2000:])
    expected = -np.average(stats.poisson.logpmf(y[2000:], mu), weights=w[2000:])  # scipy.stats reference
    assert logged[-1] == pytest.approx(expected, rel=1e-5)
    dev = lx.metric("poisson", kind="deviance")
    assert dev.__name__ == "poisson_deviance"
    assert dev(y[2000:], np.log(mu), sample_weight=w[2000:]) == pytest.approx(
        np.average(lossfam.family("poisson").deviance(y[2000:], np.log(mu)), weights=w[2000:]))


@pytest.mark.parametrize("name", ["poisson", "laplace"])
def test_early_stopping_on_the_metric(name):
    # A small noisy sample and deep, unshrunk trees: the held-out nll turns up and stops training.
    rng = np.random.default_rng(9)
    n = 600
    X = rng.normal(size=(n, 4))
    y = _scenario(name, X, 0.3 * X[:, 0], seed=4)
    dtr = xgb.DMatrix(X[:400], label=y[:400])
    dva = xgb.DMatrix(X[400:], label=y[400:])
    history = {}
    model = lx.train(name, {"max_depth": 8, "eta": 0.8, "nthread": 2, "min_child_weight": 0.0}, dtr, 200,
                     evals=[(dva, "valid")], evals_result=history, early_stopping_rounds=5, verbose_eval=False)
    logged = history["valid"][f"{name}_nll"]
    assert len(logged) < 200
    assert model.best_iteration == int(np.argmin(logged))
    assert len(logged) == model.best_iteration + 6
    assert model.booster.num_boosted_rounds() == model.best_iteration + 1
    # the returned model is the best one: its held-out nll is the logged minimum
    fam = model.fitted_family.with_params(**model.family.params) if model.family.params else model.family
    value = lx.metric(fam)(y[400:], model.predict_raw(X[400:]))
    assert value == pytest.approx(min(logged), rel=1e-4)


def test_sklearn_regressor_with_weights_matches_train():
    rng = np.random.default_rng(4)
    n = 2000
    X = rng.normal(size=(n, 3))
    y = rng.poisson(np.exp(0.4 * X[:, 0] - 0.2 * X[:, 1])).astype(float)
    w = rng.uniform(0.5, 2.0, n)
    fam = lossfam.family("poisson")
    b = fam.baseline(y, w)
    reg = xgb.XGBRegressor(objective=lx.objective(fam), eval_metric=lx.metric(fam), n_estimators=15,
                           max_depth=3, learning_rate=0.3, base_score=b, n_jobs=2, disable_default_eval_metric=1)
    reg.fit(X, y, sample_weight=w, eval_set=[(X, y)], sample_weight_eval_set=[w], verbose=False)
    assert list(reg.evals_result()["validation_0"]) == ["poisson_nll"]
    model = lx.train(fam, {"max_depth": 3, "eta": 0.3, "nthread": 2}, xgb.DMatrix(X, label=y, weight=w), 15)
    np.testing.assert_allclose(reg.predict(X), model.predict_raw(X), rtol=1e-5, atol=1e-5)


@pytest.mark.parametrize("name", ["gaussian", "poisson", "laplace"])
def test_weights_equal_repeated_rows(name):
    # Exact greedy splits see the same gradient sums either way.
    rng = np.random.default_rng(8)
    n = 800
    X = rng.normal(size=(n, 3))
    y = _scenario(name, X, 0.5 * X[:, 0], seed=1)
    reps = rng.integers(1, 4, n)
    p = {"tree_method": "exact", "max_depth": 3, "eta": 0.3, "nthread": 2}
    weighted = lx.train(name, p, xgb.DMatrix(X, label=y, weight=reps.astype(float)), 20)
    idx = np.repeat(np.arange(n), reps)
    repeated = lx.train(name, p, xgb.DMatrix(X[idx], label=y[idx]), 20)
    assert weighted.baseline == repeated.baseline
    np.testing.assert_allclose(weighted.predict(X), repeated.predict(X), rtol=1e-4, atol=1e-4)


def test_refit_leaves_are_the_residual_quantiles():
    # One tree, learning rate 1: every leaf holds the tau-quantile of y - baseline of its rows
    # (numpy quantile with the inverted-cdf rule as the reference).
    rng = np.random.default_rng(6)
    n = 3000
    X = rng.normal(size=(n, 2))
    y = 2.0 * X[:, 0] + rng.standard_t(2, size=n)
    tau = 0.9
    model = lx.train(lossfam.family("asymmetric_laplace", quantile=tau), {"eta": 1.0, "max_depth": 2, "nthread": 2},
                     xgb.DMatrix(X, label=y), 1)
    assert model.baseline == np.float32(np.quantile(y, tau, method="inverted_cdf"))
    leaves = model.booster.predict(xgb.DMatrix(X), pred_leaf=True).reshape(-1)
    step = model.predict_raw(X) - model.baseline
    for leaf in np.unique(leaves):
        rows = leaves == leaf
        expected = np.quantile(y[rows] - model.baseline, tau, method="inverted_cdf")
        np.testing.assert_allclose(step[rows], expected, rtol=1e-5, atol=1e-5)


# --------------------------------------------------------------------- offset

def test_poisson_offset_recovers_the_rate():
    # Claims with exposure: counts ~ Poisson(exposure * rate(x)); the model sees log exposure
    # as base_margin and should predict the rate per unit of exposure.
    rng = np.random.default_rng(12)
    n = 8000
    X = rng.uniform(-1, 1, size=(n, 2))
    exposure = rng.uniform(0.1, 5.0, n)
    rate = np.exp(-1.0 + 0.8 * X[:, 0])
    y = rng.poisson(exposure * rate).astype(float)
    off = np.log(exposure)
    d = xgb.DMatrix(X, label=y, base_margin=off)
    dv = xgb.DMatrix(X[:1000], label=y[:1000], base_margin=off[:1000])
    history = {}
    model = lx.train("poisson", {"max_depth": 2, "eta": 0.2, "nthread": 2}, d, 60, evals=[(dv, "valid")],
                     evals_result=history, verbose_eval=False)
    # closed-form baseline given the offset: log(sum y / sum exposure)
    assert model.baseline == pytest.approx(np.log(y.sum() / exposure.sum()), abs=1e-6)
    np.testing.assert_array_equal(d.get_base_margin(), off.astype(np.float32))  # the user's offset is back
    est = model.predict(X)  # rate per unit exposure
    assert np.median(np.abs(np.log(est / rate))) < 0.1
    np.testing.assert_allclose(model.predict(X, offset=off), exposure * est, rtol=1e-5)
    # the logged validation nll used offset + baseline
    expected = -np.mean(stats.poisson.logpmf(y[:1000], model.predict(X[:1000], offset=off[:1000])))
    assert history["valid"]["poisson_nll"][-1] == pytest.approx(expected, rel=1e-5)
    # without the offset the fitted rate is off by the exposure pattern
    plain = lx.train("poisson", {"max_depth": 2, "eta": 0.2, "nthread": 2}, xgb.DMatrix(X, label=y), 60)
    assert np.median(np.abs(np.log(plain.predict(X) / rate))) > 0.3


def test_offset_is_restored_when_training_fails():
    rng = np.random.default_rng(1)
    X = rng.normal(size=(100, 2))
    off = rng.normal(size=100)
    d = xgb.DMatrix(X, label=rng.poisson(1.0, 100).astype(float), base_margin=off)

    def broken_metric(preds, dmatrix):
        raise RuntimeError("metric failed")

    with pytest.raises(RuntimeError, match="metric failed"):
        lx.train("poisson", {"nthread": 1}, d, 3, evals=[(d, "train")], custom_metric=broken_metric)
    np.testing.assert_array_equal(d.get_base_margin(), off.astype(np.float32))


def test_distribution_uses_parameters_fitted_on_training_data(features):
    X, f = features
    X, f = X[:5000], f[:5000]
    y = _scenario("gamma", X, f)
    model = lx.train("gamma", PARAMS, xgb.DMatrix(X, label=y), 60)
    raw = model.predict_raw(X)
    expected = lossfam.family("gamma").fit_nuisance(y, raw)
    assert model.fitted_family.shape == pytest.approx(expected.shape, rel=1e-6)
    assert model.fitted_family.shape == pytest.approx(2.0, rel=0.15)  # the simulated shape
    law = model.distribution(X[:10])
    np.testing.assert_allclose(law.mean(), model.predict(X[:10]), rtol=1e-12)


# --------------------------------------------------------------------- save / load

_LOADER = """
import sys, numpy as np, lossfam.xgboost as lx
X = np.load(sys.argv[2])
off = np.load(sys.argv[3])
m = lx.load(sys.argv[1])
np.save(sys.argv[4], m.predict(X))
np.save(sys.argv[5], m.predict(X, offset=off))
print(m.fitted_family.params)
"""


@pytest.mark.parametrize("name", ["poisson", "asymmetric_laplace", "gaussian"])
def test_save_load_fresh_process_is_bit_identical(tmp_path, name):
    rng = np.random.default_rng(21)
    n = 1500
    X = rng.normal(size=(n, 4))
    y = _scenario(name, X, 0.5 * X[:, 0], seed=2)
    off = 0.1 * rng.normal(size=n)
    early = {"evals": [(xgb.DMatrix(X[:300], label=y[:300], base_margin=off[:300]), "v")],
             "early_stopping_rounds": 3, "verbose_eval": False}
    model = lx.train(name, {"max_depth": 3, "eta": 0.3, "nthread": 2}, xgb.DMatrix(X, label=y, base_margin=off), 30,
                     **early)
    path = tmp_path / "model.json"
    model.save(path)
    np.save(tmp_path / "X.npy", X)
    np.save(tmp_path / "off.npy", off)
    out = subprocess.run([sys.executable, "-c", _LOADER, str(path), str(tmp_path / "X.npy"), str(tmp_path / "off.npy"),
                          str(tmp_path / "p.npy"), str(tmp_path / "po.npy")], check=True, capture_output=True, text=True)
    p, po = np.load(tmp_path / "p.npy"), np.load(tmp_path / "po.npy")
    assert p.dtype == po.dtype == np.float64
    assert p.tobytes() == model.predict(X).tobytes()
    assert po.tobytes() == model.predict(X, offset=off).tobytes()
    assert eval(out.stdout.strip()) == model.fitted_family.params  # a printed dict of floats
    again = lx.load(path)
    assert again.baseline == model.baseline and again.best_iteration == model.best_iteration


def _saved(tmp_path):
    rng = np.random.default_rng(0)
    X = rng.normal(size=(200, 2))
    model = lx.train("gaussian", {"nthread": 1}, xgb.DMatrix(X, label=X[:, 0] + rng.normal(size=200)), 5)
    path = tmp_path / "m.json"
    model.save(path)
    return path


def test_truncated_file_is_refused(tmp_path):
    path = _saved(tmp_path)
    text = path.read_text()
    path.write_text(text[: len(text) // 2])
    with pytest.raises(ValueError, match="truncated or corrupted"):
        lx.load(path)


def test_corrupted_engine_model_is_refused(tmp_path):
    path = _saved(tmp_path)
    doc = json.loads(path.read_text())
    doc["model"] = doc["model"][: len(doc["model"]) // 2]
    path.write_text(json.dumps(doc))
    with pytest.raises(ValueError, match="corrupted or not an XGBoost model"):
        lx.load(path)


def test_edited_baseline_is_refused(tmp_path):
    path = _saved(tmp_path)
    doc = json.loads(path.read_text())
    doc["baseline"] += 1.0
    path.write_text(json.dumps(doc))
    with pytest.raises(ValueError, match="disagrees with the booster's base_score"):
        lx.load(path)


def test_foreign_files_are_refused(tmp_path):
    rng = np.random.default_rng(0)
    bst = xgb.train({"nthread": 1}, xgb.DMatrix(rng.normal(size=(50, 2)), label=rng.normal(size=50)), 2)
    plain = tmp_path / "plain.json"
    bst.save_model(plain)
    with pytest.raises(ValueError, match="not a lossfam model file"):
        lx.load(plain)
    other = tmp_path / "other.json"
    doc = json.loads(_saved(tmp_path).read_text())
    doc["engine"] = "lightgbm"
    other.write_text(json.dumps(doc))
    with pytest.raises(ValueError, match="lossfam.lightgbm.load"):
        lx.load(other)


def test_predict_on_dataframe_checks_offset_length():
    pd = pytest.importorskip("pandas")
    rng = np.random.default_rng(3)
    X = pd.DataFrame(rng.normal(size=(300, 3)), columns=["age", "km", "power"])
    y = rng.poisson(np.exp(0.3 * X["age"].to_numpy())).astype(float)
    model = lx.train("poisson", {"nthread": 1, "max_depth": 2}, xgb.DMatrix(X, label=y), 10)
    np.testing.assert_allclose(model.predict(X), model.predict(X.to_numpy()), rtol=0)
    with pytest.raises(ValueError, match="offset has 2 rows but X has 300"):
        model.predict(X, offset=[0.0, 1.0])
