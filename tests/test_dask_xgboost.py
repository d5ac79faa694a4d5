"""lossfam's XGBoost objective and metric under xgboost.dask on a two-worker local cluster.

Reference: the same objective, metric and parameters in single-machine xgb.train on the
same rows.  The features take 16 distinct values each, so both histogram sketches find
the same bin boundaries and the two models should agree up to float summation order.
Scenario (demo data of our own): visit counts per shop, Poisson around a log-linear
effect of four coded shop attributes; numpy Generator seeded 3.
"""
from __future__ import annotations

import numpy as np
import pytest

import lossfam

xgb = pytest.importorskip("xgboost")
lx = pytest.importorskip("lossfam.xgboost")
da = pytest.importorskip("dask.array")
distributed = pytest.importorskip("dask.distributed")
dxgb = pytest.importorskip("xgboost.dask")


def test_distributed_poisson_matches_single_machine():
    rng = np.random.default_rng(3)
    n = 4000
    X = rng.integers(-8, 8, size=(n, 4)) / 4.0
    y = rng.poisson(np.exp(0.4 * X[:, 0] - 0.3 * X[:, 1])).astype(float)
    fam = lossfam.family("poisson")
    params = {"nthread": 1, "eta": 0.2, "max_depth": 3, "tree_method": "hist",
              "base_score": fam.baseline(y), "disable_default_eval_metric": 1}
    rounds = 30

    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  dashboard_address=None) as cluster, distributed.Client(cluster) as client:
        Xd = da.from_array(X, chunks=(1000, 4))
        yd = da.from_array(y, chunks=1000)
        dtrain = dxgb.DaskDMatrix(client, Xd, yd)
        out = dxgb.train(client, params, dtrain, rounds, obj=lx.objective(fam), custom_metric=lx.metric(fam),
                         evals=[(dtrain, "train")], verbose_eval=False)
        assert len(client.scheduler_info()["workers"]) == 2
        raw_dist = np.asarray(dxgb.predict(client, out["booster"], Xd, output_margin=True).compute(), dtype=float)
        logged = out["history"]["train"]["poisson_nll"]

    single = {}
    local = xgb.train(params, xgb.DMatrix(X, label=y), rounds, obj=lx.objective(fam), custom_metric=lx.metric(fam),
                      evals=[(xgb.DMatrix(X, label=y), "train")], evals_result=single, verbose_eval=False)
    raw_local = local.predict(xgb.DMatrix(X), output_margin=True).astype(float)

    np.testing.assert_allclose(np.exp(raw_dist), np.exp(raw_local), rtol=1e-4)
    # the metric adds each worker's sums: the logged value is the nll of the whole data set
    # (scipy.stats.poisson.logpmf as the reference)
    from scipy import stats
    assert logged[-1] == pytest.approx(-np.mean(stats.poisson.logpmf(y, np.exp(raw_dist))), rel=1e-5)
    assert logged[-1] == pytest.approx(single["train"]["poisson_nll"][-1], rel=1e-5)
    assert logged[-1] < logged[0]
