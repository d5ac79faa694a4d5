"""``train`` on a Dask cluster (``lossfam.ClusterData``), both engines, on a two-worker LocalCluster.

Scenarios (demo data of our own, numpy Generator seeded):
  * claim counts per policy, Poisson with the policy's years at risk as exposure
    (offset log years), mean e^(-1.2 + 0.5 sin(2 x0) + 0.4 x1);
  * delivery delays, skewed (a gamma-distributed delay around a log-linear
    effect), modelled at the 0.9 quantile with asymmetric_laplace.
Each is trained on one machine and on the cluster from the same rows in 16
partitions; the checks are the held-out metric (within 1%), the baseline (to
rounding for the poisson mean, exactly for the quantile), the nuisance fit, the
cluster-side metric, and save on the cluster -> load locally -> identical
predictions.
"""
from __future__ import annotations

import numpy as np
import pytest

import lossfam

lgb = pytest.importorskip("lightgbm")
xgb = pytest.importorskip("xgboost")
da = pytest.importorskip("dask.array")
distributed = pytest.importorskip("dask.distributed")
pytest.importorskip("xgboost.dask")
pytest.importorskip("lightgbm.dask")

from lossfam import lightgbm as lfl  # noqa: E402
from lossfam import xgboost as lfx  # noqa: E402
from lossfam._boost import cluster  # noqa: E402
from lossfam._boost.quantiles import sample_quantile  # noqa: E402
from user_families import LogisticLineSearchErrors, LogisticMedianErrors  # noqa: E402

PARTS = 16
N_TRAIN, N_TEST = 8000, 4000
ROUNDS = 40
PARAMS = {
    "lightgbm": {"num_leaves": 15, "learning_rate": 0.1, "min_data_in_leaf": 20, "seed": 1},
    "xgboost": {"max_depth": 4, "eta": 0.1, "tree_method": "hist", "nthread": 1, "seed": 1},
}


@pytest.fixture(scope="module")
def client():
    # real worker processes: the model, the families and lossfam's per-partition tasks are pickled to them
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None) as lc, \
            distributed.Client(lc) as c:
        yield c


def _claims(seed, n):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, 4))
    years = rng.uniform(0.2, 3.0, n)
    y = rng.poisson(years * np.exp(-1.2 + 0.5 * np.sin(2 * X[:, 0]) + 0.4 * X[:, 1])).astype(float)
    return X, y, None, np.log(years)


def _delays(seed, n):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, 4))
    y = np.exp(0.3 * X[:, 0] - 0.2 * X[:, 1]) * rng.gamma(2.0, 1.5, n) + 0.5 * np.abs(X[:, 2])
    w = rng.uniform(0.5, 2.0, n)  # weighted rows: the quantile selection must use the weights
    return X, y, w, None


CASES = {"poisson_exposure": ("poisson", {}, _claims), "asymmetric_laplace_0.9": ("asymmetric_laplace", {"quantile": 0.9}, _delays)}


def _dask(a, parts=PARTS):
    if a is None:
        return None
    rows = -(-a.shape[0] // parts)
    return da.from_array(a, chunks=(rows,) + a.shape[1:])


def _local(engine, fam, X, y, w, o):
    if engine == "lightgbm":
        return lfl.train(fam, dict(PARAMS[engine], num_threads=1, verbosity=-1), lgb.Dataset(X, y, weight=w), ROUNDS,
                         offset=o)
    return lfx.train(fam, PARAMS[engine], xgb.DMatrix(X, y, weight=w, base_margin=o), ROUNDS, verbose_eval=False)


def _cluster(engine, fam, X, y, w, o, client):
    data = lossfam.ClusterData(_dask(X), _dask(y), weight=_dask(w), offset=_dask(o))
    mod = lfl if engine == "lightgbm" else lfx
    return mod.train(fam, PARAMS[engine], data, ROUNDS, client=client)


@pytest.mark.parametrize("case", sorted(CASES))
@pytest.mark.parametrize("engine", ["lightgbm", "xgboost"])
def test_cluster_train_matches_local(engine, case, client, tmp_path):
    name, params, make = CASES[case]
    fam = lossfam.family(name, **params)
    X, y, w, o = make(11, N_TRAIN)
    Xt, yt, wt, ot = make(12, N_TEST)
    local = _local(engine, fam, X, y, w, o)
    fit = _cluster(engine, fam, X, y, w, o, client)
    assert type(fit) is type(local) is lossfam.BoostedFit
    assert fit.info["cluster"]["partitions"] >= 16 and fit.info["objective"] == local.info["objective"]
    # without a nuisance fit the trained scores are checked from the trees' range; with one, LightGBM's
    # own trained scores kept on the workers are checked, XGBoost's rows are predicted
    assert fit.info["cluster"]["trained_check"] == (("kept" if engine == "lightgbm" else "rows") if fam.params
                                                    else "bounds")
    # the timing of lossfam's own steps: known steps only, their sum, and the engine's call apart
    info = fit.info["cluster"]
    assert set(info["seconds"]) <= set(cluster.STEPS) and {"checks", "baseline"} <= set(info["seconds"])
    assert {"trained_check", "kept_scores"} & set(info["seconds"])
    assert info["lossfam_seconds"] == pytest.approx(sum(info["seconds"].values()), abs=1e-3)
    assert info["engine_seconds"] > 0 and info["overhead"] == pytest.approx(info["lossfam_seconds"] / info["engine_seconds"],
                                                                            rel=1e-3, abs=1e-4)

    # the baseline: the quantile by exact selection is the local number; the poisson mean (the root of
    # the summed gradient) agrees to rounding: its partition sums are added in another order
    if name == "asymmetric_laplace":
        assert fit.baseline == local.baseline
    else:
        assert fit.baseline == pytest.approx(local.baseline, rel=1e-12, abs=0)

    # held-out metric: the cluster's trees differ a little (each worker bins its own rows), the loss not
    held_local = local.mean_loss(Xt, yt, weight=wt, offset=ot)
    held_cluster = fit.mean_loss(Xt, yt, weight=wt, offset=ot)
    assert abs(held_cluster - held_local) <= 0.01 * abs(held_local), (held_cluster, held_local)
    # the same metric computed on the workers from Dask collections is the local number
    on_workers = fit.mean_loss(_dask(Xt), _dask(yt), weight=_dask(wt), offset=_dask(ot), client=client)
    assert on_workers == pytest.approx(held_cluster, rel=1e-12)

    # predictions on Dask input are lazy and equal the in-memory ones
    lazy = fit.predict_raw(_dask(Xt), offset=_dask(ot))
    assert isinstance(lazy, da.Array)
    raw_t = lazy.compute()
    np.testing.assert_array_equal(raw_t, fit.predict_raw(Xt, ot))

    # save on the cluster -> load locally -> identical predictions (and the same family and fit)
    path = tmp_path / f"{engine}_{case}.json"
    fit.save(path)
    back = lossfam.load(path)
    np.testing.assert_array_equal(back.predict_raw(Xt, ot), raw_t)
    np.testing.assert_array_equal(back.predict_raw(_dask(Xt), offset=_dask(ot)).compute(), raw_t)  # loaded, on Dask
    np.testing.assert_array_equal(back.predict(Xt, ot), fit.predict(_dask(Xt), offset=_dask(ot)).compute())
    assert back.baseline == fit.baseline and back.fitted_family == fit.fitted_family

    # the nuisance fit on the workers: asymmetric_laplace's scale is the family's own closed form
    # (the weighted mean pinball loss) at the trained raw scores, to the optimiser's tolerance
    if fam.params:
        train_raw = fit.predict_raw(X, o)
        own = fit.family.fit_nuisance(y, train_raw, w)
        assert fit.fitted_family.quantile == fam.quantile
        assert fit.fitted_family.scale == pytest.approx(own.scale, rel=1e-7)


def test_dataframe_input_and_lazy_series(client, tmp_path):
    """Dask DataFrame features and Series targets/weights; predictions come back as a lazy Series."""
    pd = pytest.importorskip("pandas")
    dd = pytest.importorskip("dask.dataframe")
    X, y, w, _ = _delays(13, 4000)
    fam = lossfam.family("asymmetric_laplace", quantile=0.9)
    df = pd.DataFrame(X, columns=["distance", "load", "hour", "weekday"])
    ddf = dd.from_pandas(df, npartitions=PARTS)
    fit = lfl.train(fam, PARAMS["lightgbm"], lossfam.ClusterData(ddf, dd.from_pandas(pd.Series(y), npartitions=PARTS),
                                                                  weight=dd.from_pandas(pd.Series(w), npartitions=PARTS)),
                    20, client=client)
    assert fit.baseline == fam.baseline(y, w)
    out = fit.predict(ddf)
    assert isinstance(out, dd.Series)
    got = out.compute()
    np.testing.assert_array_equal(got.to_numpy(), fit.predict(df))
    assert list(got.index) == list(df.index)
    path = tmp_path / "delays.json"
    fit.save(path)
    back = lossfam.load(path)  # the loaded model on pandas and on a Dask DataFrame
    np.testing.assert_array_equal(back.predict(df), got.to_numpy())
    np.testing.assert_array_equal(back.predict(ddf).compute().to_numpy(), got.to_numpy())
    with pytest.raises(TypeError, match="scipy law in memory"):
        fit.distribution(ddf)


# ----------------------------------------------------------------------------- the reductions alone
@pytest.mark.parametrize("q", [pytest.param(0.1, marks=pytest.mark.slow), pytest.param(0.5, marks=pytest.mark.slow), 0.9])
def test_weighted_quantile_is_exact_selection(client, monkeypatch, q):
    """Against lossfam._boost.quantiles.sample_quantile (the local baseline's definition) on targets with
    many ties and with cumulative weights that hit q W exactly; a tiny gather limit forces several
    narrowing rounds."""
    monkeypatch.setattr(cluster, "SELECT_GATHER", 64)
    monkeypatch.setattr(cluster, "SELECT_PIVOTS", 8 * PARTS)
    rng = np.random.default_rng(5)
    n = 3000
    x = rng.integers(0, 40, n).astype(float) + np.where(rng.random(n) < 0.5, rng.normal(size=n), 0.0)
    w = rng.integers(0, 4, n).astype(float)  # zeros take no part
    for weight in (None, w):
        stats = {"passes": 0, "gathered": 0}
        got = cluster.weighted_quantile(client, _dask(x), _dask(weight), q, stats)
        assert got == sample_quantile(x, weight, q), (q, weight is None)
        assert stats["gathered"] <= 64 * PARTS
    # ties of the cumulative weight with q W: 10 rows of weight 1, q = 0.5 -> midpoint of rows 5 and 6
    x10 = np.arange(10.0)[::-1].copy()
    assert cluster.weighted_quantile(client, _dask(x10, 4), None, 0.5) == sample_quantile(x10, None, 0.5) == 4.5


LEAN = ("gamma",)  # the default run; every other smooth family runs with -m slow


@pytest.mark.parametrize("engine", ["lightgbm", "xgboost"])
def test_engine_start_is_the_local_one(client, engine):
    """Where each engine's built-in quantile objective starts (lossfam._boost.facts.engine_start: its
    own sample quantile in single precision, HF 7 / HF 6 without weights, the inverted cdf or the
    midpoint with them), computed on the cluster from exact order statistics: the local number, bit
    for bit, on targets with ties, with and without weights and an offset.  Local training starts
    from the labels as the engine keeps them (float32; the targets here, 0.1 apart, are not exact in
    float32, so with an offset the order of the roundings shows)."""
    from lossfam._boost import facts

    rng = np.random.default_rng(9)
    n = 2400
    w = rng.uniform(0.5, 2.0, n)
    y1 = np.round(rng.gamma(2.0, 1.5, n), 1)  # many ties
    o1 = 0.1 * rng.integers(0, 3, n)
    y2 = 1000.0 + rng.gamma(2.0, 1.5, n)  # large targets, offsets near them: float32's rounding of the targets
    o2 = 1000.0 + 0.1 * rng.integers(0, 3, n)  # is far above that of their difference
    for y, o in ((y1, o1), (y2, o2)):
        data = {"xgboost": lambda: xgb.DMatrix(np.zeros((n, 1)), y), "lightgbm": lambda: lgb.Dataset(
            np.zeros((n, 1)), y, free_raw_data=False).construct()}[engine]()
        y_engine = np.asarray(data.get_label(), dtype=np.float64)  # (what local training reads back)
        assert np.array_equal(y_engine, y.astype(np.float32)) and not np.array_equal(y_engine, y)
        for tau in (0.9, 0.23):
            fam = lossfam.family("asymmetric_laplace", quantile=tau)
            for weight, offset in ((None, None), (None, o), (w, o)):
                local = facts.engine_start(fam, engine, y_engine, weight, offset)
                stats = {"passes": 0, "gathered": 0}
                wd = _dask(weight)
                yd, od = _dask(y), _dask(offset)
                got = cluster.engine_start(client, fam, engine, yd, wd, od, stats, n)
                if local is None:  # the engine falls back to the family's baseline: the exact midpoint quantile
                    assert got is None
                    local = fam.baseline(y, weight, offset=offset)
                    got = cluster.weighted_quantile(client, yd if od is None else yd - od, wd, tau)
                assert got == local, (engine, tau, weight is None, offset is None, y is y2)


def _smooth_families():
    names = [n for n in lossfam.available(scores="one") if lossfam.family(n).leaf_value == "newton"]
    return [n if n in LEAN else pytest.param(n, marks=pytest.mark.slow) for n in names]


@pytest.mark.parametrize("name", _smooth_families())
def test_cluster_baseline_equals_local(client, name):
    """The root of the summed gradient, found by passes over 16 partitions, is family.baseline: at least
    as good a minimiser of the weighted nll (to rounding) and within 1e-6 of it (some families' own
    baseline stops at scipy.optimize.minimize_scalar's default tolerance, 1.5e-8 relative in the raw
    score; the closed forms agree to 1e-12, checked for poisson in test_cluster_train_matches_local)."""
    fam = lossfam.family(name)
    rng = np.random.default_rng(7)
    n = 3200
    X = rng.normal(size=(n, 2))
    shift = 1.0 if fam.link_function.name == "identity" else 0.0
    y = fam.check_target(np.asarray(fam.distribution(0.3 * X[:, 0] + shift).rvs(random_state=rng), dtype=float),
                         for_nll=False)
    w = rng.uniform(0.5, 2.0, n)
    o = 0.2 * X[:, 1]
    stats = {"passes": 0}
    got = cluster.smooth_baseline(client, fam, _dask(y), _dask(w), _dask(o), stats)
    local = fam.baseline(y, w, offset=o)
    assert got == pytest.approx(local, rel=1e-6, abs=1e-9), name

    def mean_nll(c):
        return float(np.dot(w, fam.nll(y, c + o)) / w.sum())
    assert mean_nll(got) <= mean_nll(local) + 1e-13 * abs(mean_nll(local)), name
    assert stats["passes"] <= 40


@pytest.fixture
def user_families(client):
    """tests/ on the workers' path (the user families are pickled by reference) and the families
    registered for the test (the registry as it was afterwards: other tests list the families)."""
    import os
    import sys

    here = os.path.dirname(os.path.abspath(__file__))
    client.run(lambda d: None if d in sys.path else sys.path.insert(0, d), here)
    was = set(lossfam.available())
    for cls in (LogisticMedianErrors, LogisticLineSearchErrors):
        lossfam.register(cls, replace=True)
    yield
    for cls in (LogisticMedianErrors, LogisticLineSearchErrors):
        if cls.name not in was:
            lossfam.unregister(cls.name)


@pytest.mark.parametrize("engine", ["lightgbm", "xgboost"])
def test_bad_rows_are_named_and_line_search_leaves_are_refused(engine, client, user_families):
    X, y, _, o = _claims(3, 1600)
    y[1234] = -1.0
    mod = lfl if engine == "lightgbm" else lfx
    with pytest.raises(ValueError, match="rows 1200..1299"):
        mod.train("poisson", PARAMS[engine], lossfam.ClusterData(_dask(X), _dask(y), offset=_dask(o)), 5,
                  client=client)
    # median and quantile leaves are refit on the cluster; leaves set by a line search are not, and the
    # message says which leaves are
    Xd, yd, _, _ = _delays(3, 1600)
    name = "LightGBM" if engine == "lightgbm" else "XGBoost"
    with pytest.raises(ValueError, match=f"'line_search' rule .* not run on a {name} Dask cluster .*refits median"):
        mod.train(LogisticLineSearchErrors(), PARAMS[engine], lossfam.ClusterData(_dask(Xd), _dask(yd)), 5,
                  client=client)


@pytest.mark.slow
def test_nuisance_set_evals_and_early_stopping(client):
    """XGBoost on the cluster with an eval set: its metric adds the workers' sums, early stopping cuts
    the model, and nuisance_set fits the scale on the eval rows (the family's own closed form there)."""
    X, y, w, _ = _delays(21, 4000)
    Xv, yv, wv, _ = _delays(22, 2000)
    fam = lossfam.family("asymmetric_laplace", quantile=0.9)
    valid = lossfam.ClusterData(_dask(Xv), _dask(yv), weight=_dask(wv))
    history = {}
    fit = lfx.train(fam, dict(PARAMS["xgboost"], eta=0.5), lossfam.ClusterData(_dask(X), _dask(y), weight=_dask(w)),
                    200, evals=[(valid, "valid")], early_stopping_rounds=5, nuisance_set=0, evals_result=history,
                    verbose_eval=False, client=client)
    logged = history["valid"][f"{fam.name}_nll"]
    assert fit.best_iteration is not None and fit.best_iteration + 1 == fit.booster.num_boosted_rounds() < 200
    raw_v = fit.predict_raw(Xv)
    # the engine's metric at the best round is lossfam's nll of the cut model on all eval rows
    expect = float(np.dot(wv, fam.nll(yv, raw_v)) / wv.sum())
    assert logged[fit.best_iteration] == pytest.approx(expect, rel=1e-5)
    assert fit.info["cluster"]["valid_metrics"]["valid"] == pytest.approx(expect, rel=1e-9)
    assert fit.fitted_family.scale == pytest.approx(fam.fit_nuisance(yv, raw_v, wv).scale, rel=1e-7)


def test_best_round_is_lightgbms_early_stopping_rule():
    """cluster.best_round replays lightgbm.early_stopping on metric curves: the round it keeps is the
    one LightGBM's own callback picks when fed the same values (ties, min_delta, several valid sets,
    no stop before the last round)."""
    from lightgbm.callback import CallbackEnv, EarlyStopException

    rng = np.random.default_rng(4)
    cases = [[np.r_[5.0, 4.0, 4.0, 3.5, 3.6, 3.5, 3.7, 3.8, 3.9, 4.0, 4.1]],
             [np.r_[3.0, 2.0, 1.5, 1.4, 1.3, 1.2, 1.1, 1.0]]]  # never stops: the last round's best
    cases += [[np.cumsum(rng.normal(-0.05, 0.3, 60)) for _ in range(k)] for k in (1, 2, 3) for _ in range(3)]
    for curves in cases:
        for rounds, delta in ((3, 0.0), (5, 0.0), (4, 0.05)):
            cb = lgb.early_stopping(rounds, min_delta=delta, verbose=False)
            T = len(curves[0])
            kept = None
            for it in range(T):
                env = CallbackEnv(model=None, params={}, iteration=it, begin_iteration=0, end_iteration=T,
                                  evaluation_result_list=[lgb.EvalResult(f"v{i}", "nll", float(c[it]), False, None)
                                                          for i, c in enumerate(curves)])
                try:
                    cb(env)
                except EarlyStopException as stop:
                    kept = stop.best_iteration
                    break
            assert cluster.best_round(curves, rounds, delta) == kept, (rounds, delta)


def test_lightgbm_early_stopping_on_the_cluster(client, tmp_path):
    """LightGBM on the cluster with a ClusterData valid set (its own offset) and early_stopping: the
    per-round curve is lossfam's nll on all valid rows of the model cut after that round, the model
    keeps the rounds up to the best one, and the file keeps best_iteration."""
    fam = lossfam.family("poisson")
    X, y, w, o = _claims(31, 4000)
    Xv, yv, _, ov = _claims(32, 2000)
    valid = lossfam.ClusterData(_dask(Xv), _dask(yv), offset=_dask(ov))
    fit = lfl.train(fam, dict(PARAMS["lightgbm"], learning_rate=0.6, num_leaves=31, min_data_in_leaf=5),
                    lossfam.ClusterData(_dask(X), _dask(y), offset=_dask(o)), 150, valid_sets=[valid],
                    valid_names=["valid"], callbacks=[lgb.early_stopping(5, verbose=False)], client=client)
    info = fit.info["cluster"]
    curve = np.asarray(info["valid_curves"]["valid"])
    best = fit.best_iteration
    assert info["rounds_trained"] == len(curve) == 150
    assert best is not None and best + 5 < 150 and fit.booster.num_trees() == best + 1
    assert best == cluster.best_round([curve], 5)
    for r in sorted({0, best // 2, best}):
        raw = fit.baseline + ov + fit.booster.predict(Xv, raw_score=True, num_iteration=r + 1)
        assert curve[r] == pytest.approx(float(np.mean(fam.nll(yv, raw))), rel=1e-9), r
    assert info["valid_metrics"]["valid"] == curve[best] == pytest.approx(fit.mean_loss(Xv, yv, offset=ov), rel=1e-9)
    assert "best_round" in info["seconds"]
    path = tmp_path / "stopped.json"
    fit.save(path)
    back = lossfam.load(path)
    assert back.best_iteration == best
    np.testing.assert_array_equal(back.predict_raw(Xv, ov), fit.predict_raw(Xv, ov))
    with pytest.raises(ValueError, match="only callback accepted"):
        lfl.train(fam, PARAMS["lightgbm"], lossfam.ClusterData(_dask(X), _dask(y), offset=_dask(o)), 5,
                  valid_sets=[valid], callbacks=[lgb.log_evaluation(1)], client=client)


def _fake_workers(world, work):
    """Run ``work(reduce, rank)`` on ``world`` threads whose ``reduce`` sums an array over them."""
    import threading

    barrier, box, out = threading.Barrier(world), [None] * world, [None] * world

    def run(rank):
        def reduce(a):
            box[rank] = np.array(a, dtype=np.float64)
            barrier.wait()
            total = sum(box)
            barrier.wait()
            return total
        out[rank] = work(reduce, rank)

    threads = [threading.Thread(target=run, args=(r,)) for r in range(world)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    return out


def test_leaf_quantiles_across_workers_equal_one_machine(monkeypatch):
    """cluster.leaf_quantiles (rows split over 1-3 workers whose only exchange is summed arrays) gives,
    per leaf, exactly lossfam._boost.quantiles.grouped_quantile of all rows, for every definition,
    with ties and zero weights; a tiny gather limit forces several narrowing rounds."""
    from lossfam._boost.quantiles import grouped_quantile

    monkeypatch.setattr(cluster, "LEAF_GATHER", 8)
    monkeypatch.setattr(cluster, "LEAF_PIVOTS", 4)
    rng = np.random.default_rng(1)
    for _ in range(6):
        n, n_leaves, world = int(rng.integers(200, 3000)), int(rng.integers(1, 40)), int(rng.integers(1, 4))
        leaf = rng.integers(0, n_leaves, n)
        v = np.round(rng.normal(size=n) * 3, int(rng.integers(0, 3)))  # rounded: many ties
        for definition, w in (("weibull", None), ("linear", None), ("lower", rng.integers(0, 4, n).astype(float)),
                              ("midpoint", rng.uniform(0, 2, n)), ("midpoint", None)):
            for q in (0.1, 0.5, 0.9, 0.37):
                idx = np.split(np.arange(n), np.sort(rng.integers(0, n, world - 1)))
                out = _fake_workers(world, lambda reduce, r: cluster.leaf_quantiles(
                    reduce, r, world, leaf[idx[r]], v[idx[r]], None if w is None else w[idx[r]], n_leaves, q,
                    definition))
                ref, ref_has = grouped_quantile(leaf, v, w, q, n_leaves, definition)
                for values, has, rounds in out:
                    np.testing.assert_array_equal(has, ref_has)
                    np.testing.assert_array_equal(values[has], ref[has], err_msg=f"{definition} q={q} world={world}")


def _refit_variables(client, expect):
    """The LightGBM refit's Variables on the scheduler (sorted names), polled up to 5 s until they are
    ``expect``: a delete reaches the scheduler on the client's batched stream, shortly after."""
    import time

    from lossfam import _lightgbm_refit as lr

    for _ in range(100):
        got = sorted(client.run_on_scheduler(lambda dask_scheduler=None: [
            n for n in dask_scheduler.extensions["variables"].variables if str(n).startswith(lr.PREFIX)]))
        if got == expect:
            break
        time.sleep(0.05)
    return got


def test_lightgbm_refit_allreduce_over_variables(client):
    """The LightGBM refit's reduction over distributed Variables: three threads as workers each get the
    same bits, the sum in rank order, for a sequence of arrays of varying shapes; each step's old
    variables are gone, ``finish`` removes the last; a worker whose peer never comes stops with a
    clear error after its timeout and deletes its own; a worker waiting when the client ``stop``s the
    training ends within a second or two."""
    import threading
    import uuid

    from lossfam import _lightgbm_refit as lr

    def names(expect):
        return _refit_variables(client, expect)

    world, token = 3, uuid.uuid4().hex
    rng = np.random.default_rng(3)
    arrays = [[rng.normal(size=k) * 10.0 ** rng.integers(-8, 8, k) for k in (1, 5, 300, 7)] for _ in range(world)]
    out = [None] * world

    def run(rank):
        reduce = lr.Allreduce(token, rank, world, timeout=60, client=client)
        out[rank] = [reduce(a) for a in arrays[rank]]
    threads = [threading.Thread(target=run, args=(r,)) for r in range(world)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    for s in range(4):
        expect = (arrays[0][s] + arrays[1][s]) + arrays[2][s]
        for rank in range(world):
            assert out[rank][s].tobytes() == expect.tobytes(), (s, rank)
    last = [f"{lr.PREFIX}-{token}-3-{r}" for r in range(world)]
    assert names(last) == last  # the last step's only

    class Model:
        pass
    returned = Model()
    # (what the worker leaves on the model: seconds, steps, workers, detail)
    returned.lossfam_refit_ = (0.5, 4, world, {"by_prediction": 1})
    assert lr.finish(client, token, returned) == (0.5, 4, {"by_prediction": 1})
    assert not hasattr(returned, "lossfam_refit_")
    assert names([]) == []

    lonely = lr.Allreduce(uuid.uuid4().hex, 0, 2, timeout=0.5, client=client)
    with pytest.raises(RuntimeError, match="worker 0 of 2 waited 0.5 s for worker 1's value at reduction 0"):
        lonely(np.ones(3))
    assert names([]) == []  # a worker that fails deletes its own
    # a training stopped by the client (after another worker's error): the waiting worker ends soon
    waiting, caught = lr.Allreduce(uuid.uuid4().hex, 1, 2, timeout=120, client=client), []

    def wait():
        try:
            waiting(np.ones(3))
        except RuntimeError as exc:
            caught.append(str(exc))
    t = threading.Thread(target=wait)
    t.start()
    lr.stop(client, waiting.token)
    t.join(timeout=60)
    assert not t.is_alive() and len(caught) == 1 and "worker 1 stopped at reduction 0" in caught[0], caught
    assert names([]) == []


@pytest.fixture
def own_client():
    """A cluster of this test's own (a failure injected into its workers cannot reach other tests)."""
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None) as lc, \
            distributed.Client(lc) as c:
        yield c


def test_lightgbm_refit_stops_every_worker_when_one_fails(own_client):
    """A worker failing inside the cluster refit: the training raises its error at once (not after the
    others' reduction timeout), the other worker's task ends, and the cluster trains again afterwards
    with nothing left on the scheduler."""
    import time

    client = own_client
    addresses = sorted(client.scheduler_info()["workers"])

    def fail_at(n):
        from lossfam._boost import cluster as cl

        original, calls = cl.leaf_quantiles, [0]

        def failing(*a, **k):
            calls[0] += 1
            if calls[0] == n:
                cl.leaf_quantiles = original
                raise RuntimeError("injected failure")
            return original(*a, **k)
        cl.leaf_quantiles = failing
    X, y, w, _ = _delays(81, 2000)
    data = lossfam.ClusterData(_dask(X), _dask(y), weight=_dask(w))
    fam = lossfam.family("asymmetric_laplace", quantile=0.9)
    client.run(fail_at, 5, workers=addresses[:1])
    t0 = time.perf_counter()
    with pytest.raises(RuntimeError, match="injected failure|training was stopped"):
        lfl.train(fam, PARAMS["lightgbm"], data, 10, native=False, client=client)
    assert time.perf_counter() - t0 < 60
    assert _refit_variables(client, []) == []
    while any(client.processing().values()) and time.perf_counter() - t0 < 60:  # (the other task's end)
        time.sleep(0.1)
    assert not any(client.processing().values())
    fit = lfl.train(fam, PARAMS["lightgbm"], data, 10, native=False, client=client)
    assert fit.booster.num_trees() == 10 and _store_sizes(client) == [0, 0]


def test_lightgbm_refit_ranks_from_the_network_parameters():
    """Each worker's rank is its entry in LightGBM's ``machines`` (by its listen port, and its host where
    workers share a port); anything ambiguous is an error, not a guess."""
    from lossfam._lightgbm_refit import rank_of

    machines = "127.0.0.1:40001,127.0.0.1:40007,127.0.0.1:40003"
    assert [rank_of({"machines": machines, "local_listen_port": p, "num_machines": 3})
            for p in (40001, 40007, 40003)] == [(0, 3), (1, 3), (2, 3)]
    shared = "alpha:12400,beta:12400"
    assert rank_of({"machines": shared, "local_listen_port": 12400}, "tcp://beta:39000") == (1, 2)
    with pytest.raises(RuntimeError, match="not exactly one entry"):
        rank_of({"machines": shared, "local_listen_port": 12400})
    with pytest.raises(RuntimeError, match="not exactly one entry"):
        rank_of({"machines": machines, "local_listen_port": 40002})
    with pytest.raises(RuntimeError, match="no 'machines'"):
        rank_of({"local_listen_port": 40002})


@pytest.mark.parametrize("small", [False, True])
def test_leaf_quantiles_equal_the_sorted_selection(monkeypatch, small):
    """The selection with its first cut by histogram returns, bit for bit, the leaf values of the
    selection it replaced (every worker sorting its rows by leaf and value; kept in
    tests/leaf_selection_sorted.py): random cases with weights, zero weights, ties, empty leaves,
    heavy tails, 1-3 workers, every definition; ``small`` shrinks the histogram, the gather limit
    and the pivots so that the narrowing rounds after the cut run too."""
    import leaf_selection_sorted as before

    if small:
        monkeypatch.setattr(cluster, "LEAF_GATHER", 8)
        monkeypatch.setattr(cluster, "LEAF_PIVOTS", 4)
        monkeypatch.setattr(cluster, "LEAF_CUT_BUCKETS", 4)
    rng = np.random.default_rng(7 + small)
    narrowed = 0
    for case in range(8):
        n, n_leaves, world = int(rng.integers(1, 1500)), int(rng.integers(1, 50)), int(rng.integers(1, 4))
        leaf = rng.integers(0, n_leaves, n) // (2 if case % 3 == 0 else 1)  # the upper half of the leaves empty
        v = (np.round(rng.normal(size=n) * 3, int(rng.integers(0, 3))), rng.gamma(0.5, 2.0, n) ** 3,
             rng.standard_cauchy(n), np.full(n, 1.25))[case % 4]
        for definition, w in (("weibull", None), ("linear", None), ("weibull", np.ones(n)), ("lower", None),
                              ("lower", rng.integers(0, 4, n).astype(float)),
                              ("lower", rng.uniform(0, 2, n) * (rng.random(n) < 0.7)),
                              ("midpoint", rng.uniform(0, 2, n)), ("midpoint", None)):
            for q in (0.1, 0.5, 0.999) if case % 2 else (0.37, 0.9):
                idx = np.split(np.arange(n), np.sort(rng.integers(0, n, world - 1)))

                def part(r):
                    return leaf[idx[r]], v[idx[r]], None if w is None else w[idx[r]], n_leaves, q, definition
                old = _fake_workers(world, lambda reduce, r: before.leaf_quantiles(reduce, r, world, *part(r)))
                new = _fake_workers(world, lambda reduce, r: cluster.leaf_quantiles(reduce, r, world, *part(r)))
                for (v_old, has_old, _), (v_new, has_new, reductions) in zip(old, new):
                    np.testing.assert_array_equal(has_new, has_old)
                    np.testing.assert_array_equal(v_new, v_old, err_msg=f"{definition} q={q} world={world}")
                    narrowed += reductions > 3 + (definition in ("linear", "weibull") and w is not None)
    if small:  # the small settings do reach the narrowing rounds
        assert narrowed > 0


def _replayed_leaves(engine, fit, fam, X, y, w, o):
    """Per tree of the cluster model: (its leaf values, the values local training's refit gives those
    leaves): learning rate times the residual quantile of all training rows in each leaf, by the engine's
    renewal definition (``grouped_quantile``, one machine), at the raw scores of the trees before it,
    which are replayed here with the model's leaves.  XGBoost in its arithmetic: float32 labels,
    weights, margins and leaves."""
    from lossfam._boost import facts
    from lossfam._boost.quantiles import grouped_quantile

    level, definition = facts.leaf_level(fam), facts.renewal_definition(engine, weighted=w is not None)
    out = []
    if engine == "lightgbm":
        if definition == "linear":  # LightGBM's unit-weight renewal: its level is a float
            level = float(np.float32(level))
        b, lr = fit.booster, PARAMS[engine]["learning_rate"]
        raw = fit.baseline + o
        for t in range(b.num_trees()):
            leaves = np.asarray(b.predict(X, pred_leaf=True, start_iteration=t, num_iteration=1), dtype=np.intp).ravel()
            n = int(leaves.max()) + 1
            q, has = grouped_quantile(leaves, y - raw, w, level, n, definition)
            got = np.array([b.get_leaf_output(t, j) for j in range(n)])
            out.append((got[has], lr * q[has]))
            raw = raw + got[leaves]
        return out
    import json

    f32 = np.float32
    trees = json.loads(bytes(fit.booster.save_raw("json")))["learner"]["gradient_booster"]["model"]["trees"]
    raw = (fit.baseline + o).astype(f32).astype(np.float64)
    y32, w32 = (None if v is None else v.astype(f32).astype(np.float64) for v in (y, w))
    for t, tree in enumerate(trees):
        leaves = np.asarray(fit.booster[t:t + 1].predict(xgb.DMatrix(X), pred_leaf=True), dtype=np.intp).ravel()
        got = np.asarray(tree["split_conditions"], dtype=f32).astype(np.float64)
        q, has = grouped_quantile(leaves, y32 - raw, w32, level, got.size, definition)
        has &= np.asarray(tree["left_children"]) == -1
        out.append((got[has], (PARAMS[engine]["eta"] * q[has]).astype(f32).astype(np.float64)))
        raw = raw + got[leaves]
    return out


@pytest.mark.parametrize("case", ["asymmetric_laplace_0.9", "user_median",
                                  pytest.param("laplace_unweighted", marks=pytest.mark.slow)])
@pytest.mark.parametrize("engine", ["lightgbm", "xgboost"])
def test_refit_path_on_the_cluster(engine, case, client, tmp_path, user_families):
    """The custom path (native=False, or a user family without a twin) on the cluster: every leaf of
    every tree is renewed to the residual quantile of the rows of all workers (the number local
    training's refit computes for that tree on one machine, in the engine's arithmetic); the held-out
    loss is within 1% of local training's custom path on the same weighted, offset rows in 16
    partitions; the model saves and loads like any other, and nothing is left on the workers or the
    scheduler."""
    fam = {"user_median": LogisticMedianErrors(), "laplace_unweighted": lossfam.family("laplace")}.get(
        case, lossfam.family("asymmetric_laplace", quantile=0.9))
    X, y, w, _ = _delays(41, N_TRAIN)
    Xt, yt, wt, _ = _delays(42, N_TEST)
    if case == "laplace_unweighted":  # the engines' unit-weight renewal definitions
        w = wt = None
    o, ot = (0.3 * np.random.default_rng(s).normal(size=n) for s, n in ((43, N_TRAIN), (44, N_TEST)))
    if engine == "lightgbm":
        local = lfl.train(fam, dict(PARAMS[engine], num_threads=1, verbosity=-1), lgb.Dataset(X, y, weight=w), ROUNDS,
                          offset=o, native=False)
        fit = lfl.train(fam, PARAMS[engine], lossfam.ClusterData(_dask(X), _dask(y), weight=_dask(w), offset=_dask(o)),
                        ROUNDS, native=False, client=client)
    else:
        local = lfx.train(fam, PARAMS[engine], xgb.DMatrix(X, y, weight=w, base_margin=o), ROUNDS, native=False,
                          verbose_eval=False)
        fit = lfx.train(fam, PARAMS[engine], lossfam.ClusterData(_dask(X), _dask(y), weight=_dask(w), offset=_dask(o)),
                        ROUNDS, native=False, client=client, verbose_eval=False)
    assert fit.info["objective"] == local.info["objective"] == "custom"
    assert fit.info["leaf_value"] == local.info["leaf_value"] == fam.leaf_value
    info = fit.info["cluster"]
    assert info["partitions"] >= 16 and info["refit_passes"] >= ROUNDS and "refit" in info["seconds"]
    assert 0 < info["seconds"]["refit"] <= info["lossfam_seconds"]
    # the rows' leaves came from the change of the engine's cached training scores, not from a
    # prediction of every row, on all trees but the last (read after training) and a few whose leaf
    # values lie too close together (the leaves are checked against one machine's below)
    assert info["refit_detail"]["by_prediction"] <= 1 + ROUNDS // 4, info["refit_detail"]
    # the trees differ from local training's (each worker bins its own rows), so the leaves are checked
    # tree by tree against the one-machine refit of those trees
    replay = _replayed_leaves(engine, fit, fam, X, y, w, o)
    assert len(replay) == ROUNDS
    for t, (got, expect) in enumerate(replay):
        assert got.size >= 2, t
        np.testing.assert_array_equal(got, expect, err_msg=f"tree {t}")
    held_local, held = local.mean_loss(Xt, yt, weight=wt, offset=ot), fit.mean_loss(Xt, yt, weight=wt, offset=ot)
    assert abs(held - held_local) <= 0.01 * abs(held_local), (held, held_local)
    if engine == "lightgbm":  # the workers' own refit raw scores stood in for predicting the training rows
        assert info["trained_check"] == "kept" and info["kept_scores"] == "used"
        assert not hasattr(fit.booster, "lossfam_refit_")
        assert _store_sizes(client) == [0, 0]
        assert _refit_variables(client, []) == []
    # the nuisance fit at the trained raw scores: the family's own fit on those rows, or (the user family's
    # generic fit stops about 2e-5 short) a scale of no larger mean nll
    train_raw = fit.predict_raw(X, o)
    own = fam.fit_nuisance(y, train_raw, w)
    assert fit.fitted_family.scale == pytest.approx(own.scale, rel=1e-7 if case != "user_median" else 1e-4)
    nll = [float(np.average(f.nll(y, train_raw), weights=w)) for f in (fit.fitted_family, own)]
    assert nll[0] <= nll[1] + 1e-12 * abs(nll[1]), nll
    path = tmp_path / f"refit_{engine}.json"
    fit.save(path)
    back = lossfam.load(path)
    np.testing.assert_array_equal(back.predict_raw(Xt, ot), fit.predict_raw(Xt, ot))
    if engine == "xgboost":
        assert back.booster.attr("lossfam_refit_seconds") is None


def _leaf_values(engine, booster):
    """Per tree, its leaf values (LightGBM: by leaf index; XGBoost: float32, by node id, leaves only)."""
    if engine == "lightgbm":
        return lfl._leaf_tables(booster)
    import json

    trees = json.loads(bytes(booster.save_raw("json")))["learner"]["gradient_booster"]["model"]["trees"]
    return [np.asarray(t["split_conditions"], dtype=np.float32)[np.asarray(t["left_children"]) == -1] for t in trees]


@pytest.mark.parametrize("engine", ["lightgbm", "xgboost"])
def test_refit_on_the_cluster_grows_the_local_model(engine, client):
    """Where the workers bin the features as one machine does (few distinct values) and the rows carry
    no weights (the gradient sums are then exact in any order), the custom path on the cluster grows
    local training's custom-path model: every row in the same leaf of every tree, and every leaf the
    local value, on LightGBM to 2 ulp (local training interpolates the quantile in LightGBM's order
    of operations, the cluster's selection in lossfam's: the same definition at LightGBM's float
    level), on XGBoost to 16 float32 ulp of the raw scores (local training follows XGBoost's float32
    arithmetic, its scores float32 sums of the leaves; the cluster's workers keep their scores in
    float64 and select in float64, so the leaves differ by ulps of the scores: at most 1.1e-6 here)."""
    rng = np.random.default_rng(5)
    X = rng.integers(0, 8, size=(N_TRAIN, 4)).astype(float)
    # targets and offsets in float32: XGBoost's local DMatrix keeps its labels and base_margin so, while
    # the cluster's start reads the float64 ones (its engine start differs by a float32 ulp otherwise)
    f32 = np.float32
    y = (np.exp(0.3 * X[:, 0] - 0.2 * X[:, 1]) * rng.gamma(2.0, 1.5, N_TRAIN)).astype(f32).astype(np.float64)
    o = (0.3 * rng.normal(size=N_TRAIN)).astype(f32).astype(np.float64)
    fam = lossfam.family("asymmetric_laplace", quantile=0.9)
    data = lossfam.ClusterData(_dask(X), _dask(y), offset=_dask(o))
    if engine == "lightgbm":
        local = lfl.train(fam, dict(PARAMS[engine], num_threads=1, verbosity=-1), lgb.Dataset(X, y), ROUNDS, offset=o,
                          native=False)
        fit = lfl.train(fam, PARAMS[engine], data, ROUNDS, native=False, client=client)
        leaves = [b.predict(X, pred_leaf=True) for b in (local.booster, fit.booster)]
    else:
        local = lfx.train(fam, PARAMS[engine], xgb.DMatrix(X, y, base_margin=o), ROUNDS, native=False,
                          verbose_eval=False)
        fit = lfx.train(fam, PARAMS[engine], data, ROUNDS, native=False, client=client, verbose_eval=False)
        leaves = [b.predict(xgb.DMatrix(X), pred_leaf=True) for b in (local.booster, fit.booster)]
    assert fit.baseline == local.baseline
    np.testing.assert_array_equal(leaves[1], leaves[0])
    mine, theirs = _leaf_values(engine, fit.booster), _leaf_values(engine, local.booster)
    assert len(mine) == len(theirs) == ROUNDS
    for t, (a, b) in enumerate(zip(mine, theirs)):
        if engine == "lightgbm":
            np.testing.assert_array_max_ulp(a, b, maxulp=2)
        else:
            np.testing.assert_allclose(a, b, rtol=0, atol=16 * np.spacing(np.float32(abs(local.baseline))),
                                       err_msg=f"tree {t}")
    if engine == "lightgbm":
        assert sum(np.array_equal(a, b) for a, b in zip(mine, theirs)) >= ROUNDS // 2  # most trees bit for bit


# ----------------------------------------------------------------------------- LightGBM's kept training scores
def _store_sizes(client):
    return sorted(client.run(lambda: len(cluster._KEPT)).values())


@pytest.mark.parametrize("case", sorted(CASES))
def test_lightgbm_kept_scores_are_the_predicted_ones(case, client, monkeypatch):
    """LightGBM's own trained scores, kept on each worker, are the model's predicted raw scores of the
    training rows (init score and offset included; poisson's buffer holds e^raw) to 1e-12 relative,
    with the float64 targets and weights handed to training; the scale fitted on them is the one the
    prediction path fits on the same model; and the workers' store is empty afterwards."""
    name, params, make = CASES[case]
    fam = lossfam.family(name, **params)
    X, y, w, o = make(51, N_TRAIN)
    seen = {}
    drop = cluster.KeptRows.drop

    def look_then_drop(self):  # what the workers hold, just before it is dropped
        if not self.dropped:
            seen.update(client.run(lambda token: (lambda k: None if k is None else (k.raw, k.y, k.w))(
                next((v for (t, _), v in cluster._KEPT.items() if t == token), None)), self.token))
        drop(self)
    monkeypatch.setattr(cluster.KeptRows, "drop", look_then_drop)
    data = lossfam.ClusterData(_dask(X), _dask(y), weight=_dask(w), offset=_dask(o))
    fit = lfl.train(fam, PARAMS["lightgbm"], data, ROUNDS, client=client)
    info = fit.info["cluster"]
    assert _store_sizes(client) == [0, 0]
    parts = [v for v in seen.values() if v is not None]
    assert len(parts) == 2 and sum(p[0].size for p in parts) == N_TRAIN
    kept_raw = np.sort(np.concatenate([p[0] for p in parts]))
    predicted = np.sort(fit.predict_raw(X, o))
    np.testing.assert_allclose(kept_raw, predicted, rtol=1e-12, atol=1e-12)
    if not fam.params:  # nothing needs the rows: the trees' range suffices, the targets were not kept
        assert info["trained_check"] == "bounds" and all(p[1] is None for p in parts)
        return
    assert info["trained_check"] == "kept" and info["kept_scores"] == "used"
    assert "kept_scores" in info["seconds"] and "trained_check" not in info["seconds"]
    # the targets and weights as handed to LightGBM, in float64 (its own Dataset keeps float32)
    np.testing.assert_array_equal(np.sort(np.concatenate([p[1] for p in parts])), np.sort(y))
    np.testing.assert_array_equal(np.sort(np.concatenate([p[2] for p in parts])), np.sort(w))
    # the prediction path's nuisance fit on the same model (same start: the family's own fit on a
    # block of the first partition's size; then passes over all rows, summed in another order)
    yd, wd = data.aligned(client)[1:3]
    by_prediction = cluster.fit_nuisance(client, fam, yd, wd, fit.predict_raw(data.X, data.offset))
    assert fit.fitted_family.scale == pytest.approx(by_prediction.scale, rel=1e-8)
    assert fit.fitted_family.scale == pytest.approx(fam.fit_nuisance(y, fit.predict_raw(X, o), w).scale, rel=1e-7)

    # forced onto the prediction path (as when a worker lost its kept rows): the rows are predicted
    monkeypatch.setattr(cluster.KeptRows, "check", lambda self, fam, n, need, stats: (
        stats.__setitem__("kept", "incomplete"), (False, None))[1])
    again = lfl.train(fam, PARAMS["lightgbm"], data, ROUNDS, client=client)
    assert again.info["cluster"]["trained_check"] == "rows" and again.info["cluster"]["kept_scores"] == "incomplete"
    assert again.fitted_family.scale == pytest.approx(
        fam.fit_nuisance(y, again.predict_raw(X, o), w).scale, rel=1e-7)
    assert _store_sizes(client) == [0, 0]


def test_lightgbm_kept_scores_fall_back_after_early_stopping(client):
    """A model cut by early stopping is not the one whose scores were kept: the rows are predicted."""
    fam = lossfam.family("asymmetric_laplace", quantile=0.9)
    X, y, w, _ = _delays(61, 3000)
    Xv, yv, wv, _ = _delays(62, 1500)
    fit = lfl.train(fam, dict(PARAMS["lightgbm"], learning_rate=0.8, num_leaves=31, min_data_in_leaf=5),
                    lossfam.ClusterData(_dask(X), _dask(y), weight=_dask(w)), 80,
                    valid_sets=[lossfam.ClusterData(_dask(Xv), _dask(yv), weight=_dask(wv))],
                    callbacks=[lgb.early_stopping(3, verbose=False)], client=client)
    info = fit.info["cluster"]
    assert fit.best_iteration is not None and fit.booster.num_trees() == fit.best_iteration + 1 < 80
    assert info["trained_check"] == "rows" and info["kept_scores"] == "early stopping cut the model"
    assert fit.fitted_family.scale == pytest.approx(fam.fit_nuisance(y, fit.predict_raw(X), w).scale, rel=1e-7)
    assert _store_sizes(client) == [0, 0]


def test_bad_kept_scores_are_named_by_the_prediction_pass(client, monkeypatch):
    """Rows whose trained raw score leaves the log link's range (an offset of -800: e^raw is 0) are
    found in the kept scores; the prediction pass then names them, and the store is emptied."""
    X, y, _, o = _claims(71, 1600)
    o[[1234, 1300]] = -800.0
    y[[1234, 1300]] = 0.0
    reasons = []
    check = cluster.KeptRows.check

    def spy(self, fam, n, need, stats):
        out = check(self, fam, n, need, stats)
        reasons.append(stats.get("kept"))
        return out
    monkeypatch.setattr(cluster.KeptRows, "check", spy)
    with pytest.raises(ValueError, match=r"diverged.* at 2 training rows \(e.g. rows \[1234, 1300\]\)"):
        lfl.train("poisson", PARAMS["lightgbm"], lossfam.ClusterData(_dask(X), _dask(y), offset=_dask(o)), 5,
                  native=False, client=client)
    assert reasons == ["bad rows"]
    assert _store_sizes(client) == [0, 0]


def test_kept_scores_need_lightgbm_dasks_model_factory():
    """The private entry point is guarded: without its model_factory argument nothing is kept (the
    rows are predicted), and an objective whose output cannot be mapped back keeps nothing."""
    from lossfam import _lightgbm_keep

    class Plan:
        stats = {}

    class OldDask:
        class DaskLGBMRegressor:
            def _lgb_dask_fit(self, X, y, **kwargs):
                pass

    assert lfl._keeping(OldDask, None, Plan, "quantile", True) == (None, None, None)
    assert Plan.stats["kept"] == "lightgbm.dask takes no model_factory"
    import lightgbm.dask as ldask

    assert lfl._keeping(ldask, None, Plan, "binary", False) == (None, None, None)
    assert Plan.stats["kept"] == "LightGBM's binary output is not kept"
    assert _lightgbm_keep.inverse_for("poisson") == "log" and _lightgbm_keep.inverse_for(lambda *a: None) == "identity"
