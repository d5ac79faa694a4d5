"""Held-out parity of lossfam's ``train`` with each engine's built-in twin objective.

For every family whose loss an engine computes with a built-in objective, ``train`` (its
default path, and the pure custom path ``native=False`` in the slow grid) must give a held-out
score at most 1.01 times the built-in's, with the same engine parameters and rounds:

=====================  ===========================  ==========================
family                 LightGBM built-in            XGBoost built-in
=====================  ===========================  ==========================
gaussian               regression                   reg:squarederror
laplace                regression_l1                reg:absoluteerror
huber                  huber (alpha = delta scale)  none (pseudo-Huber differs)
bernoulli              binary                       binary:logistic
poisson                poisson                      count:poisson
gamma                  gamma                        reg:gamma
asymmetric_laplace(t)  quantile (alpha = t)         reg:quantileerror (t)
=====================  ===========================  ==========================

The held-out scores come from scikit-learn's metrics (mean squared / absolute error, pinball
loss, log loss, mean Poisson / gamma deviance) and scipy.special.huber, computed from each
model's predicted mean, median, quantile or probability; the lossfam side's prediction is the
inverse link of its raw score, written out here.  The table of twins and the scores are
``twin`` and ``held_out_score`` in benchmarks/engine_twins.py, shared with the speed benchmark.

Data sources (each check's test id names its source):

* ``sim<seed>``: simulated, seeds 0, 1, 2 (a demo scenario of our own, ``_simulate``), 2000
  training rows, 10000 held-out rows;
* ``diabetes``: scikit-learn's diabetes data (``sklearn.datasets.load_diabetes``: 442 patients,
  10 baseline measurements, a positive integer-valued disease-progression score one year later;
  Efron, Hastie, Johnstone and Tibshirani, "Least angle regression", Annals of Statistics 32
  (2004), recalled from memory), 5-fold cross-validated: the score of the pooled out-of-fold
  predictions.  Used for every family but bernoulli, poisson and gamma included (its target is
  a positive count-like score);
* ``breast_cancer``: scikit-learn's Wisconsin diagnostic breast cancer data
  (``sklearn.datasets.load_breast_cancer``: 569 tumours, 30 features, malignant / benign;
  W. N. Street, W. H. Wolberg and O. L. Mangasarian, 1993, recalled from memory), stratified
  5-fold, for bernoulli;
* ``affairs``: statsmodels' ``fair`` data (``statsmodels.datasets.fair``: 6366 survey
  answers; the 0/1 target is ``affairs > 0``; R. Fair, "A theory of extramarital affairs",
  Journal of Political Economy 86 (1978), recalled from memory), stratified 5-fold, for
  bernoulli in the slow grid;
* ``doctor_visits``: statsmodels' ``randhie`` data (``statsmodels.datasets.randhie``: 20190
  people of the RAND health insurance experiment; target ``mdvis``, the count of
  outpatient visits to a doctor), 5-fold, for poisson in the slow grid.

Settings: learning rates 0.05 and 0.3, 100 and 1000 rounds, the engines' other defaults,
one thread.  The default run keeps one setting per family and engine (the real data set,
learning rate 0.05, 100 rounds, default path); the full grid is marked slow.
"""
from __future__ import annotations

import functools
import importlib.util
from pathlib import Path

import numpy as np
import pytest
from scipy import special

pytest.importorskip("sklearn")

import lossfam  # noqa: E402


def _load_benchmark():
    """benchmarks/engine_twins.py holds the one table of built-in twins and held-out scores."""
    path = Path(__file__).resolve().parents[1] / "benchmarks" / "engine_twins.py"
    spec = importlib.util.spec_from_file_location("engine_twins", path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


_BENCH = _load_benchmark()

TAUS = (0.05, 0.1, 0.25, 0.5, 0.75, 0.9, 0.95)
LIMIT = 1.01  # held-out score of lossfam <= LIMIT x the built-in's
CASES = [("gaussian", None), ("laplace", None), ("huber", None), ("bernoulli", None),
         ("poisson", None), ("gamma", None)] + [("asymmetric_laplace", t) for t in TAUS]
ENGINES = ("lightgbm", "xgboost")


def _case_id(case):
    name, tau = case
    return name if tau is None else f"{name}-tau{tau}"


def _engine_cases():
    """(engine, case) pairs with a built-in twin: XGBoost has no Huber objective."""
    return [pytest.param(e, c, id=f"{e}-{_case_id(c)}") for e in ENGINES for c in CASES
            if not (e == "xgboost" and c[0] == "huber")]


def _family(name, tau):
    return lossfam.family(name) if tau is None else lossfam.family(name, quantile=tau)


# ---------------------------------------------------------------------------------------
# data


def _simulate(name, seed, n_train=2000, n_test=10_000):
    """Demo scenario of our own: 8 standard-normal features, a nonlinear signal s(x), and a
    target drawn from the family's own kind of noise (heteroscedastic and skewed for the
    location families, so that each quantile has its own shape)."""
    rng = np.random.default_rng(seed)
    n = n_train + n_test
    X = rng.standard_normal((n, 8))
    s = 0.6 * np.sin(2 * X[:, 0]) + 0.5 * X[:, 1] - 0.4 * X[:, 2] * X[:, 3] + 0.3 * X[:, 4] ** 2
    if name == "bernoulli":
        y = (rng.uniform(size=n) < special.expit(s - 0.3)).astype(float)
    elif name == "poisson":
        y = rng.poisson(np.exp(0.5 + s)).astype(float)
    elif name == "gamma":
        y = rng.gamma(2.0, np.exp(1.0 + s) / 2.0)
    elif name == "gaussian":
        y = 3.0 + 2.0 * s + rng.standard_normal(n)
    else:  # laplace, huber, asymmetric_laplace: skewed, heavy-tailed, spread growing with |x5|
        y = 3.0 + 2.0 * s + (0.5 + 0.5 * np.abs(X[:, 5])) * rng.gumbel(size=n)
    return [(X[:n_train], y[:n_train], X[n_train:], y[n_train:])]


@functools.lru_cache(maxsize=None)
def _real(source):
    """(X, y) of one real data set (module docstring for each source)."""
    if source == "diabetes":
        from sklearn.datasets import load_diabetes

        d = load_diabetes()
        return d.data, d.target.astype(float)
    if source == "breast_cancer":
        from sklearn.datasets import load_breast_cancer

        d = load_breast_cancer()
        return d.data, d.target.astype(float)
    sm = pytest.importorskip("statsmodels.api")
    if source == "affairs":
        df = sm.datasets.fair.load_pandas().data
        return df.drop(columns="affairs").to_numpy(float), (df["affairs"].to_numpy() > 0).astype(float)
    if source == "doctor_visits":
        df = sm.datasets.randhie.load_pandas().data
        return df.drop(columns="mdvis").to_numpy(float), df["mdvis"].to_numpy(float)
    raise ValueError(source)


def _folds(source):
    """Five (X_train, y_train, X_test, y_test) splits of a real data set."""
    from sklearn.model_selection import KFold, StratifiedKFold

    X, y = _real(source)
    binary = source in ("breast_cancer", "affairs")
    split = (StratifiedKFold if binary else KFold)(n_splits=5, shuffle=True, random_state=0)
    return [(X[a], y[a], X[b], y[b]) for a, b in split.split(X, y)]


def _splits(source, name):
    if source.startswith("sim"):
        return _simulate(name, int(source[3:]))
    return _folds(source)


def _real_source(name):
    return "breast_cancer" if name == "bernoulli" else "diabetes"


# ---------------------------------------------------------------------------------------
# the two sides


def _engine_params(engine, learning_rate):
    if engine == "lightgbm":
        return {"learning_rate": learning_rate, "num_threads": 1, "verbosity": -1, "seed": 0,
                "deterministic": True}
    return {"learning_rate": learning_rate, "nthread": 1, "tree_method": "hist", "seed": 0}


def _fit_lossfam(engine, fam, params, X, y, rounds, native, fit_out=None):
    """Train with lossfam; return (the trained family, held-out predictor on the mean scale)."""
    if engine == "lightgbm":
        import lightgbm as lgb

        from lossfam import lightgbm as engine_side

        fit = engine_side.train(fam, params, lgb.Dataset(X, y), rounds, native=native)
    else:
        import xgboost as xgb

        from lossfam import xgboost as engine_side

        fit = engine_side.train(fam, params, xgb.DMatrix(X, label=y), rounds, native=native)
    if fit_out is not None:
        fit_out.append(fit)
    inverse = {"log": np.exp, "logit": special.expit}.get(fam.link_function.name, lambda r: r)
    return fit.family, lambda Z: inverse(fit.predict_raw(Z))


def _fit_builtin(engine, twin, params, X, y, rounds, start=None):
    """Train the built-in twin (from its own starting score, or from raw score ``start``, as the
    Dataset's init_score / the base_score on the mean scale); return its held-out predictor on
    the raw scale when ``start`` is given, else on the mean scale."""
    if engine == "lightgbm":
        import lightgbm as lgb

        init = None if start is None else np.full(y.size, start)
        booster = lgb.train({**params, **twin}, lgb.Dataset(X, y, init_score=init), rounds)
        if start is None:
            return booster.predict
        return lambda Z: booster.predict(Z, raw_score=True) + start
    import xgboost as xgb

    if start is not None:
        inverse = {"binary:logistic": special.expit, "count:poisson": np.exp, "reg:gamma": np.exp}.get(
            twin["objective"], lambda r: r)
        params = {**params, "base_score": float(np.float32(inverse(start)))}
    booster = xgb.train({**params, **twin}, xgb.DMatrix(X, label=y), rounds)
    if start is None:
        return lambda Z: booster.predict(xgb.DMatrix(Z))
    return lambda Z: booster.predict(xgb.DMatrix(Z), output_margin=True).astype(np.float64)


def _ratios(engine, case, source, learning_rate, rounds, paths):
    """Held-out score of each lossfam path divided by the built-in's (pooled over folds).

    Returns ({path: ratio}, {side: score}, per-split ratios of the first path)."""
    name, tau = case
    params = _engine_params(engine, learning_rate)
    ys, preds = [], {p: [] for p in ("builtin", *paths)}
    trained = None
    for X, y, Xt, yt in _splits(source, name):
        for path in paths:
            trained, predict = _fit_lossfam(engine, _family(name, tau), params, X, y, rounds, path == "native")
            preds[path].append(predict(Xt))
        preds["builtin"].append(_fit_builtin(engine, _BENCH.twin(engine, name, tau, trained), params, X, y, rounds)(Xt))
        ys.append(yt)
    y_all = np.concatenate(ys)
    scores = {p: _BENCH.held_out_score(name, tau, trained, y_all, np.concatenate(v)) for p, v in preds.items()}
    per_split = [_BENCH.held_out_score(name, tau, trained, yt, a) / _BENCH.held_out_score(name, tau, trained, yt, b)
                 for yt, a, b in zip(ys, preds[paths[0]], preds["builtin"])]
    return {p: scores[p] / scores["builtin"] for p in paths}, scores, per_split


def _check(engine, case, source, learning_rate, rounds, paths):
    ratios, scores, per_split = _ratios(engine, case, source, learning_rate, rounds, paths)
    detail = (f"{engine} {_case_id(case)} on {source}, learning rate {learning_rate}, {rounds} rounds: "
              f"held-out scores {scores}, per-split ratios of {paths[0]} {np.round(per_split, 4).tolist()}")
    print({path: round(ratio, 4) for path, ratio in ratios.items()}, detail)  # shown by pytest -rA
    for path, ratio in ratios.items():
        assert ratio <= LIMIT, f"{path} path is {ratio:.4f} x the built-in; {detail}"


# The engines start their quantile objectives at their own sample quantile of the targets
# (LightGBM Hyndman-Fan 7, XGBoost Hyndman-Fan 6, in single precision); lossfam starts there too
# (lossfam._boost.facts.engine_start).  Started from the midpoint of the pinball loss's minimisers
# instead, the default path measured 1.013 (LightGBM tau 0.9), 1.032 (LightGBM tau 0.95) and 1.012
# (XGBoost tau 0.9) x the built-in here: on the integer-valued diabetes target the first trees
# depend on the start, and one float32 ulp of it moved a held-out pinball loss by 2.4%.
def _default_cases():
    return [pytest.param(*p.values, id=p.id) for p in _engine_cases()]


@pytest.mark.parametrize(("engine", "case"), _default_cases())
def test_default_path_matches_builtin_on_real_data(engine, case):
    """One setting per family: 5-fold cross-validation on the diabetes data (bernoulli: breast
    cancer data), learning rate 0.05, 100 rounds, default path."""
    pytest.importorskip(engine)
    _check(engine, case, _real_source(case[0]), 0.05, 100, ("native",))


@pytest.mark.parametrize(("engine", "case"), [p for p in _engine_cases() if p.values[1][0] != "huber"])
def test_native_path_is_the_builtin_from_the_same_start(engine, case):
    """Both paths train the built-in twin's model: started from lossfam's baseline, the built-in
    gives the same held-out raw scores as the default (native) path and as the custom path
    (native=False), to float32 rounding (first diabetes fold, an integer-valued target with many
    tied residuals; breast cancer for bernoulli; learning rate 0.05, 100 rounds).  Not huber: it
    has no native twin (its default path is the custom objective, checked against the built-in's
    score above)."""
    pytest.importorskip(engine)
    name, tau = case
    X, y, Xt, _ = _splits(_real_source(name), name)[0]
    params = _engine_params(engine, 0.05)
    fits = []
    for native in (True, False):
        _fit_lossfam(engine, _family(name, tau), params, X, y, 100, native, fits)
    native_fit, custom_fit = fits
    assert native_fit.info["objective"] != "custom" and custom_fit.info["objective"] == "custom"
    assert native_fit.baseline == custom_fit.baseline
    theirs = _fit_builtin(engine, _BENCH.twin(engine, name, tau, native_fit.family), params, X, y, 100,
                          native_fit.baseline)(Xt)
    tol = 1e-6 * max(1.0, abs(native_fit.baseline))
    np.testing.assert_allclose(native_fit.predict_raw(Xt), theirs, rtol=1e-6, atol=tol)
    np.testing.assert_allclose(custom_fit.predict_raw(Xt), theirs, rtol=1e-6, atol=tol)


@pytest.mark.parametrize(("engine", "case"), [p for p in _engine_cases()
                                               if p.values[1] in (("laplace", None), ("asymmetric_laplace", 0.05),
                                                                  ("asymmetric_laplace", 0.9))])
def test_custom_path_stays_the_native_path_over_many_rounds(engine, case):
    """The custom path renews median / quantile leaves in the engine's own arithmetic (XGBoost:
    float32 residuals, scores and leaves; LightGBM: its interpolation from the upper neighbour at a
    float32 level, in double), so it trains the native twin's model exactly, also after 300 rounds
    at learning rate 0.3, where the leaves chase residuals of a few ulps (first diabetes fold; in
    float64 the two had drifted apart by then)."""
    pytest.importorskip(engine)
    name, tau = case
    X, y, Xt, _ = _splits("diabetes", name)[0]
    fits = []
    for native in (True, False):
        _fit_lossfam(engine, _family(name, tau), _engine_params(engine, 0.3), X, y, 300, native, fits)
    assert fits[1].info["objective"] == "custom"
    np.testing.assert_array_equal(fits[1].predict_raw(Xt), fits[0].predict_raw(Xt))


SOURCES = ("sim0", "sim1", "sim2", "real")
SETTINGS = [(lr, r) for lr in (0.05, 0.3) for r in (100, 1000)]


@pytest.mark.slow
@pytest.mark.parametrize(("learning_rate", "rounds"), SETTINGS, ids=[f"lr{a}-r{b}" for a, b in SETTINGS])
@pytest.mark.parametrize("source", SOURCES)
@pytest.mark.parametrize(("engine", "case"), _engine_cases())
def test_both_paths_match_builtin(engine, case, source, learning_rate, rounds):
    """Full grid: the default path and the pure custom path (native=False), simulated (3 seeds)
    and real data (5-fold), learning rates 0.05 and 0.3, 100 and 1000 rounds.

    Median / quantile families: the custom path renews leaves in the engine's own arithmetic
    (test_custom_path_stays_the_native_path_over_many_rounds), so it follows the native twin over
    1000 rounds too.  (Renewed in float64, it had drifted away: on diabetes, XGBoost tau = 0.05,
    1000 rounds, custom 1.032 at learning rate 0.05 and 1.190 at 0.3 x the built-in.)"""
    pytest.importorskip(engine)
    source = _real_source(case[0]) if source == "real" else source
    _check(engine, case, source, learning_rate, rounds, ("native", "custom"))


EXTRA = [("bernoulli", "affairs"), ("poisson", "doctor_visits")]


@pytest.mark.slow
@pytest.mark.parametrize(("learning_rate", "rounds"), SETTINGS, ids=[f"lr{a}-r{b}" for a, b in SETTINGS])
@pytest.mark.parametrize(("name", "source"), EXTRA, ids=[f"{n}-{s}" for n, s in EXTRA])
@pytest.mark.parametrize("engine", ENGINES)
def test_both_paths_match_builtin_on_statsmodels_data(engine, name, source, learning_rate, rounds):
    """Larger real data sets shipped with statsmodels (module docstring), 5-fold."""
    pytest.importorskip(engine)
    _check(engine, (name, None), source, learning_rate, rounds, ("native", "custom"))
