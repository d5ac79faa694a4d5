"""XGBoost-specific tests of lossfam.xgboost (the contract shared with LightGBM is in
test_engine_contract.py; parity with the built-in objectives on real data in test_engine_parity.py).

Outside references: XGBoost's own built-in objectives with the same parameters and rounds,
scipy.stats log densities, numpy quantiles, closed-form Poisson rates.  Simulated data (demo
scenario of our own): f = 0.6 x0 - 0.4 x1^2 + 0.3 sin(2 x2) + 0.2 x3 x4 in six Gaussian features,
numpy Generator seeded; each family draws its target around f (see ``_scenario``).
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

import lossfam

xgb = pytest.importorskip("xgboost")
lx = pytest.importorskip("lossfam.xgboost")

from lossfam._boost.gradients import FarStartWarning  # noqa: E402
from lossfam.families.huber import huber_rho  # noqa: E402

PARAMS = {"max_depth": 4, "eta": 0.1, "nthread": 1, "tree_method": "hist"}


def _scenario(name, n=3000, seed=7):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, 6))
    f = 0.6 * X[:, 0] - 0.4 * X[:, 1] ** 2 + 0.3 * np.sin(2 * X[:, 2]) + 0.2 * X[:, 3] * X[:, 4]
    y = {
        "gaussian": lambda: 3.0 + 2.0 * f + rng.normal(size=n),
        "laplace": lambda: 10.0 + 5.0 * f + 3.0 * rng.laplace(size=n),
        "huber": lambda: 10.0 + 5.0 * f + 3.0 * rng.standard_t(3, size=n),
        "poisson": lambda: rng.poisson(np.exp(0.5 + f)).astype(float),
        "gamma": lambda: rng.gamma(2.0, np.exp(1.0 + f) / 2.0),
        "bernoulli": lambda: (rng.uniform(size=n) < 1.0 / (1.0 + np.exp(-2.0 * f))).astype(float),
    }[name]()
    return X, y


# --------------------------------------------------------------------------- native twins
def test_poisson_default_is_count_poisson_and_reloads_identically(tmp_path):
    # the default guard is count:poisson's own (Hessian x e^0.7, leaves clipped at 0.7), so the
    # default trains on count:poisson; its base_score is a mean, and save/load must keep it so
    X, y = _scenario("poisson")
    model = lx.train("poisson", PARAMS, xgb.DMatrix(X[:2000], label=y[:2000]), 30)
    assert model.info["objective"] == "count:poisson"
    ref = xgb.train(dict(PARAMS, objective="count:poisson", base_score=float(np.exp(model.baseline))),
                    xgb.DMatrix(X[:2000], label=y[:2000]), 30)
    held = X[2000:]
    np.testing.assert_allclose(model.predict(held), ref.predict(xgb.DMatrix(held)), rtol=1e-5)
    model.save(tmp_path / "m.json")
    again = lossfam.load(tmp_path / "m.json")
    assert again.predict(held).tobytes() == model.predict(held).tobytes()
    assert again.baseline == model.baseline


def test_huber_no_worse_than_pseudohuber():
    # No built-in twin: reg:pseudohubererror is a smooth approximation of the Huber loss.  Both are
    # scored by the held-out Huber loss rho_delta((y - m) / s) with the same threshold delta * s
    # (huber_slope = delta * s); s is the scale lossfam pre-fits at the baseline.
    X, y = _scenario("huber", n=12000)
    ours = lx.train(lossfam.family("huber"), PARAMS, xgb.DMatrix(X[:8000], label=y[:8000]), 100)
    delta, s = ours.family.delta, ours.family.scale
    reference = xgb.train({**PARAMS, "objective": "reg:pseudohubererror", "huber_slope": delta * s},
                          xgb.DMatrix(X[:8000], label=y[:8000]), 100)
    yte = y[8000:]
    s_ref = float(np.mean(huber_rho((yte - reference.predict(xgb.DMatrix(X[8000:]))) / s, delta)))
    s_ours = float(np.mean(huber_rho((yte - ours.predict(X[8000:])) / s, delta)))
    assert s_ours <= s_ref, (s_ours, s_ref)


def test_refit_leaves_are_the_residual_quantiles_grown_on_a_unit_hessian():
    # One tree, learning rate 1: every leaf holds the tau-quantile of y - baseline of its rows
    # (numpy quantile, "weibull" rule: XGBoost's own renewal on unweighted rows), and the split is
    # the one reg:quantileerror's unit-Hessian recipe finds (same first split as the built-in);
    # the baseline is XGBoost's own start, its "weibull" quantile of the labels in single precision
    # (bit for bit: tests/test_engine_contract.py)
    rng = np.random.default_rng(6)
    n = 3000
    X = rng.normal(size=(n, 2))
    y = 2.0 * X[:, 0] + rng.standard_t(2, size=n)
    tau = 0.9
    p = {"eta": 1.0, "max_depth": 2, "nthread": 1}
    model = lx.train(lossfam.family("asymmetric_laplace", quantile=tau), p, xgb.DMatrix(X, label=y), 1, native=False)
    y32 = y.astype(np.float32).astype(np.float64)  # the labels XGBoost stores
    assert model.baseline == pytest.approx(np.quantile(y32, tau, method="weibull"), rel=1e-6)
    leaves = model.booster.predict(xgb.DMatrix(X), pred_leaf=True).reshape(-1)
    step = model.predict_raw(X) - model.baseline
    for leaf in np.unique(leaves):
        rows = leaves == leaf
        expected = np.quantile(y[rows] - model.baseline, tau, method="weibull")
        np.testing.assert_allclose(step[rows], expected, rtol=1e-5, atol=1e-5)
    ref = xgb.train(dict(p, objective="reg:quantileerror", quantile_alpha=tau, base_score=model.baseline),
                    xgb.DMatrix(X, label=y), 1)
    assert ref.get_dump()[0].splitlines()[0] == model.booster.get_dump()[0].splitlines()[0]


# --------------------------------------------------------------------------- the bare objective
def test_zero_hessian_is_not_passed_to_the_engine():
    obj = lx.objective("poisson", step_limit=None)
    y = np.array([0.0, 2.0, 1.0])
    g, h = obj(y, np.array([-800.0, -800.0, 0.0]))  # e^-800 underflows to a zero Hessian
    assert h[0] == 0.0 and g[0] == 0.0  # an exact fit: nothing to move
    assert g[1] == -2.0 and h[1] == 2.0  # unit Newton step instead of a row the engine would ignore
    assert h[2] == 1.0


def test_nan_prediction_is_reported_with_rows():
    obj = lx.objective("gaussian")
    with pytest.raises(ValueError, match=r"rows? \[1\]"):
        obj(np.array([0.0, 1.0]), np.array([0.0, np.nan]))


def test_objective_started_far_from_the_baseline_warns():
    X, y = _scenario("poisson", n=500)
    y = y + 300.0
    with pytest.warns(FarStartWarning, match="base_score"):
        xgb.XGBRegressor(objective=lx.objective("poisson"), n_estimators=2, base_score=0.0, n_jobs=1).fit(X, y)


def test_sklearn_regressor_with_weights_matches_train():
    X, y = _scenario("poisson", n=2000, seed=4)
    w = np.random.default_rng(4).uniform(0.5, 2.0, y.size)
    fam = lossfam.family("poisson")
    model = lx.train(fam, {"max_depth": 3, "eta": 0.3, "nthread": 1}, xgb.DMatrix(X, label=y, weight=w), 15,
                     native=False)
    reg = xgb.XGBRegressor(objective=lx.objective(fam), eval_metric=lx.metric(fam), n_estimators=15,
                           max_depth=3, learning_rate=0.3, base_score=model.baseline, n_jobs=1,
                           max_delta_step=0.7, disable_default_eval_metric=1)
    reg.fit(X, y, sample_weight=w, eval_set=[(X, y)], sample_weight_eval_set=[w], verbose=False)
    assert list(reg.evals_result()["validation_0"]) == ["poisson_nll"]
    np.testing.assert_allclose(reg.predict(X), model.predict_raw(X), rtol=1e-5, atol=1e-5)


# --------------------------------------------------------------------------- train and predict
@pytest.mark.parametrize("name, native", [("poisson", True), ("laplace", False), ("laplace", True)])
def test_early_stopping_sets_best_iteration_and_cuts_the_model(name, native):
    X, y = _scenario(name, n=600, seed=9)
    dtr, dva = xgb.DMatrix(X[:400], label=y[:400]), xgb.DMatrix(X[400:], label=y[400:])
    history = {}
    model = lx.train(name, {"max_depth": 8, "eta": 0.8, "nthread": 1, "min_child_weight": 0.0}, dtr, 200,
                     evals=[(dva, "valid")], evals_result=history, early_stopping_rounds=5, verbose_eval=False,
                     native=native)
    logged = history["valid"][f"{name}_nll"]
    assert len(logged) < 200 and model.best_iteration == int(np.argmin(logged))
    assert model.booster.num_boosted_rounds() == model.best_iteration + 1
    value = lx.metric(model.family)(y[400:], model.predict_raw(X[400:]))
    assert value == pytest.approx(min(logged), rel=1e-4)


def test_predict_accepts_dmatrix_numpy_and_pandas():
    pd = pytest.importorskip("pandas")
    X, y = _scenario("gamma", n=800)
    off = 0.1 * np.random.default_rng(3).normal(size=y.size)
    frame = pd.DataFrame(X, columns=[f"f{i}" for i in range(6)])
    model = lx.train("gamma", PARAMS, xgb.DMatrix(frame, label=y, base_margin=off), 10)
    a = model.predict(frame, offset=off)
    np.testing.assert_allclose(model.predict(X, offset=off), a, rtol=1e-6)
    # a DMatrix's base_margin is its offset, as in training; it is left as it was
    dm = xgb.DMatrix(frame, base_margin=off)
    np.testing.assert_allclose(model.predict(dm), a, rtol=1e-6)
    np.testing.assert_array_equal(dm.get_base_margin(), off.astype(np.float32))
    np.testing.assert_allclose(model.predict(xgb.DMatrix(frame), offset=off), a, rtol=1e-6)
    np.testing.assert_allclose(model.predict(xgb.DMatrix(frame)), model.predict(frame), rtol=1e-6)
    with pytest.raises(ValueError, match="offset has 2 rows but X has 800"):
        model.predict(frame, offset=[0.0, 1.0])


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


@pytest.mark.parametrize("name", ["gamma", "poisson"])
@pytest.mark.parametrize("native", [True, False])
def test_learning_rate_1e4_is_refused_naming_rows(name, native):
    X, y = _scenario(name, n=500)
    with pytest.raises(ValueError, match=r"rows? \[\d"):
        lx.train(name, {"eta": 1e4, "nthread": 1}, xgb.DMatrix(X, label=y), 20, native=native)


def test_bad_input_is_refused_with_rows():
    d = xgb.DMatrix(np.zeros((3, 1)), label=np.array([1.0, -2.0, 0.0]))
    with pytest.raises(ValueError, match=r"poisson: y must be finite and >= 0; 1 row outside, e.g. row \[1\]"):
        lx.train("poisson", {"nthread": 1}, d, 2)
    for key in ("objective", "base_score"):
        with pytest.raises(ValueError, match="set by lossfam"):
            lx.train("gaussian", {key: 0.5}, xgb.DMatrix(np.zeros((3, 1)), label=np.ones(3)), 1)
    with pytest.raises(ValueError, match="max_delta_step"):
        lx.train("poisson", {"max_delta_step": 0.1}, xgb.DMatrix(np.zeros((3, 1)), label=np.ones(3)), 1)


def test_metric_in_the_sklearn_call_style_is_the_mean_nll_or_deviance():
    dev = lx.metric("poisson", kind="deviance")
    y = np.array([0.0, 1.0, 4.0])
    raw = np.log(np.array([0.5, 1.5, 3.0]))
    assert dev.__name__ == "poisson_deviance"
    assert dev(y, raw) == pytest.approx(np.mean(lossfam.family("poisson").deviance(y, raw)))
    # scipy.stats.poisson log-mass as the reference of the nll
    assert lx.metric("poisson")(y, raw) == pytest.approx(-np.mean(stats.poisson.logpmf(y, np.exp(raw))))
