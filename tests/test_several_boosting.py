"""Boosting families with several raw scores per row, in both engines (one contract, parametrised).

Parametrised over engines x ``lossfam.available(scores="several")`` x a user-registered
several-score family defined here, so a family added to the registry is trained here without a
new test.  The heteroscedastic checks use simulated data of our own making (a scale that grows
x10 across one feature's range)."""
import dataclasses
import json
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

import lossfam
import lossfam.lightgbm
import lossfam.xgboost
from lossfam import _filecheck
from lossfam._checks import REAL
from lossfam.families._several import SeveralScoreFamily
from lossfam.links import IDENTITY, LOG

lgb = pytest.importorskip("lightgbm")
xgb = pytest.importorskip("xgboost")

ENGINES = ("lightgbm", "xgboost")


@dataclasses.dataclass(frozen=True)
class NormalLogVariance(SeveralScoreFamily):
    """A user family: gaussian with raw scores (mu, log variance).

    v = e^{r1}, e = y - mu:  nll = e^2 / (2 v) + r1 / 2 + log(2 pi) / 2
    gradient (-e / v, 1/2 - e^2 / (2 v)); Hessian [[1/v, e/v], [e/v, e^2 / (2 v)]];
    Fisher diag(1/v, 1/2)."""

    name = "test_normal_log_variance"
    score_names = ("mean", "log_variance")
    links = (IDENTITY, LOG)
    target_domain = REAL

    def _nll(self, y, raw):
        e = y - raw[:, 0]
        return 0.5 * e * e * np.exp(-raw[:, 1]) + 0.5 * raw[:, 1] + 0.5 * np.log(2 * np.pi)

    def _gradient(self, y, raw):
        iv = np.exp(-raw[:, 1])
        e = y - raw[:, 0]
        return np.column_stack([-e * iv, 0.5 - 0.5 * e * e * iv])

    def _hessian(self, y, raw):
        iv = np.exp(-raw[:, 1])
        e = y - raw[:, 0]
        h = np.empty((y.size, 2, 2))
        h[:, 0, 0] = iv
        h[:, 0, 1] = h[:, 1, 0] = e * iv
        h[:, 1, 1] = 0.5 * e * e * iv
        return h

    def _fisher(self, raw):
        f = np.zeros((raw.shape[0], 2, 2))
        f[:, 0, 0] = np.exp(-raw[:, 1])
        f[:, 1, 1] = 0.5
        return f

    def _start(self, y, w, offset):
        t = y if offset is None else y - offset[:, 0]
        m = np.average(t, weights=w)
        return np.array([m, np.log(np.average((t - m) ** 2, weights=w))])

    def _distribution(self, raw):
        return stats.norm(loc=raw[:, 0], scale=np.exp(0.5 * raw[:, 1]))


def register_user_families():
    lossfam.register(NormalLogVariance, replace=True)


@pytest.fixture(autouse=True, scope="module")
def _user_family():
    """Registered for this module only (other modules see the built-in registry)."""
    register_user_families()
    yield
    lossfam.unregister(NormalLogVariance.name)


FAMILIES = sorted(set(lossfam.available(scores="several")) | {NormalLogVariance.name})


def _draw(name, n=400, seed=0, p=3):
    """Features and targets drawn from the family's own law at raw scores that vary with X."""
    fam = lossfam.family(name)
    rng = np.random.default_rng(seed)
    X = rng.uniform(-1, 1, size=(n, p))
    raw = np.column_stack([0.5 * X[:, j % p] for j in range(fam.n_scores)])
    raw = raw + fam.baseline(fam.sample(np.zeros((200, fam.n_scores)), rng))
    y = fam.sample(raw, rng)
    return X, y.astype(np.float32).astype(np.float64)  # the engines keep labels in float32


def _params(engine, **extra):
    if engine == "lightgbm":
        base = dict(verbosity=-1, num_threads=1, learning_rate=0.1, num_leaves=7, min_data_in_leaf=20)
    else:
        base = dict(nthread=1, learning_rate=0.1, max_depth=3, min_child_weight=1.0)
    base.update(extra)
    return base


def _train(engine, fam, X, y, *, weight=None, offset=None, rounds=10, valid=None, params=None, **kw):
    """train on either engine; valid = list of (X, y, offset)."""
    p = params if params is not None else _params(engine)
    valid = valid or []
    log = {}
    if engine == "lightgbm":
        sets = [lgb.Dataset(Xv, yv, free_raw_data=False) for Xv, yv, _ in valid]
        cb = [lgb.record_evaluation(log)] + list(kw.pop("callbacks", []))
        offs = [ov for _, _, ov in valid] if valid and any(ov is not None for _, _, ov in valid) else None
        model = lossfam.lightgbm.train(fam, p, lgb.Dataset(X, y, weight=weight, free_raw_data=False), rounds,
                                       valid_sets=sets or None, offset=offset, valid_offsets=offs, callbacks=cb, **kw)
        return model, log
    evals = [(xgb.DMatrix(Xv, label=yv, base_margin=ov), f"valid_{k}") for k, (Xv, yv, ov) in enumerate(valid)]
    model = lossfam.xgboost.train(fam, p, xgb.DMatrix(X, label=y, weight=weight, base_margin=offset), rounds,
                                  evals=evals, evals_result=log, verbose_eval=False, **kw)
    return model, log


def _adapter(engine):
    return lossfam.lightgbm if engine == "lightgbm" else lossfam.xgboost


# ------------------------------------------------------------------------------------ engine curvature hooks
@pytest.mark.parametrize("name", FAMILIES)
def test_curvature_hooks_equal_the_generic_definitions(name):
    # a family may give closed forms for the engines' per-round hooks (speed); they must equal the
    # base class's definitions from the full Hessian and Fisher matrices
    fam = lossfam.family(name)
    X, y = _draw(name, n=200, seed=17)
    raw = np.random.default_rng(18).normal(0.0, 0.5, size=(y.size, fam.n_scores)) + fam.baseline(y)
    g = fam._gradient(y, raw)
    np.testing.assert_allclose(fam._newton_diagonal(y, raw), SeveralScoreFamily._newton_diagonal(fam, y, raw),
                               rtol=1e-12, atol=1e-300)
    np.testing.assert_allclose(fam._fisher_diagonal(raw), SeveralScoreFamily._fisher_diagonal(fam, raw),
                               rtol=1e-12, atol=1e-300)
    if not fam.raw_shift_invariant:  # singular Fisher matrix: the family's pseudo-inverse is its own
        np.testing.assert_allclose(fam._natural_gradient(y, raw, g),
                                   SeveralScoreFamily._natural_gradient(fam, y, raw, g), rtol=1e-10, atol=1e-12)


# ------------------------------------------------------------------------------------ shapes, start
@pytest.mark.parametrize("engine", ENGINES)
@pytest.mark.parametrize("name", FAMILIES)
def test_predict_raw_and_distribution_shapes(engine, name):
    fam = lossfam.family(name)
    X, y = _draw(name)
    model, log = _train(engine, name, X[:300], y[:300], valid=[(X[300:], y[300:], None)])
    assert isinstance(model, lossfam.SeveralScoreFit)
    raw = model.predict_raw(X[300:])
    assert raw.shape == (100, fam.n_scores) and raw.dtype == np.float64 and np.isfinite(raw).all()
    np.testing.assert_array_equal(model.predict(X[300:]), fam.location(raw))
    np.testing.assert_array_equal(model.parameters(X[300:]), fam.parameters(raw))
    law = model.distribution(X[300:])
    assert law.mean().shape in ((100,), (100, fam.n_scores))
    # the metric logged on the validation set is the weighted mean nll of the family at the model's raw scores
    logged = log["valid_0"][f"{fam.name}_nll"][-1]
    assert logged == pytest.approx(float(np.mean(fam.nll(y[300:], raw))), rel=1e-5)
    assert model.mean_loss(X[300:], y[300:]) == pytest.approx(float(np.mean(fam.nll(y[300:], raw))), rel=1e-12)
    # training lowered the training rows' nll from the baseline's
    start = float(np.mean(fam.nll(y[:300], np.tile(model.baseline, (300, 1)))))
    assert model.mean_loss(X[:300], y[:300]) < start


@pytest.mark.parametrize("engine", ENGINES)
@pytest.mark.parametrize("name", FAMILIES)
def test_start_is_the_family_baseline(engine, name):
    fam = lossfam.family(name)
    X, y = _draw(name, seed=1)
    w = np.random.default_rng(3).uniform(0.5, 2.0, size=y.size).astype(np.float32).astype(np.float64)
    # LightGBM trains at least one round: one with a learning rate of 1e-12 leaves the start in place
    model, _ = _train(engine, name, X, y, weight=w, rounds=1, params=_params(engine, learning_rate=1e-12))
    want = fam.baseline(y, w)
    if engine == "xgboost":  # the engine's precision
        want = want.astype(np.float32).astype(np.float64)
    np.testing.assert_array_equal(model.baseline, want)
    np.testing.assert_allclose(model.predict_raw(X), np.tile(want, (y.size, 1)), rtol=0, atol=1e-9)


@pytest.mark.parametrize("engine", ENGINES)
@pytest.mark.parametrize("name", FAMILIES)
def test_integer_weights_equal_repeated_rows(engine, name):
    X, y = _draw(name, n=400, seed=1)
    X = np.clip(np.round(2 * X), -2, 2)  # a coarse grid: both fits see the same bins and candidate splits
    reps = np.random.default_rng(2).integers(1, 4, size=y.size)
    extra = (dict(min_data_in_leaf=1, min_data_in_bin=1, min_sum_hessian_in_leaf=0.0, feature_pre_filter=False,
                  num_leaves=4) if engine == "lightgbm" else dict(min_child_weight=0.0, max_depth=2))
    p = _params(engine, **extra)
    weighted, _ = _train(engine, name, X, y, weight=reps.astype(float), params=p, rounds=5)
    repeated, _ = _train(engine, name, np.repeat(X, reps, axis=0), np.repeat(y, reps), params=p, rounds=5)
    np.testing.assert_allclose(weighted.baseline, repeated.baseline, rtol=1e-6, atol=1e-6)
    np.testing.assert_allclose(weighted.predict_raw(X), repeated.predict_raw(X), rtol=1e-4, atol=1e-4)


@pytest.mark.parametrize("engine", ENGINES)
@pytest.mark.parametrize("name", FAMILIES)
@pytest.mark.parametrize("shape", ["location", "all"])
def test_offsets_move_the_start_and_are_required_on_validation(engine, name, shape):
    fam = lossfam.family(name)
    X, y = _draw(name, seed=4)
    rng = np.random.default_rng(5)
    off = 0.2 * rng.normal(size=y.size) if shape == "location" else 0.2 * rng.normal(size=(y.size, fam.n_scores))
    full = off if off.ndim == 2 else np.column_stack([off] + [np.zeros(y.size)] * (fam.n_scores - 1))
    model, _ = _train(engine, name, X, y, offset=off, rounds=1, params=_params(engine, learning_rate=1e-12))
    seen = full.astype(np.float32).astype(np.float64) if engine == "xgboost" else full  # base_margin: float32
    want = fam.baseline(y, offset=seen)
    tol = 1e-6 if engine == "xgboost" else 1e-9  # float32 baseline and margins in XGBoost; the generic search
    np.testing.assert_allclose(model.baseline, want, rtol=tol, atol=tol)
    np.testing.assert_allclose(model.predict_raw(X, offset=off), model.baseline + full, rtol=tol, atol=tol)
    # trained with offsets, validation sets carry their own; without one they are refused
    trained, log = _train(engine, name, X[:300], y[:300], offset=off[:300], rounds=5,
                          valid=[(X[300:], y[300:], off[300:])])
    raw = trained.predict_raw(X[300:], offset=off[300:])
    logged = log["valid_0"][f"{fam.name}_nll"][-1]
    assert logged == pytest.approx(float(np.mean(fam.nll(y[300:], raw))), rel=1e-5)
    with pytest.raises(ValueError, match="offset"):
        _train(engine, name, X[:300], y[:300], offset=off[:300], rounds=2, valid=[(X[300:], y[300:], None)])


@pytest.mark.parametrize("engine", ENGINES)
def test_early_stopping_cuts_to_the_best_round(engine):
    X, y = _draw("gaussian_spread", n=600, seed=6)
    p = _params(engine, learning_rate=0.3, **({"num_leaves": 31, "min_data_in_leaf": 10} if engine == "lightgbm"
                                              else {"max_depth": 6, "min_child_weight": 1.0}))
    kw = ({"callbacks": [lgb.early_stopping(5, verbose=False)]} if engine == "lightgbm"
          else {"early_stopping_rounds": 5})
    model, log = _train(engine, "gaussian_spread", X[:300], y[:300], rounds=200, params=p,
                        valid=[(X[300:], y[300:], None)], **kw)
    curve = log["valid_0"]["gaussian_spread_nll"]
    assert model.best_iteration is not None and len(curve) < 200
    assert model.best_iteration == int(np.argmin(curve))
    assert model.mean_loss(X[300:], y[300:]) == pytest.approx(min(curve), rel=1e-5)


@pytest.mark.parametrize("engine", ENGINES)
def test_curvature_is_one_train_argument(engine):
    X, y = _draw("gaussian_spread", seed=7)
    fits = {c: _train(engine, "gaussian_spread", X, y, rounds=3, curvature=c)[0] for c in ("newton", "fisher", "natural")}
    assert {c: f.info["curvature"] for c, f in fits.items()} == {c: c for c in fits}
    assert not np.array_equal(fits["newton"].predict_raw(X), fits["natural"].predict_raw(X))
    with pytest.raises(ValueError, match="curvature"):
        _train(engine, "gaussian_spread", X, y, rounds=1, curvature="exact")
    with pytest.raises(ValueError, match="curvature"):
        _train(engine, "gaussian", X, y, rounds=1, curvature="fisher")


def test_xgboost_multi_output_tree_layout():
    X, y = _draw("gaussian_spread", seed=8)
    model, _ = _train("xgboost", "gaussian_spread", X, y, rounds=4, multi_strategy="multi_output_tree")
    assert model.info["multi_strategy"] == "multi_output_tree"
    per_tree, _ = _train("xgboost", "gaussian_spread", X, y, rounds=4)
    assert per_tree.info["multi_strategy"] == "one_output_per_tree"
    assert model.predict_raw(X).shape == per_tree.predict_raw(X).shape == (y.size, 2)
    with pytest.raises(ValueError, match="multi_strategy"):
        _train("xgboost", "gaussian_spread", X, y, rounds=1, multi_strategy="both")


# ------------------------------------------------------------------------------------ save / load
@pytest.fixture(scope="module")
def saved_models(tmp_path_factory):
    """Every (engine, family) model saved, then loaded and predicted in one fresh process."""
    root = tmp_path_factory.mktemp("several_models")
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
        import test_several_boosting
        test_several_boosting.register_user_families()
        root = {str(root)!r}
        out = {{}}
        for engine in {list(ENGINES)!r}:
            for name in {list(FAMILIES)!r}:
                m = lossfam.load(f"{{root}}/{{engine}}-{{name}}.json")
                X = np.load(f"{{root}}/{{engine}}-{{name}}-X.npy")
                off = np.load(f"{{root}}/{{engine}}-{{name}}-off.npy")
                np.save(f"{{root}}/{{engine}}-{{name}}-r.npy", m.predict_raw(X, offset=off))
                np.save(f"{{root}}/{{engine}}-{{name}}-p.npy", m.predict(X, offset=off))
                out[f"{{engine}}/{{name}}"] = [type(m).__name__, m.engine, m.baseline.tolist(), m.info]
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
    r = np.load(root / f"{engine}-{name}-r.npy")
    p = np.load(root / f"{engine}-{name}-p.npy")
    assert r.tobytes() == model.predict_raw(X, offset=off).tobytes()
    assert p.tobytes() == model.predict(X, offset=off).tobytes()
    assert loaded[f"{engine}/{name}"] == ["SeveralScoreFit", engine, model.baseline.tolist(), model.info]
    again = _adapter(engine).load(path)
    assert type(again) is lossfam.SeveralScoreFit and again.predict_raw(X, offset=off).tobytes() == r.tobytes()


@pytest.mark.parametrize("engine", ENGINES)
def test_damaged_files_are_refused(saved_models, engine, tmp_path):
    rows, _, _ = saved_models
    _, _, _, path = rows[(engine, "gaussian_spread")]
    text = Path(path).read_text()
    doc = json.loads(text)

    def resealed(**change):  # edits that keep a valid checksum: lossfam's own checks must catch them
        body = {k: v for k, v in dict(doc, **change).items() if k != _filecheck.SEAL_FIELD}
        return json.dumps(_filecheck.reseal(body))
    cases = {
        "truncated": text[: len(text) // 2],
        "baseline edited": json.dumps(dict(doc, baseline=[v + 1.0 for v in doc["baseline"]])),
        "model cut": json.dumps(dict(doc, model=doc["model"][: len(doc["model"]) // 2])),
        "baseline too short": resealed(baseline=doc["baseline"][:1]),
        "baseline a number": resealed(baseline=0.5),
        "family with one score": resealed(family={"name": "gaussian", "params": {}}),
        "family with other scores": resealed(family={"name": "test_normal_log_variance", "params": {}},
                                             baseline=doc["baseline"] + [0.0]),
    }
    for label, content in cases.items():
        bad = tmp_path / f"{label.replace(' ', '_')}.json"
        bad.write_text(content)
        with pytest.raises(ValueError):
            lossfam.load(bad)


# ------------------------------------------------------------------------------------ scale that varies
def _scene(rng, n, varying=True):
    """A staircase mean of x0 and, when ``varying``, a scale growing x10 in ten steps across x1
    (0.3 to 3); else scale 1.  x2, x3 are noise features."""
    X = rng.uniform(0, 1, size=(n, 4))
    scale = 0.3 * 10 ** (np.floor(10 * X[:, 1]) / 9) if varying else np.ones(n)
    return X, np.floor(4 * X[:, 0]) / 2 + scale * rng.normal(size=n)


def _coverage_by_decile(law, y, scale):
    """Share of rows inside the central 90% interval of their law, per decile of ``scale``."""
    lo, hi = law.ppf(0.05), law.ppf(0.95)
    inside = (y >= lo) & (y <= hi)
    cuts = np.quantile(scale, np.linspace(0, 1, 11)[1:-1])
    decile = np.searchsorted(cuts, scale, side="right")
    return np.array([inside[decile == j].mean() for j in range(10)])


_HET_PARAMS = {"lightgbm": dict(verbosity=-1, num_threads=1, learning_rate=0.1, num_leaves=4, min_data_in_leaf=200),
               "xgboost": dict(nthread=1, learning_rate=0.1, max_depth=2, min_child_weight=200.0)}


def _het_fit(engine, fam, X, y):
    if engine == "lightgbm":
        return lossfam.lightgbm.train(fam, _HET_PARAMS[engine], lgb.Dataset(X, y), 150)
    return lossfam.xgboost.train(fam, _HET_PARAMS[engine], xgb.DMatrix(X, label=y), 150)


@pytest.mark.slow
@pytest.mark.parametrize("engine", ENGINES)
def test_varying_scale_beats_constant_scale_and_covers_every_decile(engine):
    rng = np.random.default_rng(13)
    X, y = _scene(rng, 30_000)
    Xv, yv = _scene(rng, 30_000)
    spread = _het_fit(engine, "gaussian_spread", X, y)
    const = _het_fit(engine, "gaussian", X, y)
    nll_spread, nll_const = spread.mean_loss(Xv, yv), const.mean_loss(Xv, yv)
    assert nll_spread < nll_const - 0.1  # clearly below (nats per row)
    scale = spread.parameters(Xv)[:, 1]  # deciles of the spread model's predicted scale, for both models
    cov_spread = _coverage_by_decile(spread.distribution(Xv), yv, scale)
    cov_const = _coverage_by_decile(const.distribution(Xv), yv, scale)
    assert np.all((cov_spread >= 0.88) & (cov_spread <= 0.92)), cov_spread
    assert not np.all((cov_const >= 0.88) & (cov_const <= 0.92)), cov_const
    assert cov_const[0] > 0.95 and cov_const[-1] < 0.85  # too wide for the easy rows, too narrow for the hard


@pytest.mark.slow
@pytest.mark.parametrize("engine", ENGINES)
def test_constant_scale_data_costs_the_spread_model_nothing(engine):
    rng = np.random.default_rng(14)
    X, y = _scene(rng, 30_000, varying=False)
    Xv, yv = _scene(rng, 30_000, varying=False)
    nll_spread = _het_fit(engine, "gaussian_spread", X, y).mean_loss(Xv, yv)
    nll_const = _het_fit(engine, "gaussian", X, y).mean_loss(Xv, yv)
    assert abs(nll_spread - nll_const) <= 0.005 * abs(nll_const), (nll_spread, nll_const)


# ------------------------------------------------------------------------------------ softmax twins
def _folds(n, k, seed):
    return np.array_split(np.random.default_rng(seed).permutation(n), k)


@pytest.mark.parametrize("engine", ENGINES)
@pytest.mark.parametrize("native", [True, False])
def test_multinomial_matches_the_builtin_multiclass_log_loss(engine, native):
    # outside reference: scikit-learn's wine data (sklearn.datasets.load_wine: 178 rows, 13 features,
    # 3 classes), 5 folds; held-out log loss (sklearn.metrics.log_loss) of lossfam's model against the
    # engine's own softmax objective (LightGBM "multiclass", XGBoost "multi:softprob"), same parameters
    # and rounds.  The custom path's diagonal Hessian p (1 - p) is the built-ins' divided by K / (K - 1)
    # (LightGBM) or 2 (XGBoost): larger steps at the same learning rate, so its log loss is only
    # checked to be a model of the same quality (within 10%).
    from sklearn.datasets import load_wine
    from sklearn.metrics import log_loss
    X, y = load_wine(return_X_y=True)
    y = y.astype(float)
    fam = lossfam.family("multinomial", n_classes=3)
    ours, builtin = [], []
    for test in _folds(y.size, 5, seed=15):
        train = np.setdiff1d(np.arange(y.size), test)
        if engine == "lightgbm":
            p = dict(verbosity=-1, num_threads=1, learning_rate=0.1, num_leaves=7, min_data_in_leaf=5)
            fit = lossfam.lightgbm.train(fam, p, lgb.Dataset(X[train], y[train]), 60, native=native)
            ref = lgb.train(dict(p, objective="multiclass", num_class=3), lgb.Dataset(X[train], y[train]), 60)
            ref_p = ref.predict(X[test])
        else:
            p = dict(nthread=1, learning_rate=0.1, max_depth=3, min_child_weight=1.0)
            fit = lossfam.xgboost.train(fam, p, xgb.DMatrix(X[train], label=y[train]), 60, native=native)
            ref = xgb.train(dict(p, objective="multi:softprob", num_class=3), xgb.DMatrix(X[train], label=y[train]), 60)
            ref_p = ref.predict(xgb.DMatrix(X[test]))
        assert fit.info["objective"] == ("custom" if not native else fam.native_twins[engine]["objective"])
        prob = fit.predict(X[test])
        assert prob.shape == (test.size, 3)
        np.testing.assert_allclose(prob.sum(axis=1), 1.0, rtol=1e-12)
        ours.append(log_loss(y[test], prob, labels=[0, 1, 2]))
        assert fit.mean_loss(X[test], y[test]) == pytest.approx(ours[-1], rel=1e-9)
        builtin.append(log_loss(y[test], ref_p, labels=[0, 1, 2]))
    ratio = np.mean(ours) / np.mean(builtin)
    assert ratio <= (1.01 if native else 1.10), (ours, builtin)


def test_xgboost_training_and_prediction_leave_the_dmatrix_base_margin_as_given():
    X, y = _draw("gaussian_spread", seed=16)
    dm = xgb.DMatrix(X, label=y)
    fit = lossfam.xgboost.train("gaussian_spread", _params("xgboost"), dm, 3, evals=[(dm, "train")],
                                verbose_eval=False)
    fit.predict_raw(dm)
    assert dm.get_base_margin().size == 0
    lossfam.xgboost.train("gaussian", _params("xgboost"), dm, 2)  # a one-score model on the same DMatrix
    off = np.full(y.size, 0.1)
    dm.set_base_margin(off)
    lossfam.xgboost.train("gaussian_spread", _params("xgboost"), dm, 2)
    np.testing.assert_array_equal(dm.get_base_margin(), off.astype(np.float32))


# ------------------------------------------------------------------------------------ scikit-learn wrapper
@pytest.mark.parametrize("engine", ENGINES)
def test_sklearn_boosted_regressor_trains_what_train_trains(engine):
    from sklearn.base import clone
    from lossfam.sklearn import BoostedLikelihoodRegressor
    X, y = _draw("gaussian_spread", seed=19)
    est = (lgb.LGBMRegressor(n_estimators=8, verbose=-1, n_jobs=1, num_leaves=7, learning_rate=0.1,
                             min_child_samples=20) if engine == "lightgbm"
           else xgb.XGBRegressor(n_estimators=8, n_jobs=1, max_depth=3, learning_rate=0.1, min_child_weight=1.0))
    reg = clone(BoostedLikelihoodRegressor(est, family="gaussian_spread")).fit(X[:300], y[:300])
    assert isinstance(reg.model_, lossfam.SeveralScoreFit) and reg.baseline_.shape == (2,)
    raw = reg.predict_raw(X[300:])
    assert raw.shape == (100, 2)
    np.testing.assert_array_equal(raw, reg.model_.predict_raw(X[300:]))
    np.testing.assert_array_equal(reg.predict(X[300:]), raw[:, 0])
    np.testing.assert_array_equal(reg.predict_distribution(X[300:]).std(), np.exp(raw[:, 1]))
    assert reg.score(X[300:], y[300:]) == pytest.approx(-reg.model_.mean_loss(X[300:], y[300:]), rel=1e-12)
    direct, _ = _train(engine, "gaussian_spread", X[:300], y[:300], rounds=8)
    np.testing.assert_allclose(raw, direct.predict_raw(X[300:]), rtol=1e-6, atol=1e-6)
