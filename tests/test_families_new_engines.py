"""tweedie through lossfam's own gradients against both engines' built-in Tweedie objectives.

Real data: statsmodels' ``fair`` data set (time spent in extramarital affairs, 6366 rows, 68% exact
zeros: a compound Poisson-gamma target).  70% of the rows train, 30% are held out.  Same booster
parameters and rounds on both sides; lossfam runs its Python objective (``native=False``) with the
step guard off, the built-ins their C++ objective (LightGBM ``tweedie``, XGBoost ``reg:tweedie``,
each with ``tweedie_variance_power = p``).  The held-out Tweedie deviance
(sklearn.metrics.mean_tweedie_deviance) of lossfam must be <= 1.01 x the built-in's.
"""
import numpy as np
import pytest

import lossfam

sm = pytest.importorskip("statsmodels.api")
metrics = pytest.importorskip("sklearn.metrics")

ROUNDS = 100


@pytest.fixture(scope="module")
def fair():
    d = sm.datasets.fair.load_pandas().data
    X = d[["rate_marriage", "age", "yrs_married", "children", "religious", "educ", "occupation",
           "occupation_husb"]].to_numpy(float)
    y = d["affairs"].to_numpy(float).astype(np.float32).astype(float)
    perm = np.random.default_rng(0).permutation(y.size)
    tr, te = perm[: int(0.7 * y.size)], perm[int(0.7 * y.size):]
    return X[tr], y[tr], X[te], y[te]


@pytest.mark.parametrize("power", [1.2, 1.5, 1.8])
def test_lightgbm_tweedie_matches_the_builtin(fair, power):
    lgb = pytest.importorskip("lightgbm")
    import lossfam.lightgbm as lfl

    Xtr, ytr, Xte, yte = fair
    params = {"learning_rate": 0.1, "num_leaves": 15, "min_data_in_leaf": 20, "num_threads": 1,
              "verbose": -1, "seed": 0, "deterministic": True}
    builtin = lgb.train({**params, "objective": "tweedie", "tweedie_variance_power": power},
                        lgb.Dataset(Xtr, ytr), ROUNDS)
    ours = lfl.train(lossfam.family("tweedie", power=power), params, lgb.Dataset(Xtr, ytr), ROUNDS,
                     native=False, step_limit=None)
    d_builtin = metrics.mean_tweedie_deviance(yte, builtin.predict(Xte), power=power)
    d_ours = metrics.mean_tweedie_deviance(yte, ours.predict(Xte), power=power)
    assert d_ours <= 1.01 * d_builtin, (d_ours, d_builtin)


@pytest.mark.parametrize("power", [1.2, 1.5, 1.8])
def test_xgboost_tweedie_matches_the_builtin(fair, power):
    xgb = pytest.importorskip("xgboost")
    import lossfam.xgboost as lx

    Xtr, ytr, Xte, yte = fair
    params = {"eta": 0.1, "max_depth": 4, "nthread": 1, "tree_method": "hist", "seed": 0}
    builtin = xgb.train({**params, "objective": "reg:tweedie", "tweedie_variance_power": power},
                        xgb.DMatrix(Xtr, label=ytr), ROUNDS)
    ours = lx.train(lossfam.family("tweedie", power=power), params, xgb.DMatrix(Xtr, label=ytr), ROUNDS,
                    native=False, step_limit=None)
    d_builtin = metrics.mean_tweedie_deviance(yte, builtin.predict(xgb.DMatrix(Xte)), power=power)
    d_ours = metrics.mean_tweedie_deviance(yte, ours.predict(Xte), power=power)
    assert d_ours <= 1.01 * d_builtin, (d_ours, d_builtin)


@pytest.mark.parametrize("engine", ["lightgbm", "xgboost"])
def test_tweedie_trains_on_the_native_twin_by_default(fair, engine):
    pytest.importorskip(engine)
    Xtr, ytr, Xte, yte = fair
    fam = lossfam.family("tweedie", power=1.5)
    assert set(fam.native_twins) == {"lightgbm", "xgboost"}
    if engine == "lightgbm":
        import lightgbm as lgb
        import lossfam.lightgbm as lfl

        model = lfl.train(fam, {"num_threads": 1, "verbose": -1}, lgb.Dataset(Xtr, ytr), 20)
    else:
        import xgboost as xgb
        import lossfam.xgboost as lx

        model = lx.train(fam, {"nthread": 1}, xgb.DMatrix(Xtr, label=ytr), 20)
    assert np.all(np.isfinite(model.predict(Xte))) and model.fitted_family.dispersion > 0
