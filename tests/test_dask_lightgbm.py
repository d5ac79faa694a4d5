"""The lossfam LightGBM objective and metric under dask.distributed (lightgbm.dask).

A two-worker LocalCluster trains a Poisson model on a chunked dask array; the
distributed model must agree closely with the single-machine model trained
with the same objective on the same rows.
"""
import numpy as np
import pytest

lgb = pytest.importorskip("lightgbm")
da = pytest.importorskip("dask.array")
distributed = pytest.importorskip("dask.distributed")

import lossfam  # noqa: E402
from lossfam import lightgbm as lfl  # noqa: E402


def _claims(seed=4, n=8000):
    """Simulated counts: y ~ Poisson(exp(0.3 + 0.5 sin(2 x0) + 0.4 x1)), x ~ N(0, I_4), seeded."""
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, 4))
    y = rng.poisson(np.exp(0.3 + 0.5 * np.sin(2 * X[:, 0]) + 0.4 * X[:, 1])).astype(float)
    return X, y


def test_dask_poisson_matches_single_machine():
    X, y = _claims()
    Xte, yte = _claims(seed=5, n=2000)
    fam = lossfam.family("poisson")
    base = fam.baseline(y)
    kw = dict(objective=lfl.objective(fam), n_estimators=40, learning_rate=0.1, num_leaves=15,
              min_child_samples=20, metric="None", verbosity=-1, random_state=1)

    single = lgb.LGBMRegressor(n_jobs=1, **kw)
    single.fit(X, y, init_score=np.full(y.size, base))
    raw_single = base + single.predict(Xte, raw_score=True)

    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  dashboard_address=None) as cluster, distributed.Client(cluster) as client:
        dX = da.from_array(X, chunks=(X.shape[0] // 2, X.shape[1]))
        dy = da.from_array(y, chunks=X.shape[0] // 2)
        dinit = da.from_array(np.full(y.size, base), chunks=X.shape[0] // 2)
        dXte = da.from_array(Xte, chunks=(1000, Xte.shape[1]))
        dyte = da.from_array(yte, chunks=1000)
        model = lgb.DaskLGBMRegressor(client=client, **kw)  # one thread per worker
        model.fit(dX, dy, init_score=dinit, eval_X=(dXte,), eval_y=(dyte,),
                  eval_init_score=[da.from_array(np.full(yte.size, base), chunks=1000)],
                  eval_metric=lfl.metric(fam))
        raw_dist = base + model.predict(dXte, raw_score=True).compute()
        nll_log = model.evals_result_["valid_0"]["poisson_nll"]

    # the distributed histograms are the sums of the workers' ones; bin boundaries come from each
    # worker's sample, so the trees can differ slightly: demand close, not identical, predictions
    assert np.median(np.abs(raw_dist - raw_single)) < 0.02
    assert np.corrcoef(raw_dist, raw_single)[0, 1] > 0.995
    # the metric ran on the workers under its own name.  lightgbm.dask evaluates each worker's local
    # part of the eval set and reports the log of the worker whose model it returns, so the logged
    # value is the mean nll of the final model on one of the two held-out chunks
    parts = [float(np.mean(fam.nll(yte[s], raw_dist[s]))) for s in (slice(0, 1000), slice(1000, None))]
    assert len(nll_log) == 40
    assert min(abs(nll_log[-1] - p) / p for p in parts) < 1e-9, (nll_log[-1], parts)
