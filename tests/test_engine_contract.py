"""The engines' contract, stated once for every engine x every registered family x user families.

Each family draws its own targets: y ~ family.distribution(raw) at raw = 0.5 + 0.5 x0 (scipy.stats
laws, or lossfam's HuberLaw), on small simulated data (demo scenario of our own, numpy Generator
seeded).  Outside references: scipy.stats log densities (through ``distribution``), the
statsmodels intercept-only GLM with an offset where the family has a GLM counterpart, numpy
quantiles, and the engines themselves.
"""
from __future__ import annotations

import dataclasses
import json
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest

import lossfam
import lossfam.lightgbm
import lossfam.xgboost
from lossfam._boost import facts
from lossfam._boost.gradients import resolve_guard

lgb = pytest.importorskip("lightgbm")
xgb = pytest.importorskip("xgboost")

sys.path.insert(0, str(Path(__file__).parent))
from user_families import LogisticErrors  # noqa: E402


@dataclasses.dataclass(frozen=True)
class LogisticErrorsDeclared(LogisticErrors):
    """The test user family again, declaring engine facts: dispersion unit scale^2, location
    depending on the scale (pre-fitted), leaves set by line search.  Its location does depend on
    the scale (the logistic M-estimate of location is not scale-free)."""

    name = "logistic_errors_declared_test"
    dispersion_unit = ("scale", 2.0)
    location_needs_nuisance = True
    leaf_value = "line_search"


USER = (LogisticErrors, LogisticErrorsDeclared)


def register_user_families():
    for cls in USER:
        lossfam.register(cls, replace=True)


@pytest.fixture(autouse=True, scope="module")
def _user_families():
    """Registered for this module only (other modules see the built-in registry)."""
    register_user_families()
    yield
    for cls in USER:
        lossfam.unregister(cls.name)


FAMILIES = sorted(set(lossfam.available(scores="one")) | {cls.name for cls in USER})
ENGINES = ("lightgbm", "xgboost")
N, ROUNDS = 600, 12


def _adapter(engine):
    return lossfam.lightgbm if engine == "lightgbm" else lossfam.xgboost


def _params(engine, **extra):
    if engine == "lightgbm":
        p = dict(learning_rate=0.2, num_leaves=7, min_data_in_leaf=10, verbosity=-1, num_threads=1, seed=2,
                 deterministic=True, force_row_wise=True)
    else:
        p = dict(eta=0.2, max_depth=3, nthread=1, tree_method="hist", seed=2)
    p.update(extra)
    return p


def _draw(name, n=N, seed=0, features=3):
    fam = lossfam.family(name)
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, features))
    raw = 0.5 + 0.5 * X[:, 0]
    law = fam.distribution(raw)
    y = np.asarray(law.rvs(random_state=rng), dtype=np.float64)
    # both engines store labels in float32: redraw rows that rounding would push out of the support
    # (beta draws within 6e-8 of 1)
    for _ in range(100):
        bad = ~fam.target_domain.inside(y.astype(np.float32).astype(np.float64))
        if not bad.any():
            break
        y[bad] = np.asarray(law.rvs(random_state=rng), dtype=np.float64)[bad]
    if fam.target_domain.rule == "strictly between 0 and 1":
        # near 0 and 1 the beta nll moves with the last float32 digit: keep exactly the labels the
        # engines see, so that the checks against the family's own formulas compare like with like
        y = y.astype(np.float32).astype(np.float64)
    return X, y


def _data(engine, X, y, weight=None, offset=None):
    if engine == "lightgbm":
        return lgb.Dataset(X, y, weight=weight, free_raw_data=False)
    return xgb.DMatrix(X, label=y, weight=weight, base_margin=offset)


def _train(engine, fam, X, y, *, weight=None, offset=None, rounds=ROUNDS, valid=None, params=None, **kw):
    """train on either engine; valid = list of (X, y, offset)."""
    p = params if params is not None else _params(engine)
    valid = valid or []
    if engine == "lightgbm":
        sets = [lgb.Dataset(Xv, yv, free_raw_data=False) for Xv, yv, _ in valid]
        log = {}
        cb = [lgb.record_evaluation(log)] + list(kw.pop("callbacks", []))
        offs = kw.pop("valid_offsets", [ov for _, _, ov in valid] if valid and offset is not None else None)
        model = lossfam.lightgbm.train(fam, p, _data(engine, X, y, weight), rounds, valid_sets=sets or None,
                                       offset=offset, valid_offsets=offs, callbacks=cb, **kw)
        return model, {k: v for k, v in log.items()}
    log = {}
    evals = [(xgb.DMatrix(Xv, label=yv, base_margin=ov), f"valid_{k}") for k, (Xv, yv, ov) in enumerate(valid)]
    model = lossfam.xgboost.train(fam, p, _data(engine, X, y, weight, offset), rounds, evals=evals,
                                  evals_result=log, verbose_eval=False, **kw)
    return model, log


# ------------------------------------------------------------------------------------ lazy import
@pytest.mark.parametrize("engine", ENGINES)
def test_import_lossfam_leaves_the_engine_unimported_and_names_the_extra(engine):
    code = textwrap.dedent(f"""
        import sys
        import lossfam, lossfam.{engine}
        assert {engine!r} not in sys.modules, "import lossfam pulled in {engine}"
        sys.modules[{engine!r}] = None  # as if it were not installed
        try:
            lossfam.{engine}.objective("poisson")
        except ImportError as exc:
            print(exc)
    """)
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stderr
    assert f'pip install "lossfam[{engine}]"' in out.stdout


# ------------------------------------------------------------------------------------ guard
@pytest.mark.parametrize("engine", ENGINES)
@pytest.mark.parametrize("name", FAMILIES)
def test_step_limit_bounds_every_row_and_every_newton_leaf(engine, name):
    X, y = _draw(name)
    fam = lossfam.family(name)
    limit = 0.3
    obj = _adapter(engine).objective(fam, step_limit=limit)
    far = np.full(y.size, fam.baseline(y)) + 3.0  # far from the targets: unguarded steps are long
    g, h = obj(y, far, None, None) if engine == "lightgbm" else obj(y, far)
    assert np.all(np.abs(g) <= limit * h * (1 + 1e-12))
    if facts.leaf_rule(fam) != "newton":
        return  # leaves are set by the rule (exact minimisers), not by the Newton step the guard bounds
    p = _params(engine, **({"lambda_l2": 0.0, "min_sum_hessian_in_leaf": 0.0, "learning_rate": 1.0}
                           if engine == "lightgbm" else {"lambda": 0.0, "min_child_weight": 0.0, "eta": 1.0}))
    model, _ = _train(engine, fam, X, y, rounds=1, params=p, step_limit=limit, native=False)
    step = model.predict_raw(X) - model.baseline
    assert np.max(np.abs(step)) <= limit * (1 + 1e-5)


# ------------------------------------------------------------------------------------ weights
@pytest.mark.parametrize("engine", ENGINES)
@pytest.mark.parametrize("name", FAMILIES)
def test_integer_weights_equal_repeated_rows(engine, name):
    X, y = _draw(name, n=600, seed=1)
    # features on a coarse grid (5 values): both fits see the same bins and the same candidate
    # splits, with many rows per cell, so no near-tie between splits can break differently under
    # float32 sums taken in another order
    X = np.clip(np.round(X), -2, 2)
    reps = np.random.default_rng(2).integers(1, 4, size=y.size)
    extra = (dict(min_data_in_leaf=1, min_data_in_bin=1, min_sum_hessian_in_leaf=0.0, feature_pre_filter=False,
                  num_leaves=4) if engine == "lightgbm" else dict(tree_method="exact", min_child_weight=0.0, max_depth=2))
    p = _params(engine, **extra)
    kw = {}
    if engine == "lightgbm" and facts.leaf_rule(lossfam.family(name)) in ("median", "quantile"):
        # LightGBM's own leaf renewal (regression_l1, quantile) interpolates a weighted percentile,
        # which is not invariant to weights vs repeated rows; lossfam's custom path renews weighted
        # leaves at the midpoint of the minimisers, which at the median (the default level) equals
        # LightGBM's unweighted renewal of the repeated rows
        kw["native"] = False
    weighted, _ = _train(engine, name, X, y, weight=reps.astype(float), params=p, rounds=5, **kw)
    repeated, _ = _train(engine, name, np.repeat(X, reps, axis=0), np.repeat(y, reps), params=p, rounds=5, **kw)
    # closed-form baselines agree to rounding; the generic one (scipy's Brent search) to its tolerance
    assert weighted.baseline == pytest.approx(repeated.baseline, rel=1e-7, abs=1e-7)
    np.testing.assert_allclose(weighted.predict_raw(X), repeated.predict_raw(X), rtol=1e-5, atol=1e-5)
    for k, v in weighted.fitted_family.params.items():
        assert v == pytest.approx(repeated.fitted_family.params[k], rel=1e-4), k


# ------------------------------------------------------------------------------------ offsets, baseline
@pytest.mark.parametrize("engine", ENGINES)
@pytest.mark.parametrize("name", FAMILIES)
def test_offset_baseline_and_validation_offsets(engine, name):
    X, y = _draw(name, seed=3)
    off = 0.2 * np.random.default_rng(4).normal(size=y.size)
    fam = lossfam.family(name)
    model, _ = _train(engine, fam, X[:400], y[:400], offset=off[:400], valid=[(X[400:], y[400:], off[400:])])
    expected = fam.baseline(y[:400], offset=off[:400])
    # XGBoost keeps its base_score in float32
    assert model.baseline == pytest.approx(expected, rel=1e-12 if engine == "lightgbm" else 1e-7, abs=1e-7)
    raw = model.predict_raw(X[400:])
    np.testing.assert_allclose(model.predict_raw(X[400:], offset=off[400:]), raw + off[400:], rtol=1e-6, atol=1e-6)
    np.testing.assert_allclose(model.predict(X[400:], offset=off[400:]),
                               fam.inverse_link(model.predict_raw(X[400:], offset=off[400:])), rtol=1e-12)
    # a validation set without its offset would be scored wrongly: refused
    with pytest.raises(ValueError, match="offset"):
        _train(engine, fam, X[:400], y[:400], offset=off[:400], valid=[(X[400:], y[400:], None)],
               **({"valid_offsets": [None]} if engine == "lightgbm" else {}))


def test_poisson_baseline_with_exposure_is_the_intercept_only_glm():
    sm = pytest.importorskip("statsmodels.api")
    X, y = _draw("poisson", seed=5)
    off = np.log(np.random.default_rng(6).uniform(0.2, 3.0, y.size))
    # statsmodels GLM, Poisson family, intercept only, with the offset: its intercept is the baseline
    glm = sm.GLM(y, np.ones((y.size, 1)), family=sm.families.Poisson(), offset=off).fit()
    for engine in ENGINES:
        model, _ = _train(engine, "poisson", X, y, offset=off, rounds=2)
        assert model.baseline == pytest.approx(glm.params[0], abs=1e-6)


# ------------------------------------------------------------------------------------ metric, distribution
@pytest.mark.parametrize("engine", ENGINES)
@pytest.mark.parametrize("name", FAMILIES)
def test_metric_is_the_family_mean_nll_and_distribution_its_law(engine, name):
    X, y = _draw(name, seed=7)
    model, log = _train(engine, name, X[:400], y[:400], valid=[(X[400:], y[400:], None)])
    key = "valid_0"
    assert list(log[key]) == [f"{name}_nll"]
    curve = log[key][f"{name}_nll"]
    assert len(curve) == ROUNDS
    raw = model.predict_raw(X[400:])
    # the metric scores with the family as trained; XGBoost hands it float32 margins
    assert curve[-1] == pytest.approx(float(np.mean(model.family.nll(y[400:], raw))), rel=1e-5)
    law = model.distribution(X[400:])
    logp = law.logpmf(y[400:]) if model.fitted_family.discrete else law.logpdf(y[400:])
    np.testing.assert_allclose(-logp, model.fitted_family.nll(y[400:], raw), rtol=1e-9, atol=1e-9)
    # fitted parameters: maximum likelihood on the training rows at the final raw scores
    if model.family.params:
        again = model.family.fit_nuisance(y[:400], model.predict_raw(X[:400]))
        for k, v in again.params.items():
            assert model.fitted_family.params[k] == pytest.approx(v, rel=1e-4), k


@pytest.mark.parametrize("engine", ENGINES)
def test_deviance_metric_and_nuisance_set(engine):
    X, y = _draw("gamma", seed=8)
    model, log = _train(engine, "gamma", X[:400], y[:400], valid=[(X[400:], y[400:], None)],
                        metric_kind="deviance", nuisance_set=0)
    raw = model.predict_raw(X[400:])
    fam = lossfam.family("gamma")
    assert log["valid_0"]["gamma_deviance"][-1] == pytest.approx(float(np.mean(fam.deviance(y[400:], raw))), rel=1e-5)
    # the shape comes from the validation rows, not the training rows
    assert model.fitted_family.shape == pytest.approx(fam.fit_nuisance(y[400:], raw).shape, rel=1e-4)


# ------------------------------------------------------------------------------------ save / load
@pytest.fixture(scope="module")
def saved_models(tmp_path_factory):
    """Every (engine, family) model saved, then loaded and predicted in one fresh process."""
    root = tmp_path_factory.mktemp("models")
    rows = {}
    for engine in ENGINES:
        for name in FAMILIES:
            X, y = _draw(name, n=300, seed=9)
            off = 0.1 * np.random.default_rng(10).normal(size=y.size)
            model, _ = _train(engine, name, X, y, offset=off, rounds=6)
            path = root / f"{engine}-{name}.json"
            model.save(path)
            np.save(root / f"{engine}-{name}-X.npy", X)
            np.save(root / f"{engine}-{name}-off.npy", off)
            rows[(engine, name)] = (model, X, off, path)
    code = textwrap.dedent(f"""
        import sys, json, numpy as np
        sys.path.insert(0, {str(Path(__file__).parent)!r})
        import lossfam
        import test_engine_contract
        test_engine_contract.register_user_families()
        root = {str(root)!r}
        out = {{}}
        for engine in {list(ENGINES)!r}:
            for name in {list(FAMILIES)!r}:
                m = lossfam.load(f"{{root}}/{{engine}}-{{name}}.json")
                X = np.load(f"{{root}}/{{engine}}-{{name}}-X.npy")
                off = np.load(f"{{root}}/{{engine}}-{{name}}-off.npy")
                np.save(f"{{root}}/{{engine}}-{{name}}-p.npy", m.predict(X, offset=off))
                out[f"{{engine}}/{{name}}"] = [m.engine, m.baseline, m.fitted_family.params, m.best_iteration]
        print(json.dumps(out))
    """)
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=300,
                          cwd=str(Path(__file__).parent.parent))
    assert proc.returncode == 0, proc.stderr[-3000:]
    return rows, json.loads(proc.stdout.strip().splitlines()[-1]), root


@pytest.mark.parametrize("engine", ENGINES)
@pytest.mark.parametrize("name", FAMILIES)
def test_save_then_load_in_a_fresh_process_is_bit_identical(saved_models, engine, name):
    rows, loaded, root = saved_models
    model, X, off, path = rows[(engine, name)]
    p = np.load(root / f"{engine}-{name}-p.npy")
    assert p.dtype == np.float64
    assert p.tobytes() == model.predict(X, offset=off).tobytes()
    eng, baseline, params, best = loaded[f"{engine}/{name}"]
    assert (eng, baseline, params, best) == (engine, model.baseline, model.fitted_family.params, model.best_iteration)
    # and the loaded model is the same class as the trained one, from the engine module's load too
    again = _adapter(engine).load(path)
    assert type(again) is lossfam.BoostedFit and again.predict(X, offset=off).tobytes() == p.tobytes()


@pytest.mark.parametrize("engine", ENGINES)
def test_damaged_files_are_refused(saved_models, engine, tmp_path):
    rows, _, _ = saved_models
    _, _, _, path = rows[(engine, "gaussian")]
    text = Path(path).read_text()
    doc = json.loads(text)
    cases = {
        "truncated": text[: len(text) // 2],
        "model cut": json.dumps(dict(doc, model=doc["model"][: len(doc["model"]) // 2])),
        "baseline edited": json.dumps(dict(doc, baseline=doc["baseline"] + 1.0))
        if engine == "xgboost" else None,
        "not a lossfam file": json.dumps({"learner": {}}),
        "fitted params malformed": json.dumps(dict(doc, extra=dict(doc["extra"], fitted_params={"scale": -1.0}))),
    }
    for label, content in cases.items():
        if content is None:
            continue
        bad = tmp_path / f"{label.replace(' ', '_')}.json"
        bad.write_text(content)
        with pytest.raises(ValueError):
            lossfam.load(bad)
    other = "xgboost" if engine == "lightgbm" else "lightgbm"
    with pytest.raises(ValueError, match="saved by lossfam." + engine):
        _adapter(other).load(path)


# ------------------------------------------------------------------------------------ one family, both engines
@pytest.mark.parametrize("name", FAMILIES)
def test_both_engines_share_gradients_baseline_prefit_and_guard(name):
    X, y = _draw(name, seed=11)
    fam = lossfam.family(name)
    w = np.random.default_rng(12).uniform(0.5, 2.0, y.size).astype(np.float32).astype(np.float64)
    yy = y.astype(np.float32).astype(np.float64)  # what a DMatrix stores
    raw = fam.baseline(yy, w) + 0.3 * X[:, 1]
    g_l, h_l = lossfam.lightgbm.objective(fam)(yy, raw, w, None)
    g_x, h_x = lossfam.xgboost.objective(fam)(yy, raw, sample_weight=w)
    np.testing.assert_array_equal(g_l, g_x)
    np.testing.assert_array_equal(h_l, h_x)
    for step_limit in ("auto", None, 0.5):
        assert resolve_guard(fam, step_limit) == resolve_guard(lossfam.family(name), step_limit)
    m_l, _ = _train("lightgbm", fam, X, yy, weight=w, rounds=1)
    m_x, _ = _train("xgboost", fam, X, yy, weight=w, rounds=1)
    # XGBoost: float32.  Median / quantile families start at each engine's own sample quantile
    # (facts.engine_start); with these weights LightGBM's is not reproduced and falls back to the
    # midpoint of the minimisers, and XGBoost's (inverted weighted cdf) equals it unless a
    # cumulative weight hits tau W exactly (never with these weights).  Unweighted at tau != 1/2
    # the two engines' definitions differ (test_engine_starts_are_reproduced_bit_for_bit).
    assert m_x.baseline == pytest.approx(m_l.baseline, rel=1e-7, abs=1e-7)
    for k, v in m_l.family.params.items():  # the family as trained (pre-fitted where declared)
        assert m_x.family.params[k] == pytest.approx(v, rel=1e-5), k
    assert m_l.info["step_limit"] == m_x.info["step_limit"]
    assert m_l.info["hessian_damping"] == m_x.info["hessian_damping"]


# ------------------------------------------------------------------------------------ native twin = custom path
# every family with a twin, at its default parameters, plus a quantile level where the engines'
# sample quantile definitions differ from each other and from the median
TWINS = [(name, {}) for name in lossfam.available(scores="one") if lossfam.family(name).native_twins]
TWINS += [("asymmetric_laplace", {"quantile": 0.8})]


@pytest.mark.parametrize("engine", ENGINES)
@pytest.mark.parametrize(("name", "params"), TWINS, ids=[n + "".join(f"-{k}{v}" for k, v in p.items()) for n, p in TWINS])
def test_native_twin_behaves_like_the_custom_path(engine, name, params, tmp_path):
    """Same baseline, trees, predictions (to 1e-6), metric log, fitted parameters; the saved file
    of each reloads to the same predictions.  For median / quantile families the custom path
    renews leaves with the engine's own sample quantile definition (lossfam._boost.facts), so
    this holds for them too (on unweighted rows: LightGBM's weighted renewal is not reproduced)."""
    X, y = _draw(name, n=1500, seed=13)
    fam = lossfam.family(name, **params)
    runs = {}
    for native in (True, False):
        model, log = _train(engine, fam, X[:1000], y[:1000], valid=[(X[1000:], y[1000:], None)], rounds=20,
                            native=native)
        runs[native] = (model, np.asarray(log["valid_0"][f"{name}_nll"]))
    (m1, log1), (m0, log0) = runs[True], runs[False]
    assert m1.info["objective"] == facts.twin_params(fam, engine)["objective"] and m0.info["objective"] == "custom"
    assert m1.baseline == m0.baseline
    held = X[1000:]
    np.testing.assert_allclose(m1.predict_raw(held), m0.predict_raw(held), rtol=0, atol=1e-6)
    np.testing.assert_allclose(log1, log0, rtol=1e-6)
    for k, v in m0.fitted_family.params.items():
        assert m1.fitted_family.params[k] == pytest.approx(v, rel=1e-6), k
    leaves = {native: _leaf_indices(engine, m, held) for native, (m, _) in runs.items()}
    np.testing.assert_array_equal(leaves[True], leaves[False])  # the same trees: every row in the same leaf
    for native, (m, _) in runs.items():
        m.save(tmp_path / f"{native}.json")
        assert lossfam.load(tmp_path / f"{native}.json").predict(held).tobytes() == m.predict(held).tobytes()


def _leaf_indices(engine, model, X):
    if engine == "lightgbm":
        return model.booster.predict(X, pred_leaf=True)
    return model.booster.predict(xgb.DMatrix(X), pred_leaf=True)


# ------------------------------------------------------------------------------------ sample quantiles
_NUMPY_METHOD = {"midpoint": "averaged_inverted_cdf", "lower": "inverted_cdf", "linear": "linear",
                 "weibull": "weibull"}


def test_sample_quantile_definitions_match_numpy():
    """lossfam._boost.quantiles against numpy.quantile's methods of the same Hyndman-Fan
    definitions (R. J. Hyndman and Y. Fan, "Sample quantiles in statistical packages", The
    American Statistician 50(4), 1996: definitions 2, 1, 7, 6), unit weights, ties included;
    grouped = one group at a time; "midpoint" with integer weights = repeated rows."""
    from lossfam._boost.quantiles import grouped_quantile, sample_quantile

    rng = np.random.default_rng(7)
    for trial in range(400):
        n = int(rng.integers(1, 45))
        q = float(rng.choice([0.05, 0.1, 0.25, 0.5, 0.75, 0.9, 0.95, rng.uniform(0.01, 0.99)]))
        x = np.round(3 * rng.standard_normal(n)) if trial % 2 else rng.standard_normal(n)
        for definition, method in _NUMPY_METHOD.items():
            assert sample_quantile(x, None, q, definition) == pytest.approx(
                float(np.quantile(x, q, method=method)), rel=1e-13, abs=1e-13), (definition, n, q)
        reps = rng.integers(1, 4, size=n)
        assert sample_quantile(x, reps.astype(float), q, "midpoint") == sample_quantile(np.repeat(x, reps), None, q)
    group = rng.integers(0, 6, size=400)
    x = rng.standard_normal(400)
    w = rng.uniform(0.1, 2.0, size=400)
    for definition in _NUMPY_METHOD:
        ww = None if definition in ("linear", "weibull") else w
        values, has = grouped_quantile(group, x, ww, 0.3, 8, definition)
        assert has.tolist() == [True] * 6 + [False] * 2
        for k in range(6):
            assert values[k] == sample_quantile(x[group == k], None if ww is None else ww[group == k], 0.3, definition)
        if ww is not None:
            for k in range(6):
                assert values[k] == sample_quantile(x[group == k], 5.0 * ww[group == k], 0.3, definition)  # scale-free


def test_engine_arithmetic_quantiles_per_group():
    """grouped_engine_quantile: per group, XGBoost's float32 rule is single_precision_quantile's
    (the engine's start, reproduced bit for bit below) on that group's float32 values; LightGBM's
    double interpolation from the upper neighbour is numpy's "linear" quantile at the float32
    level, to rounding."""
    from lossfam._boost.quantiles import grouped_engine_quantile, single_precision_quantile

    rng = np.random.default_rng(5)
    for trial in range(6):
        n_groups = 9
        group = rng.integers(0, n_groups - 1, 3000)  # the last group stays empty
        group[:40] = np.arange(40) % (n_groups - 1)
        x = np.round(rng.gamma(2.0, 30.0, group.size)) if trial % 2 else rng.standard_normal(group.size) * 1e3
        for q in (0.01, 0.05, 0.5, 0.9, 0.99):
            v32, has = grouped_engine_quantile(group, x.astype(np.float32), q, n_groups, "weibull")
            v64, has64 = grouped_engine_quantile(group, x, q, n_groups, "linear")
            assert v32.dtype == np.float32 and has.tolist() == has64.tolist() == [True] * 8 + [False]
            for k in range(n_groups - 1):
                xs = x[group == k]
                assert v32[k] == single_precision_quantile(xs.astype(np.float32), None, q, "weibull")
                ref = np.quantile(xs, float(np.float32(q)), method="linear")
                assert abs(v64[k] - ref) <= 1e-12 * max(1.0, abs(ref)), (trial, q, k)


@pytest.mark.parametrize(("engine", "weighted"), [("lightgbm", False), ("xgboost", False), ("xgboost", True)],
                         ids=["lightgbm-unweighted", "xgboost-unweighted", "xgboost-weighted"])
def test_engine_renewal_definitions_are_the_engines(engine, weighted):
    """The engines' own leaf renewal, as lossfam._boost.facts states it: one tree grown from a zero
    start at learning rate 1 by the built-in quantile objective; every leaf holds the tau-quantile
    of its rows' targets by the stated definition (LightGBM's weighted renewal is not reproduced)."""
    from lossfam._boost.quantiles import grouped_quantile

    rng = np.random.default_rng(11)
    definition = facts.renewal_definition(engine, weighted)
    for tau in (0.1, 0.5, 0.8):
        n = 400
        X = rng.standard_normal((n, 2))
        y = 5 * X[:, 0] + 10 * rng.standard_normal(n)
        w = rng.uniform(0.2, 2.0, n) if weighted else None
        if engine == "lightgbm":
            b = lgb.train({"objective": "quantile", "alpha": tau, "learning_rate": 1.0, "num_leaves": 4,
                           "min_data_in_leaf": 20, "verbosity": -1, "num_threads": 1},
                          lgb.Dataset(X, y, weight=w, init_score=np.zeros(n)), 1)
            leaf, value = b.predict(X, pred_leaf=True).reshape(-1), b.predict(X, raw_score=True)
        else:
            b = xgb.train({"objective": "reg:quantileerror", "quantile_alpha": tau, "eta": 1.0, "base_score": 0.0,
                           "max_depth": 2, "nthread": 1}, xgb.DMatrix(X, label=y, weight=w), 1)
            d = xgb.DMatrix(X)
            leaf, value = b.predict(d, pred_leaf=True).reshape(-1), b.predict(d, output_margin=True)
        leaf = np.unique(leaf, return_inverse=True)[1]
        expected, _ = grouped_quantile(leaf, y.astype(np.float32), w, tau, leaf.max() + 1, definition)
        np.testing.assert_allclose(value, expected[leaf], rtol=1e-6, atol=1e-5)


@pytest.mark.parametrize(("engine", "weighted"), [("lightgbm", False), ("xgboost", False), ("xgboost", True)],
                         ids=["lightgbm-unweighted", "xgboost-unweighted", "xgboost-weighted"])
def test_engine_starts_are_reproduced_bit_for_bit(engine, weighted):
    """facts.engine_start gives exactly the start of the engine's built-in quantile objective
    (read from a model that cannot split: LightGBM's constant first tree, XGBoost's estimated
    base_score), on continuous and on tied integer targets, small and large n, extreme levels.
    LightGBM's weighted start is not reproduced (facts.renewal_definition)."""
    import json

    rng = np.random.default_rng(21)
    for trial in range(12):
        n = int(rng.choice([2, 3, 7, 50, 51, 442, 1279]))
        X = rng.standard_normal((n, 2))
        y = np.round(rng.gamma(2.0, 40.0, n)) if trial % 2 else rng.gamma(2.0, 3.0, n) * 10 ** rng.uniform(-3, 5)
        w = rng.uniform(0.1, 3.0, n) if weighted else None
        for tau in (0.01, 0.05, 0.25, 0.5, 0.9, 0.95, 0.99):
            fam = lossfam.family("asymmetric_laplace", quantile=tau)
            if engine == "lightgbm":
                b = lgb.train({"objective": "quantile", "alpha": tau, "learning_rate": 1e-300, "verbosity": -1,
                               "min_data_in_leaf": 10 ** 7, "num_threads": 1}, lgb.Dataset(X, y, weight=w), 1)
                theirs = float(b.predict(X[:1], raw_score=True)[0])
            else:
                b = xgb.train({"objective": "reg:quantileerror", "quantile_alpha": tau, "nthread": 1},
                              xgb.DMatrix(X, label=y, weight=w), 1)
                config = json.loads(b.save_config())["learner"]["learner_model_param"]["base_score"]
                theirs = float(np.float32(float(config.strip("[]"))))
            assert facts.engine_start(fam, engine, y, w) == theirs, (trial, n, tau)


def test_line_search_leaves_cannot_diverge_from_far_residuals(rng):
    # logistic errors have a bounded score: a bare Newton step from a residual z is s sinh(z),
    # which overshoots and diverged (NaN leaves) for small leaves of far-off rows; each leaf's
    # step is now halved until its nll does not rise, and the leaf still reaches its root
    from lossfam._boost.leaves import grouped_line_search
    fam = LogisticErrorsDeclared(scale=1.3)
    n, n_leaves = 500, 20
    leaf = rng.integers(0, n_leaves, n)
    y = 2.0 * rng.logistic(size=n)
    y[leaf == 3] += 40.0
    raw, w = rng.normal(size=n), rng.uniform(0.0, 2.0, n)
    c, has = grouped_line_search(fam, leaf, y, raw, w, n_leaves)
    g, _ = fam._grad_hess(y, raw + c[leaf])
    assert has.all() and np.isfinite(c).all()
    np.testing.assert_allclose(np.bincount(leaf, weights=g * w, minlength=n_leaves), 0.0, atol=1e-10)


@pytest.mark.parametrize("engine", ENGINES)
def test_line_search_with_bagging_weights_and_tiny_leaves_trains(engine, rng):
    # the case that produced NaN leaves in XGBoost: depth 8, no minimum leaf weight, half the rows
    # in the bag, user weights
    X = rng.normal(size=(600, 4))
    y = X[:, 0] + rng.logistic(size=600)
    w = rng.uniform(0.2, 3.0, 600)
    if engine == "xgboost":
        fit = lossfam.xgboost.train(LogisticErrorsDeclared.name, dict(max_depth=8, eta=0.3, subsample=0.5, nthread=1,
                                    seed=1, min_child_weight=0), xgb.DMatrix(X, y, weight=w), 30)
    else:
        fit = lossfam.lightgbm.train(LogisticErrorsDeclared.name, dict(num_leaves=64, learning_rate=0.3,
                                     min_data_in_leaf=1, min_sum_hessian_in_leaf=0, bagging_fraction=0.5,
                                     bagging_freq=1, verbosity=-1, num_threads=1, seed=1),
                                     lgb.Dataset(X, y, weight=w), 30)
    assert np.isfinite(fit.predict(X)).all()
