"""LightGBM-specific tests of lossfam.lightgbm (the contract shared with XGBoost is in
test_engine_contract.py; parity with the built-in objectives on real data in test_engine_parity.py).

Simulated data (seeded numpy Generator, documented in ``_simulate``) stands in for a real
problem; held-out scores come from scikit-learn's metric functions or scipy.stats.
"""
import warnings

import numpy as np
import pytest

lgb = pytest.importorskip("lightgbm")
from scipy import stats  # noqa: E402
from sklearn import metrics as skm  # noqa: E402

import lossfam  # noqa: E402
from lossfam import lightgbm as lfl  # noqa: E402
from lossfam._boost.gradients import FarStartWarning  # noqa: E402

PARAMS = dict(learning_rate=0.1, num_leaves=15, min_data_in_leaf=20, verbosity=-1,
              num_threads=1, seed=3, deterministic=True, force_row_wise=True)
# one thread: on a shared 2-core machine OpenMP barriers with 2 threads stall badly under load


def _simulate(kind, n_train=4000, n_test=2000, seed=20261201):
    """Features x ~ N(0, I_6); s(x) = sin(1.5 x0) + 0.8 x1 1[x2 > 0] + 0.3 x3^2 - 0.4 x4.
    gaussian: y = 10 + 3 s + N(0, 1.5^2); laplace: 10 + 3 s + Laplace(1); poisson: Poisson(exp(0.6 s));
    gamma: Gamma(shape 3, mean exp(0.6 s)); bernoulli: Bernoulli(expit(1.5 s - 0.3))."""
    rng = np.random.default_rng(seed)
    n = n_train + n_test
    X = rng.normal(size=(n, 6))
    s = np.sin(1.5 * X[:, 0]) + 0.8 * X[:, 1] * (X[:, 2] > 0) + 0.3 * X[:, 3] ** 2 - 0.4 * X[:, 4]
    y = {
        "gaussian": lambda: 10 + 3 * s + rng.normal(scale=1.5, size=n),
        "laplace": lambda: 10 + 3 * s + rng.laplace(scale=1.0, size=n),
        "poisson": lambda: rng.poisson(np.exp(0.6 * s)).astype(float),
        "gamma": lambda: rng.gamma(3.0, np.exp(0.6 * s) / 3.0),
        "bernoulli": lambda: (rng.uniform(size=n) < 1 / (1 + np.exp(-(1.5 * s - 0.3)))).astype(float),
    }[kind]()
    return X[:n_train], y[:n_train], X[n_train:], y[n_train:]


# --------------------------------------------------------------------------- the bare objective
def test_objective_serves_lgb_train_and_the_sklearn_estimator():
    Xtr, ytr, Xte, _ = _simulate("poisson")
    fam = lossfam.family("poisson")
    base = fam.baseline(ytr)
    obj = lfl.objective(fam)
    w = np.random.default_rng(5).uniform(0.5, 2.0, ytr.size)
    b = lgb.train(dict(PARAMS, objective=obj), lgb.Dataset(Xtr, ytr, weight=w, init_score=np.full(ytr.size, base)), 20)
    est = lgb.LGBMRegressor(objective=obj, n_estimators=20, **{k: v for k, v in PARAMS.items() if k != "seed"},
                            random_state=PARAMS["seed"])
    est.fit(Xtr, ytr, sample_weight=w, init_score=np.full(ytr.size, base))
    np.testing.assert_allclose(est.predict(Xte, raw_score=True), b.predict(Xte, raw_score=True), rtol=0, atol=1e-12)
    # the default guard is the built-in poisson's damping: Hessian e^(raw + 0.7)
    raw = np.full(ytr.size, base)
    g, h = obj(ytr, raw, w, None)
    g_ref, h_ref = fam.grad_hess(ytr, raw, w)
    np.testing.assert_allclose(g, g_ref, rtol=1e-12)
    np.testing.assert_allclose(h, h_ref * np.exp(0.7), rtol=1e-12)
    # and the same trees as LightGBM's own poisson objective from the same start
    ref = lgb.train(dict(PARAMS, objective="poisson"), lgb.Dataset(Xtr, ytr, weight=w,
                                                                   init_score=np.full(ytr.size, base)), 20)
    np.testing.assert_allclose(ref.predict(Xte, raw_score=True), b.predict(Xte, raw_score=True), atol=1e-6)


def test_objective_started_far_from_the_baseline_warns_with_the_fix():
    # repair counts around 341 and 21 per site: LightGBM starts a custom objective at raw score 0
    rng = np.random.default_rng(1)
    X = rng.normal(size=(600, 3))
    y = rng.poisson(np.where(X[:, 0] > 0, 341.0, 21.0)).astype(float)
    obj = lfl.objective("poisson")
    with pytest.warns(FarStartWarning, match=r"baseline is 4\.|init_score"):
        lgb.LGBMRegressor(objective=obj, n_estimators=3, verbose=-1, n_jobs=1).fit(X, y)
    # started at the baseline: silent
    with warnings.catch_warnings():
        warnings.simplefilter("error", FarStartWarning)
        base = lossfam.family("poisson").baseline(y)
        lgb.LGBMRegressor(objective=lfl.objective("poisson"), n_estimators=3, verbose=-1, n_jobs=1).fit(
            X, y, init_score=np.full(y.size, base))


def test_metric_reads_raw_scores_under_the_builtin_twin():
    # the native twin (binary) hands a metric probabilities; the nll must still be the family's
    Xtr, ytr, Xte, yte = _simulate("bernoulli")
    log = {}
    model = lfl.train("bernoulli", PARAMS, lgb.Dataset(Xtr, ytr), 30, valid_sets=[lgb.Dataset(Xte, yte)],
                      callbacks=[lgb.record_evaluation(log)])
    assert model.info["objective"] == "binary"
    p = model.predict(Xte)
    assert log["valid_0"]["bernoulli_nll"][-1] == pytest.approx(skm.log_loss(yte, p), rel=1e-9)


def test_metric_drives_early_stopping_and_best_iteration():
    Xtr, ytr, Xte, yte = _simulate("poisson")
    evals = {}
    model = lfl.train("poisson", dict(PARAMS, learning_rate=0.5, num_leaves=63, min_data_in_leaf=5),
                      lgb.Dataset(Xtr, ytr), 300, valid_sets=[lgb.Dataset(Xte, yte)], valid_names=["held_out"],
                      callbacks=[lgb.record_evaluation(evals), lgb.early_stopping(5, verbose=False)])
    curve = evals["held_out"]["poisson_nll"]
    best = int(np.argmin(curve))
    assert len(curve) < 300 and model.best_iteration == best and model.booster.num_trees() == best + 1
    # the reported value is the mean of scipy.stats.poisson's -logpmf at the model's mean
    assert curve[best] == pytest.approx(-np.mean(stats.poisson.logpmf(yte, model.predict(Xte))), rel=1e-9)
    met = lfl.metric("poisson", kind="deviance")
    name, value, higher = met(yte, model.predict_raw(Xte), None)
    assert (name, higher) == ("poisson_deviance", False)
    assert value == pytest.approx(skm.mean_poisson_deviance(yte, model.predict(Xte)), rel=1e-9)


def test_metric_in_the_sklearn_estimator_eval_log():
    Xtr, ytr, Xte, yte = _simulate("gamma")
    fam = lossfam.family("gamma", shape=3.0)
    est = lgb.LGBMRegressor(objective=lfl.objective(fam), n_estimators=20, metric="None", verbosity=-1,
                            n_jobs=1, random_state=1)
    base = fam.baseline(ytr)
    est.fit(Xtr, ytr, init_score=np.full(ytr.size, base), eval_X=(Xte,), eval_y=(yte,),
            eval_init_score=[np.full(yte.size, base)], eval_metric=lfl.metric(fam))
    log = est.evals_result_["valid_0"]["gamma_nll"]
    raw = base + est.predict(Xte, raw_score=True)
    # scipy.stats.gamma with shape k and scale mu / k
    assert log[-1] == pytest.approx(-np.mean(stats.gamma.logpdf(yte, 3.0, scale=np.exp(raw) / 3.0)), rel=1e-9)


# --------------------------------------------------------------------------- refit path
def test_refit_metric_log_matches_the_final_predictions():
    # lossfam tracks its own scores on the refit path; the logged held-out nll must be the nll of
    # the model it returns (scipy.stats.laplace_asymmetric as the outside density)
    Xtr, ytr, Xte, yte = _simulate("laplace")
    fam = lossfam.family("asymmetric_laplace", quantile=0.9)
    evals = {}
    model = lfl.train(fam, PARAMS, lgb.Dataset(Xtr, ytr), 40, valid_sets=[lgb.Dataset(Xte, yte)],
                      callbacks=[lgb.record_evaluation(evals)], native=False)
    assert model.info == {"objective": "custom", "leaf_value": "quantile", "step_limit": None, "hessian_damping": None}
    f = model.family
    t = f.quantile
    logpdf = stats.laplace_asymmetric.logpdf(yte, np.sqrt(t / (1 - t)), loc=model.predict(Xte),
                                             scale=f.scale / np.sqrt(t * (1 - t)))
    assert evals["valid_0"]["asymmetric_laplace_nll"][-1] == pytest.approx(-logpdf.mean(), rel=1e-9)
    assert np.mean(yte <= model.predict(Xte)) == pytest.approx(0.9, abs=0.03)


def test_refit_leaves_are_weighted_residual_quantiles_of_in_bag_rows():
    # one tree, learning rate 1: each leaf holds the tau-quantile (numpy, "linear" rule at the level
    # float32(tau): LightGBM's own renewal on unweighted rows, its level a float) of y - baseline over
    # the in-bag rows of that leaf; out-of-bag rows do not count
    Xtr, ytr, _, _ = _simulate("laplace", n_train=3000)
    tau = 0.8
    fam = lossfam.family("asymmetric_laplace", quantile=tau)
    p = dict(PARAMS, learning_rate=1.0, num_leaves=4, bagging_fraction=0.5, bagging_freq=1)
    captured = {}

    import lossfam.lightgbm as mod
    original = mod.RowBag.weights

    def spy(self, i, w):
        out = original(self, i, w)
        captured["w"] = out.copy()
        return out

    mod.RowBag.weights = spy
    try:
        model = lfl.train(fam, p, lgb.Dataset(Xtr, ytr), 1, native=False)
    finally:
        mod.RowBag.weights = original
    inbag = captured["w"] > 0
    assert 0.4 < inbag.mean() < 0.6
    leaves = model.booster.predict(Xtr, pred_leaf=True).reshape(-1)
    step = model.predict_raw(Xtr) - model.baseline
    for leaf in np.unique(leaves):
        rows = (leaves == leaf) & inbag
        expected = np.quantile(ytr[rows] - model.baseline, float(np.float32(tau)), method="linear")
        np.testing.assert_allclose(step[leaves == leaf], expected, rtol=1e-9, atol=1e-9)


def test_dataset_files_work_except_on_the_refit_path(tmp_path):
    Xtr, ytr, _, _ = _simulate("laplace")
    path = tmp_path / "train.bin"
    lgb.Dataset(Xtr[:2000], ytr[:2000]).save_binary(str(path))
    with pytest.raises(ValueError, match="in memory"):
        lfl.train("laplace", PARAMS, lgb.Dataset(str(path)), 5, native=False)
    # elsewhere the label is read from the file and the fit equals the in-memory one
    from_file = lfl.train("gaussian", PARAMS, lgb.Dataset(str(path)), 5)
    in_memory = lfl.train("gaussian", PARAMS, lgb.Dataset(Xtr[:2000], ytr[:2000]), 5)
    assert from_file.baseline == pytest.approx(in_memory.baseline, rel=1e-6)  # float32 labels in the file
    np.testing.assert_allclose(from_file.predict(Xtr[:100]), in_memory.predict(Xtr[:100]), rtol=1e-6)
    with pytest.raises(ValueError, match="built-in metrics"):
        lfl.train("laplace", dict(PARAMS, metric="l1"), lgb.Dataset(Xtr, ytr), 5, native=False)


# --------------------------------------------------------------------------- reliability
def test_eight_rows_with_default_params_train_a_constant_model():
    # min_data_in_leaf = 20 leaves no feature that can split: the built-ins return a constant
    # model, and so must lossfam on every path (LightGBM itself fails under a custom objective)
    rng = np.random.default_rng(0)
    X, y = rng.normal(size=(8, 2)), rng.poisson(3.0, 8).astype(float)
    for native in (True, False):
        model = lfl.train("poisson", {"verbose": -1}, lgb.Dataset(X, y), 10, native=native)
        np.testing.assert_allclose(model.predict(X), np.full(8, y.mean()), rtol=1e-12)
    model = lfl.train("huber", {"verbose": -1}, lgb.Dataset(X, y), 10)
    np.testing.assert_allclose(model.predict(X), model.baseline, rtol=0)


@pytest.mark.parametrize("name", ["gamma", "poisson", "bernoulli"])
@pytest.mark.parametrize("native", [True, False])
def test_learning_rate_1e4_is_refused_naming_rows(name, native):
    Xtr, ytr, _, _ = _simulate(name, n_train=500)
    with pytest.raises(ValueError, match=r"rows? \[\d"):
        lfl.train(name, dict(PARAMS, learning_rate=1e4), lgb.Dataset(Xtr, ytr), 20, native=native)


def test_pandas_input_and_dataset_left_clean():
    pd = pytest.importorskip("pandas")
    Xtr, ytr, Xte, _ = _simulate("poisson")
    cols = [f"f{i}" for i in range(6)]
    dtrain = lgb.Dataset(pd.DataFrame(Xtr, columns=cols), pd.Series(ytr), free_raw_data=False)
    model = lfl.train("poisson", PARAMS, dtrain, 20)
    np.testing.assert_array_equal(model.predict(pd.DataFrame(Xte, columns=cols)), model.predict(Xte))
    assert dtrain.get_init_score() is None  # the starting score lossfam set is removed again
    again = lfl.train("poisson", PARAMS, dtrain, 20)  # and the Dataset can be reused
    np.testing.assert_array_equal(again.predict(Xte), model.predict(Xte))


def test_bad_input_is_refused_with_reasons():
    Xtr, ytr, _, _ = _simulate("poisson")
    y = ytr[:500].copy()
    y[[3, 7]] = -1.0
    with pytest.raises(ValueError, match=r"poisson: y must be finite and >= 0; 2 rows outside, e.g. rows \[3, 7\]"):
        lfl.train("poisson", PARAMS, lgb.Dataset(Xtr[:500], y), 5)
    with pytest.raises(ValueError, match="must not set the objective"):
        lfl.train("poisson", dict(PARAMS, objective="poisson"), lgb.Dataset(Xtr, ytr), 5)
    with pytest.raises(ValueError, match="already has an init_score"):
        lfl.train("poisson", PARAMS, lgb.Dataset(Xtr, ytr, init_score=np.zeros(ytr.size)), 5)
    with pytest.raises(ValueError, match="valid_offsets has 2 entries for 1 valid_sets"):
        lfl.train("poisson", PARAMS, lgb.Dataset(Xtr, ytr), 5, valid_sets=[lgb.Dataset(Xtr, ytr)],
                  valid_offsets=[None, None])
    with pytest.raises(ValueError, match="offset"):
        lfl.train("poisson", PARAMS, lgb.Dataset(Xtr, ytr), 5, offset=np.zeros(3))
    with pytest.raises(ValueError, match="poisson_max_delta_step"):
        lfl.train("poisson", dict(PARAMS, poisson_max_delta_step=0.2), lgb.Dataset(Xtr, ytr), 5)
    with pytest.raises(ValueError, match="step_limit"):
        lfl.objective("poisson", step_limit=-1.0)
    with pytest.raises(ValueError, match="unknown family"):
        lfl.objective("poison")
    with pytest.raises(ValueError, match="'nll' or 'deviance'"):
        lfl.metric("poisson", kind="aic")
