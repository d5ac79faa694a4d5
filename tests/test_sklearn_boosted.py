"""BoostedLikelihoodRegressor / BoostedLikelihoodClassifier on LightGBM and XGBoost.

Outside references: the engines' own built-in objectives where the family has
the same gradients (gaussian = squared error started at the mean; bernoulli =
binary log loss started at logit(mean)), scikit-learn's d2_tweedie_score,
log_loss and clone/GridSearchCV machinery, scipy.stats log densities.
"""
import lightgbm as lgb
import numpy as np
import pytest
import xgboost as xgb
from scipy import stats
from sklearn.base import clone
from sklearn.metrics import d2_tweedie_score, log_loss
from sklearn.model_selection import GridSearchCV, KFold

import lossfam
from lossfam.sklearn import BoostedLikelihoodClassifier, BoostedLikelihoodRegressor, LikelihoodRegressor, scorer

LGB_KW = dict(n_estimators=30, learning_rate=0.1, num_leaves=7, min_child_samples=5, verbose=-1, n_jobs=1)
XGB_KW = dict(n_estimators=30, learning_rate=0.1, max_depth=3, n_jobs=1)


def engine(name, classifier=False):
    if name == "lightgbm":
        return lgb.LGBMClassifier(**LGB_KW) if classifier else lgb.LGBMRegressor(**LGB_KW)
    return xgb.XGBClassifier(**XGB_KW) if classifier else xgb.XGBRegressor(**XGB_KW)


def data(n=400, seed=0):
    rng = np.random.default_rng(seed)
    X = rng.standard_normal((n, 3))
    signal = X[:, 0] + np.sin(X[:, 1])
    return rng, X, signal


def test_gaussian_equals_the_engines_squared_error():
    rng, X, s = data()
    y = s + rng.normal(0.0, 0.5, len(s))
    # LightGBM's built-in "regression" starts from the mean (boost_from_average), as our baseline does
    ours = BoostedLikelihoodRegressor(engine("lightgbm")).fit(X, y)
    ref = lgb.LGBMRegressor(objective="regression", **LGB_KW).fit(X, y)
    np.testing.assert_allclose(ours.predict(X), ref.predict(X), rtol=0, atol=1e-7)
    assert ours.baseline_ == pytest.approx(np.mean(y), rel=1e-12)
    # XGBoost's reg:squarederror started at base_score = mean(y)
    ours = BoostedLikelihoodRegressor(engine("xgboost")).fit(X, y)
    ref = xgb.XGBRegressor(objective="reg:squarederror", base_score=float(np.mean(y)), **XGB_KW).fit(X, y)
    np.testing.assert_allclose(ours.predict(X), ref.predict(X), rtol=0, atol=1e-5)
    # the gaussian scale is the maximum-likelihood value on the training residuals (XGBoost predicts in float32)
    np.testing.assert_allclose(ours.family_.scale, np.sqrt(np.mean((y - ours.predict(X)) ** 2)), rtol=1e-7)


@pytest.mark.parametrize("name", ["lightgbm", "xgboost"])
def test_classifier_equals_the_engines_binary_log_loss(name):
    rng, X, s = data(seed=1)
    y = np.where(s + rng.logistic(size=len(s)) > 0.3, "pos", "neg")
    ours = BoostedLikelihoodClassifier(engine(name)).fit(X, y)
    assert list(ours.classes_) == ["neg", "pos"]
    y01 = (y == "pos").astype(int)
    if name == "lightgbm":
        ref = lgb.LGBMClassifier(objective="binary", **LGB_KW).fit(X, y01)
    else:
        ref = xgb.XGBClassifier(objective="binary:logistic", base_score=float(y01.mean()), **XGB_KW).fit(X, y01)
    np.testing.assert_allclose(ours.predict_proba(X), ref.predict_proba(X), rtol=0, atol=1e-6)
    np.testing.assert_array_equal(ours.predict(X), np.where(ours.predict_proba(X)[:, 1] > 0.5, "pos", "neg"))
    # the classifier wrapper also accepts the engine's classifier class
    other = BoostedLikelihoodClassifier(engine(name, classifier=True)).fit(X, y)
    np.testing.assert_allclose(other.predict_proba(X), ours.predict_proba(X), atol=1e-6)
    # the scorer's nll is sklearn's log loss
    np.testing.assert_allclose(-scorer("bernoulli")(ours, X, y), log_loss(y, ours.predict_proba(X)[:, 1]), rtol=1e-8)


@pytest.mark.parametrize("name", ["lightgbm", "xgboost"])
def test_poisson_baseline_offset_distribution_and_d2(name):
    rng, X, s = data(seed=2)
    exposure = rng.uniform(0.5, 3.0, len(s))
    y = rng.poisson(exposure * np.exp(0.5 * s)).astype(float)
    off = np.log(exposure)
    est = BoostedLikelihoodRegressor(engine(name), family="poisson").fit(X, y, offset=off)
    # XGBoost keeps the baseline in float32 (its base_score precision)
    assert est.baseline_ == pytest.approx(lossfam.family("poisson").baseline(y, offset=off),
                                          rel=1e-12 if name == "lightgbm" else 1e-7)
    rate = est.predict(X)
    # XGBoost adds base_margin in float32: agreement to float32 precision there
    tol = 1e-10 if name == "lightgbm" else 2e-6
    np.testing.assert_allclose(est.predict(X, offset=off), rate * exposure, rtol=tol)
    np.testing.assert_allclose(est.predict_raw(X, offset=off), np.log(rate) + off, rtol=tol, atol=tol)
    law = est.predict_distribution(X, offset=off)
    np.testing.assert_allclose(law.mean(), rate * exposure, rtol=tol)
    mean_nll = -np.mean(stats.poisson.logpmf(y, rate * exposure))
    null_nll = -np.mean(stats.poisson.logpmf(y, np.exp(est.baseline_ + off)))
    assert mean_nll < null_nll  # the trees learned something beyond the baseline
    np.testing.assert_allclose(est.score(X, y), d2_tweedie_score(y, rate, power=1), rtol=1e-10)


@pytest.mark.parametrize("name", ["lightgbm", "xgboost"])
def test_eval_set_reports_the_family_nll(name):
    rng, X, s = data(seed=3)
    y = rng.gamma(2.0, np.exp(0.3 * s) / 2.0)
    Xv, yv = X[:100], y[:100]
    est = BoostedLikelihoodRegressor(engine(name), family="gamma").fit(X[100:], y[100:], eval_set=[(Xv, yv)])
    curve = est.evals_result_["validation_0"]["gamma_nll"]
    assert len(curve) == XGB_KW["n_estimators"]
    # the last reported value is the held-out mean nll of the final model, with the *training* shape
    # (the metric uses the family given to training, shape 1)
    expected = -np.mean(stats.gamma.logpdf(yv, a=1.0, scale=est.predict(Xv)))
    np.testing.assert_allclose(curve[-1], expected, rtol=1e-5)


def test_params_are_clone_safe_and_nested():
    est = BoostedLikelihoodRegressor(lgb.LGBMRegressor(n_estimators=7, verbose=-1, n_jobs=1), family="gamma")
    params = est.get_params(deep=True)
    assert params["estimator__n_estimators"] == 7 and params["family"] == "gamma"
    est.set_params(estimator__n_estimators=11, family_params={"shape": 2.0})
    assert est.estimator.n_estimators == 11
    twin = clone(est)
    assert twin.get_params()["estimator__n_estimators"] == 11 and twin.estimator is not est.estimator
    rng, X, s = data(seed=4)
    y = rng.gamma(2.0, np.exp(0.3 * s) / 2.0)
    est.fit(X, y)
    assert est.estimator.objective is None  # the given estimator is never modified
    assert est.model_.engine == "lightgbm" and est.model_.booster.current_iteration() == 11
    assert not hasattr(twin, "model_")


def test_grid_search_over_nested_parameters_with_the_nll_scorer():
    rng, X, s = data(n=300, seed=5)
    y = rng.poisson(np.exp(0.5 * s)).astype(float)
    grid = GridSearchCV(
        BoostedLikelihoodRegressor(engine("lightgbm"), family="poisson"),
        {"estimator__n_estimators": [1, 40]},
        cv=KFold(3, shuffle=True, random_state=0),
        scoring=scorer("poisson"),
    ).fit(X, y)
    assert grid.best_params_["estimator__n_estimators"] == 40
    assert np.all(grid.cv_results_["mean_test_score"] < 0)


@pytest.mark.filterwarnings("ignore:X does not have valid feature names")  # the numpy predict below, on purpose
def test_dataframe_input_keeps_feature_names():
    pd = pytest.importorskip("pandas")
    rng, X, s = data(seed=6)
    frame = pd.DataFrame(X, columns=["age", "load", "hour"])
    y = rng.poisson(np.exp(0.5 * s)).astype(float)
    est = BoostedLikelihoodRegressor(engine("lightgbm"), family="poisson").fit(frame, y)
    assert list(est.feature_names_in_) == ["age", "load", "hour"]
    np.testing.assert_allclose(est.predict(frame), est.predict(frame.to_numpy()), rtol=1e-12)


def test_bad_input():
    rng, X, s = data(n=50, seed=7)
    y = rng.poisson(np.exp(s)).astype(float)
    with pytest.raises(ValueError, match="use BoostedLikelihoodClassifier"):
        BoostedLikelihoodRegressor(lgb.LGBMClassifier(), family="poisson").fit(X, y)
    with pytest.raises(ValueError, match="LightGBM or XGBoost"):
        BoostedLikelihoodRegressor(LikelihoodRegressor(), family="poisson").fit(X, y)
    bad = y.copy()
    bad[4] = -2.0
    with pytest.raises(ValueError, match=r"poisson: y must be finite and >= 0; 1 row outside, e.g. row \[4\]"):
        BoostedLikelihoodRegressor(engine("xgboost"), family="poisson").fit(X, bad)
    with pytest.raises(ValueError, match="offset has shape"):
        BoostedLikelihoodRegressor(engine("xgboost"), family="poisson").fit(X, y, offset=np.zeros(3))
    with pytest.raises(ValueError, match="Only binary classification"):
        BoostedLikelihoodClassifier(engine("lightgbm")).fit(X, np.arange(50) % 3)


@pytest.mark.parametrize("name", ["lightgbm", "xgboost"])
def test_wrapper_trains_what_train_trains_and_its_model_saves_and_loads(name, tmp_path):
    rng, X, s = data(seed=8)
    y = np.median(s) + s + rng.laplace(size=len(s))
    est = BoostedLikelihoodRegressor(engine(name), family="laplace").fit(X, y)
    assert isinstance(est.model_, lossfam.BoostedFit) and est.model_.engine == name
    # the same model as the engine's train with the estimator's settings
    if name == "lightgbm":
        direct = lossfam.lightgbm.train("laplace", {k: v for k, v in LGB_KW.items() if k != "n_estimators"},
                                        lgb.Dataset(X, y), LGB_KW["n_estimators"])
    else:
        direct = lossfam.xgboost.train("laplace", {k: v for k, v in XGB_KW.items() if k != "n_estimators"},
                                       xgb.DMatrix(X, label=y), XGB_KW["n_estimators"])
    np.testing.assert_allclose(est.predict(X), direct.predict(X), rtol=0, atol=1e-12)
    est.model_.save(tmp_path / "m.json")
    again = lossfam.load(tmp_path / "m.json")
    assert again.predict(X).tobytes() == est.predict(X).tobytes()


@pytest.mark.parametrize("name", ["lightgbm", "xgboost"])
def test_sparse_X_is_accepted(name):
    sparse = pytest.importorskip("scipy.sparse")
    rng, X, s = data(seed=9)
    X[np.abs(X) < 0.5] = 0.0
    y = rng.poisson(np.exp(0.5 * s)).astype(float)
    # XGBoost reads the entries a sparse matrix leaves out as missing, LightGBM as zeros
    Xd = np.where(X == 0.0, np.nan, X) if name == "xgboost" else X
    dense = BoostedLikelihoodRegressor(engine(name), family="poisson").fit(Xd, y)
    est = BoostedLikelihoodRegressor(engine(name), family="poisson").fit(sparse.csr_matrix(X), y)
    np.testing.assert_allclose(est.predict(sparse.csr_matrix(X)), dense.predict(Xd), rtol=1e-6)


def test_nan_targets_are_refused_with_row_numbers():
    rng, X, s = data(n=60, seed=10)
    y = s.copy()
    y[[5, 17]] = np.nan
    with pytest.raises(ValueError, match=r"2 rows outside, e.g. rows \[5, 17\]"):
        BoostedLikelihoodRegressor(engine("lightgbm")).fit(X, y)
    with pytest.raises(ValueError, match=r"rows \[5, 17\]"):
        BoostedLikelihoodClassifier(engine("xgboost")).fit(X, np.where(np.isnan(y), np.nan, (s > 0) * 1.0))


@pytest.mark.parametrize("name", ["lightgbm", "xgboost"])
def test_eval_set_without_offset_is_refused_when_fit_has_one(name):
    rng, X, s = data(seed=11)
    y = rng.poisson(np.exp(0.5 * s)).astype(float)
    off = np.zeros(len(y))
    with pytest.raises(ValueError, match="eval_set\\[0\\] has none"):
        BoostedLikelihoodRegressor(engine(name), family="poisson").fit(X, y, offset=off, eval_set=[(X, y)])
