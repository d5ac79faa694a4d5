"""Tests of the LightGBM adapter (lossfam.lightgbm).

Simulated data (seeded numpy Generator, documented in ``_simulate``) stands in
for a real problem; every held-out metric comes from scikit-learn's metric
functions or scipy.stats, outside lossfam.
"""
import json
import subprocess
import sys
import textwrap

import numpy as np
import pytest

lgb = pytest.importorskip("lightgbm")
from scipy import stats  # noqa: E402
from sklearn import metrics as skm  # noqa: E402

import lossfam  # noqa: E402
from lossfam import lightgbm as lfl  # noqa: E402
from lossfam._filecheck import reseal  # noqa: E402

N_TRAIN, N_TEST, N_FEAT = 20_000, 10_000, 6
PARAMS = dict(learning_rate=0.1, num_leaves=15, min_data_in_leaf=20, verbosity=-1,
              num_threads=1, seed=3, deterministic=True, force_row_wise=True)
# one thread: on a shared 2-core machine OpenMP barriers with 2 threads stall badly under load
ROUNDS = 100


def _simulate(kind, seed=20261201):
    """Features x ~ N(0, I_6); a smooth nonlinear signal s(x); targets drawn per family.

    s(x) = sin(1.5 x0) + 0.8 x1 1[x2 > 0] + 0.3 x3^2 - 0.4 x4 (x5 has no effect).
    continuous: y = 10 + 3 s + noise (laplace b = 1, or Student-t_3 for huber);
    poisson: y ~ Poisson(exp(0.6 s)); gamma: y ~ Gamma(shape 3, mean exp(0.6 s));
    bernoulli: y ~ Bernoulli(expit(1.5 s - 0.3)).
    """
    rng = np.random.default_rng(seed)
    n = N_TRAIN + N_TEST
    X = rng.normal(size=(n, N_FEAT))
    s = np.sin(1.5 * X[:, 0]) + 0.8 * X[:, 1] * (X[:, 2] > 0) + 0.3 * X[:, 3] ** 2 - 0.4 * X[:, 4]
    if kind == "gaussian":
        y = 10 + 3 * s + rng.normal(scale=1.5, size=n)
    elif kind == "laplace":
        y = 10 + 3 * s + rng.laplace(scale=1.0, size=n)
    elif kind == "t3":
        y = 10 + 3 * s + rng.standard_t(3, size=n)
    elif kind == "poisson":
        y = rng.poisson(np.exp(0.6 * s)).astype(float)
    elif kind == "gamma":
        y = rng.gamma(3.0, np.exp(0.6 * s) / 3.0)
    elif kind == "bernoulli":
        y = (rng.uniform(size=n) < 1 / (1 + np.exp(-(1.5 * s - 0.3)))).astype(float)
    else:  # pragma: no cover
        raise AssertionError(kind)
    return X[:N_TRAIN], y[:N_TRAIN], X[N_TRAIN:], y[N_TRAIN:]


def _huber_loss(r, alpha):
    # Huber (1964), Ann. Math. Statist. 35, the rho function: r^2/2 inside |r| <= alpha, alpha|r| - alpha^2/2 outside
    a = np.abs(r)
    return float(np.mean(np.where(a <= alpha, 0.5 * r * r, alpha * a - 0.5 * alpha * alpha)))


# (family, family params, built-in objective params, data kind, held-out score(y, prediction))
PARITY = [
    ("gaussian", {}, {"objective": "regression"}, "gaussian", skm.mean_squared_error),
    ("laplace", {}, {"objective": "regression_l1"}, "laplace", skm.mean_absolute_error),
    ("asymmetric_laplace", {"quantile": 0.1}, {"objective": "quantile", "alpha": 0.1}, "laplace",
     lambda y, p: skm.mean_pinball_loss(y, p, alpha=0.1)),
    ("asymmetric_laplace", {"quantile": 0.5}, {"objective": "quantile", "alpha": 0.5}, "laplace",
     lambda y, p: skm.mean_pinball_loss(y, p, alpha=0.5)),
    ("asymmetric_laplace", {"quantile": 0.9}, {"objective": "quantile", "alpha": 0.9}, "laplace",
     lambda y, p: skm.mean_pinball_loss(y, p, alpha=0.9)),
    ("bernoulli", {}, {"objective": "binary"}, "bernoulli", skm.log_loss),
    ("poisson", {}, {"objective": "poisson"}, "poisson", skm.mean_poisson_deviance),
    ("gamma", {}, {"objective": "gamma"}, "gamma", skm.mean_gamma_deviance),
    ("huber", {"delta": 1.0, "scale": 1.0}, {"objective": "huber", "alpha": 1.0}, "t3",
     lambda y, p: _huber_loss(y - p, 1.0)),
]


@pytest.mark.parametrize("name, fparams, builtin, kind, score", PARITY,
                         ids=[f"{p[0]}-{p[1].get('quantile', '')}" for p in PARITY])
def test_held_out_parity_with_builtin_objective(name, fparams, builtin, kind, score):
    Xtr, ytr, Xte, yte = _simulate(kind)
    ref = lgb.train(dict(PARAMS, **builtin), lgb.Dataset(Xtr, ytr), ROUNDS)
    # huber: the family's threshold delta * scale must equal LightGBM's alpha, so keep scale = 1
    # builtin_if_exact=False: the Python objective is what is compared, for every family
    model = lfl.train(lossfam.family(name, **fparams), PARAMS, lgb.Dataset(Xtr, ytr), ROUNDS,
                      prefit_params=(name != "huber"), builtin_if_exact=False)
    ours, theirs = score(yte, model.predict(Xte)), score(yte, ref.predict(Xte))
    print(f"{name} {fparams}: lossfam {ours:.5f}  built-in {theirs:.5f}")
    assert ours <= 1.01 * theirs, (ours, theirs)


# --------------------------------------------------------------------------- lazy import
def _run(code):
    return subprocess.run([sys.executable, "-c", textwrap.dedent(code)], capture_output=True, text=True, timeout=120)


def test_import_lossfam_leaves_lightgbm_unimported():
    out = _run("""
        import sys, lossfam, lossfam.lightgbm
        print("lightgbm" in sys.modules)
    """)
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == "False"


def test_missing_lightgbm_names_the_extra():
    out = _run("""
        import sys
        sys.modules["lightgbm"] = None  # makes "import lightgbm" fail as if it were not installed
        import lossfam.lightgbm as lfl
        try:
            lfl.objective("poisson")([0.0], [1.0])  # any use needs the engine
        except ImportError as exc:
            print(exc)
    """)
    assert out.returncode == 0, out.stderr
    assert 'pip install "lossfam[lightgbm]"' in out.stdout


# --------------------------------------------------------------------------- exact agreement
@pytest.mark.parametrize("name, builtin, kind", [("gaussian", "regression", "gaussian"),
                                                  ("bernoulli", "binary", "bernoulli")])
def test_same_start_gives_the_builtin_predictions(name, builtin, kind):
    # With the same starting score (the family baseline in init_score for both), the gaussian gradient
    # raw - y with Hessian 1 and the bernoulli p - y, p(1 - p) are LightGBM's own l2 and binary ones.
    Xtr, ytr, Xte, _ = _simulate(kind)
    fam = lossfam.family(name)
    base = fam.baseline(ytr)
    ref = lgb.train(dict(PARAMS, objective=builtin), lgb.Dataset(Xtr, ytr, init_score=np.full(ytr.size, base)), 50)
    model = lfl.train(name, PARAMS, lgb.Dataset(Xtr, ytr), 50, builtin_if_exact=False)
    assert model.baseline == pytest.approx(base, abs=0)
    raw_ref = base + ref.predict(Xte, raw_score=True)
    np.testing.assert_allclose(model.predict_raw(Xte), raw_ref, rtol=0, atol=1e-6)
    np.testing.assert_allclose(model.predict(Xte), fam.inverse_link(raw_ref), rtol=0, atol=1e-6)


def test_builtin_shortcut_behaves_like_the_python_objective(tmp_path):
    # train() hands the gaussian gradients to LightGBM's built-in l2 objective (exactly the family's
    # in dispersion units); everything observable must be the same as with the Python objective
    name = "gaussian"
    Xtr, ytr, Xte, yte = _simulate(name)
    fam = lossfam.family(name, scale=3.0)
    w = np.random.default_rng(6).uniform(0.5, 2.0, ytr.size)
    fits, logs = {}, {}
    for shortcut in (True, False):
        evals = {}
        fits[shortcut] = lfl.train(fam, PARAMS, lgb.Dataset(Xtr, ytr, weight=w), 40,
                                   builtin_if_exact=shortcut, valid_sets=[lgb.Dataset(Xte, yte)],
                                   callbacks=[lgb.record_evaluation(evals)])
        logs[shortcut] = evals["valid_0"][f"{name}_nll"]
    fast, slow = fits[True], fits[False]
    assert "objective=regression" in fast.booster.model_to_string()
    assert "objective=regression" not in slow.booster.model_to_string()
    assert fast.baseline == slow.baseline
    assert fast.fitted_family.params == pytest.approx(slow.fitted_family.params, rel=1e-9)
    np.testing.assert_allclose(fast.predict_raw(Xte), slow.predict_raw(Xte), rtol=0, atol=1e-6)
    np.testing.assert_allclose(logs[True], logs[False], rtol=1e-7)
    fast.save(tmp_path / "fast.json")
    assert np.array_equal(lfl.load(tmp_path / "fast.json").predict(Xte), fast.predict(Xte))


def test_objective_serves_lgb_train_and_the_sklearn_estimator():
    Xtr, ytr, Xte, _ = _simulate("poisson")
    fam = lossfam.family("poisson")
    base = fam.baseline(ytr)
    obj = lfl.objective(fam)
    w = np.random.default_rng(5).uniform(0.5, 2.0, ytr.size)
    b = lgb.train(dict(PARAMS, objective=obj),
                  lgb.Dataset(Xtr, ytr, weight=w, init_score=np.full(ytr.size, base)), 30)
    est = lgb.LGBMRegressor(objective=obj, n_estimators=30, **{k: v for k, v in PARAMS.items() if k != "seed"},
                            random_state=PARAMS["seed"])
    est.fit(Xtr, ytr, sample_weight=w, init_score=np.full(ytr.size, base))
    np.testing.assert_allclose(est.predict(Xte, raw_score=True), b.predict(Xte, raw_score=True), rtol=0, atol=1e-12)
    # the objective's output is the family's weighted gradient/Hessian (guard aside: rows well inside it)
    raw = np.full(ytr.size, base)
    g, h = obj(ytr, raw, w, None)
    g_ref, h_ref = fam.grad_hess(ytr, raw, w)
    np.testing.assert_allclose(g, g_ref, rtol=1e-12)
    np.testing.assert_allclose(h, np.maximum(h_ref, np.abs(g_ref) / 0.5), rtol=1e-12)


def test_step_guard_bounds_every_leaf_step():
    # Counts far above a tiny mean: the unguarded Newton step y/mu - 1 is in the thousands.
    rng = np.random.default_rng(11)
    X = rng.normal(size=(2000, 3))
    y = np.where(X[:, 0] > 1.0, rng.poisson(30.0, 2000), 0).astype(float)
    start = np.full(y.size, np.log(0.01))
    p = dict(PARAMS, learning_rate=1.0, num_leaves=4)
    steps = {}
    for guard in (None, 0.5):
        b = lgb.train(dict(p, objective=lfl.objective("poisson", max_row_step=guard)),
                      lgb.Dataset(X, y, init_score=start), 1)
        steps[guard] = np.abs(b.predict(X, raw_score=True)).max()
    assert steps[None] > 100  # the blow-up the guard exists for
    assert steps[0.5] <= 0.5 + 1e-6
    with pytest.raises(ValueError, match="max_row_step"):
        lfl.objective("poisson", max_row_step=-1.0)


# --------------------------------------------------------------------------- metric, early stopping
def test_metric_is_mean_nll_and_drives_early_stopping():
    Xtr, ytr, Xte, yte = _simulate("poisson")
    evals = {}
    model = lfl.train("poisson", dict(PARAMS, learning_rate=0.3, num_leaves=63, min_data_in_leaf=5),
                      lgb.Dataset(Xtr, ytr), 300, valid_sets=[lgb.Dataset(Xte, yte)], valid_names=["held_out"],
                      callbacks=[lgb.record_evaluation(evals), lgb.early_stopping(10, verbose=False)])
    curve = evals["held_out"]["poisson_nll"]
    best = int(np.argmin(curve)) + 1
    assert len(curve) < 300 and model.booster.num_trees() == best  # stopped, and cut back to the best round
    # the reported value is the mean of scipy.stats.poisson's -logpmf at the model's mean
    assert curve[best - 1] == pytest.approx(-np.mean(stats.poisson.logpmf(yte, model.predict(Xte))), rel=1e-9)
    # deviance flavour, sklearn-style call (y_true, y_pred, weight)
    met = lfl.metric("poisson", kind="deviance")
    name, value, higher = met(yte, model.predict_raw(Xte), None)
    assert (name, higher) == ("poisson_deviance", False)
    assert value == pytest.approx(skm.mean_poisson_deviance(yte, model.predict(Xte)), rel=1e-9)


def test_metric_in_the_sklearn_estimator_eval_log():
    Xtr, ytr, Xte, yte = _simulate("gamma")
    fam = lossfam.family("gamma", shape=3.0)
    est = lgb.LGBMRegressor(objective=lfl.objective(fam), n_estimators=20, metric="None", verbosity=-1,
                            n_jobs=1, random_state=1)
    est.fit(Xtr, ytr, init_score=np.full(ytr.size, fam.baseline(ytr)), eval_X=(Xte,), eval_y=(yte,),
            eval_init_score=[np.full(yte.size, fam.baseline(ytr))], eval_metric=lfl.metric(fam))
    log = est.evals_result_["valid_0"]["gamma_nll"]
    raw = fam.baseline(ytr) + est.predict(Xte, raw_score=True)
    # scipy.stats.gamma with shape k and scale mu / k
    assert log[-1] == pytest.approx(-np.mean(stats.gamma.logpdf(yte, 3.0, scale=np.exp(raw) / 3.0)), rel=1e-9)


# --------------------------------------------------------------------------- leaf refit bookkeeping
def test_refit_metric_log_matches_the_final_predictions():
    # lossfam tracks its own scores under leaf refit; the logged held-out nll must be the nll of the
    # model it returns (scipy.stats.laplace_asymmetric as the outside density)
    Xtr, ytr, Xte, yte = _simulate("laplace")
    fam = lossfam.family("asymmetric_laplace", quantile=0.9)
    evals = {}
    model = lfl.train(fam, PARAMS, lgb.Dataset(Xtr, ytr), 40, valid_sets=[lgb.Dataset(Xte, yte)],
                      callbacks=[lgb.record_evaluation(evals)])
    f = model.family  # scale fitted at the baseline before training
    t = f.quantile
    logpdf = stats.laplace_asymmetric.logpdf(yte, np.sqrt(t / (1 - t)), loc=model.predict(Xte),
                                             scale=f.scale / np.sqrt(t * (1 - t)))
    assert evals["valid_0"]["asymmetric_laplace_nll"][-1] == pytest.approx(-logpdf.mean(), rel=1e-9)
    # 90% of held-out targets should lie at or below the predicted 0.9-quantile
    assert np.mean(yte <= model.predict(Xte)) == pytest.approx(0.9, abs=0.02)


def test_dataset_files_work_except_for_leaf_refit(tmp_path):
    Xtr, ytr, _, _ = _simulate("laplace")
    path = tmp_path / "train.bin"
    lgb.Dataset(Xtr[:2000], ytr[:2000]).save_binary(str(path))
    with pytest.raises(ValueError, match="in memory"):
        lfl.train("laplace", PARAMS, lgb.Dataset(str(path)), 5)
    # without refit the label is read from the file and the fit equals the in-memory one
    from_file = lfl.train("gaussian", PARAMS, lgb.Dataset(str(path)), 5)
    in_memory = lfl.train("gaussian", PARAMS, lgb.Dataset(Xtr[:2000], ytr[:2000]), 5)
    assert from_file.baseline == pytest.approx(in_memory.baseline, rel=1e-6)  # float32 labels in the file
    np.testing.assert_allclose(from_file.predict(Xtr[:100]), in_memory.predict(Xtr[:100]), rtol=1e-6)
    with pytest.raises(ValueError, match="built-in metrics"):
        lfl.train("laplace", dict(PARAMS, metric="l1"), lgb.Dataset(Xtr, ytr), 5)


# --------------------------------------------------------------------------- save / load
def test_save_load_in_a_fresh_process_is_bit_identical(tmp_path):
    Xtr, ytr, Xte, _ = _simulate("gamma")
    model = lfl.train(lossfam.family("gamma"), PARAMS, lgb.Dataset(Xtr, ytr), 30)
    path = tmp_path / "model.json"
    model.save(path)
    np.save(tmp_path / "X.npy", Xte)
    out = _run(f"""
        import numpy as np, lossfam.lightgbm as lfl
        m = lfl.load({str(path)!r})
        X = np.load({str(tmp_path / 'X.npy')!r})
        np.save({str(tmp_path / 'pred.npy')!r}, m.predict(X))
        print(m.family.name, m.fitted_family.shape)
    """)
    assert out.returncode == 0, out.stderr
    reloaded = np.load(tmp_path / "pred.npy")
    assert np.array_equal(reloaded, model.predict(Xte))  # bit for bit
    assert out.stdout.split()[0] == "gamma"
    assert float(out.stdout.split()[1]) == model.fitted_family.shape


def test_damaged_or_foreign_files_give_a_clear_error(tmp_path):
    Xtr, ytr, _, _ = _simulate("gaussian")
    model = lfl.train("gaussian", PARAMS, lgb.Dataset(Xtr[:2000], ytr[:2000]), 5)
    good = tmp_path / "m.json"
    model.save(good)
    text = good.read_text()
    cut = tmp_path / "cut.json"
    cut.write_text(text[: len(text) // 2])
    with pytest.raises(ValueError, match="truncated or corrupted"):
        lfl.load(cut)
    doc = json.loads(text)
    doc["model"] = doc["model"].replace("Tree=1", "Tree=X").replace("leaf_value=", "leaf_value=zz,")
    bad = tmp_path / "bad.json"
    bad.write_text(json.dumps(doc))
    with pytest.raises(ValueError, match="does not match its checksum"):
        lfl.load(bad)  # checked before LightGBM parses it: its parser can abort the process on damaged text
    foreign = tmp_path / "plain.txt"
    model.booster.save_model(str(foreign))  # LightGBM's own text format, not a lossfam file
    with pytest.raises(ValueError, match="not a lossfam model file"):
        lfl.load(foreign)
    doc = json.loads(text)
    doc["engine"] = "xgboost"
    other = tmp_path / "other.json"
    other.write_text(json.dumps(reseal(doc)))  # an intact file, only from the other engine
    with pytest.raises(ValueError, match="lossfam.xgboost"):
        lfl.load(other)


# --------------------------------------------------------------------------- weights, offsets, distribution
@pytest.mark.parametrize("name, kind", [("poisson", "poisson"), ("laplace", "laplace")])
def test_weights_act_like_repeated_rows(name, kind):
    Xtr, ytr, Xte, _ = _simulate(kind)
    # features on a 0.1 grid: fewer distinct values than max_bin, so both fits get the same histogram bins
    Xtr, ytr, Xte = np.round(Xtr[:5000], 1), ytr[:5000], np.round(Xte, 1)
    reps = np.random.default_rng(2).integers(1, 4, size=ytr.size)
    p = dict(PARAMS, min_data_in_leaf=1, min_data_in_bin=1, min_sum_hessian_in_leaf=0.0, feature_pre_filter=False)
    weighted = lfl.train(name, p, lgb.Dataset(Xtr, ytr, weight=reps.astype(float)), 30)
    repeated = lfl.train(name, p, lgb.Dataset(np.repeat(Xtr, reps, axis=0), np.repeat(ytr, reps)), 30)
    assert weighted.baseline == pytest.approx(repeated.baseline, rel=1e-12)
    # same bins, same sums of weighted gradients: equal up to float32 summation order
    a, b = weighted.predict(Xte), repeated.predict(Xte)
    np.testing.assert_allclose(a, b, rtol=1e-4)


def test_poisson_offset_recovers_the_rate_and_fits_the_baseline_given_it():
    # claim counts: rate depends on x0, exposure in years varies per policy; y ~ Poisson(rate * exposure)
    rng = np.random.default_rng(8)
    n = 20_000
    X = rng.normal(size=(n, 3))
    rate = np.exp(-1.0 + 0.5 * X[:, 0])
    exposure = rng.uniform(0.1, 3.0, n)
    y = rng.poisson(rate * exposure).astype(float)
    off = np.log(exposure)
    model = lfl.train("poisson", PARAMS, lgb.Dataset(X[:15000], y[:15000]), 100, offset=off[:15000],
                      valid_sets=[lgb.Dataset(X[15000:], y[15000:])], valid_offsets=[off[15000:]])
    # intercept-only Poisson GLM with the same offset (statsmodels) = the baseline
    sm = pytest.importorskip("statsmodels.api")
    glm = sm.GLM(y[:15000], np.ones((15000, 1)), family=sm.families.Poisson(), offset=off[:15000]).fit()
    assert model.baseline == pytest.approx(glm.params[0], abs=1e-9)
    # predicted rate (no offset) tracks the true rate; predicted count (with offset) the expected count
    r_hat = model.predict(X[15000:])
    assert np.median(np.abs(np.log(r_hat / rate[15000:]))) < 0.1
    np.testing.assert_allclose(model.predict(X[15000:], offset=off[15000:]), r_hat * exposure[15000:], rtol=1e-12)
    # ignoring exposure gives a clearly worse held-out deviance (sklearn's mean_poisson_deviance)
    naive = lfl.train("poisson", PARAMS, lgb.Dataset(X[:15000], y[:15000]), 100)
    mu = exposure[15000:]
    assert skm.mean_poisson_deviance(y[15000:], r_hat * mu) < skm.mean_poisson_deviance(y[15000:], naive.predict(X[15000:]))


def test_distribution_uses_parameters_fitted_on_training_data():
    Xtr, ytr, Xte, yte = _simulate("gaussian")
    model = lfl.train(lossfam.family("gaussian", scale=1.0), PARAMS, lgb.Dataset(Xtr, ytr), 60)
    resid = ytr - model.predict(Xtr)
    assert model.fitted_family.scale == pytest.approx(np.sqrt(np.mean(resid ** 2)), rel=1e-9)
    law = model.distribution(Xte)
    np.testing.assert_allclose(law.logpdf(yte), stats.norm.logpdf(yte, model.predict(Xte), model.fitted_family.scale))
    # the simulated noise sd is 1.5: a decent fit finds a training residual sd a little under it
    assert 1.2 < model.fitted_family.scale < 1.6


def test_pandas_input_and_dataset_left_clean():
    pd = pytest.importorskip("pandas")
    Xtr, ytr, Xte, _ = _simulate("poisson")
    cols = [f"f{i}" for i in range(N_FEAT)]
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
    with pytest.raises(ValueError, match="unknown family"):
        lfl.objective("poison")
    with pytest.raises(ValueError, match="'nll' or 'deviance'"):
        lfl.metric("poisson", kind="aic")
