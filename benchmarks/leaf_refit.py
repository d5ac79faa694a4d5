"""One worker's side of the cluster leaf refit (XGBoost's custom path), timed on arrays.

For a worker holding ``--rows`` rows (default 5e5: 1e6 rows over 2 workers), per tree of a depth-6
XGBoost model of the delivery-delay scenario of ``dask_train.py`` (weighted rows, tau = 0.9):

* the rows' leaf indices (``booster[t:t + 1].predict(dtrain, pred_leaf=True)``, 1 thread), as
  ``lossfam._xgboost_refit.catch_up`` computes them;
* ``lossfam._boost.cluster.leaf_quantiles`` on the residuals, one worker (``world = 1``: the
  reductions return their argument, so only the worker's own work is timed), with XGBoost's
  renewal definitions ("lower" with weights, "weibull" without);
* the same with the sorted selection it replaced (``tests/leaf_selection_sorted.py``), side by side,
  and a check that both give the same leaf values.

Printed: median milliseconds per tree over ``--repeats`` calls on each of ``--trees`` trees, the
reductions per tree and the numbers they carry.  The reductions' latency between processes is not
in these figures (``dask_train.py`` measures the whole refit on a cluster).

Usage::

    python benchmarks/leaf_refit.py --rows 5e5 --trees 5 --repeats 5
"""
from __future__ import annotations

import argparse
import os
import statistics
import sys
import time

import numpy as np


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--rows", type=float, default=5e5)
    ap.add_argument("--trees", type=int, default=5)
    ap.add_argument("--repeats", type=int, default=5)
    args = ap.parse_args()
    import xgboost as xgb

    from lossfam._boost import cluster
    sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "tests"))
    import leaf_selection_sorted as sorted_selection

    n = int(args.rows)
    rng = np.random.default_rng(2026)
    X = rng.normal(size=(n, 10))
    y = np.exp(0.3 * X[:, 0] - 0.2 * X[:, 1] + 0.1 * X[:, 2] * X[:, 3]) * rng.gamma(2.0, 1.5, n) + 0.5 * np.abs(X[:, 4])
    w = rng.uniform(0.5, 2.0, n)
    d = xgb.DMatrix(X, y, weight=w)
    rounds = 50
    b = xgb.train({"max_depth": 6, "eta": 0.1, "tree_method": "hist", "nthread": 1, "objective": "reg:quantileerror",
                   "quantile_alpha": 0.9}, d, rounds)
    v = d.get_label().astype(np.float64) - b.predict(d, output_margin=True).astype(np.float64)
    print(f"rows {n} (one worker), depth 6, trees {args.trees} of {rounds}, repeats {args.repeats} (medians); "
          "load %.2f %.2f %.2f" % os.getloadavg())
    sizes = []

    def reduce(a):
        sizes.append(np.size(a))
        return np.asarray(a, dtype=np.float64)

    def timed(fn):
        out, ts = None, []
        for _ in range(args.repeats):
            sizes.clear()
            t0 = time.perf_counter()
            out = fn()
            ts.append(time.perf_counter() - t0)
        return statistics.median(ts), out, len(sizes), sum(sizes)

    rows = {}
    for t in np.linspace(0, rounds - 1, args.trees).round().astype(int):
        s, leaves, _, _ = timed(lambda: np.asarray(b[t:t + 1].predict(d, pred_leaf=True), dtype=np.intp).reshape(-1))
        rows.setdefault("leaf indices (pred_leaf)", []).append((s, 0, 0))
        n_nodes = int(leaves.max()) + 1
        for definition, wt in (("lower", w), ("weibull", None)):
            got = {}
            for name, mod in (("cut by histogram", cluster), ("sorted (before)", sorted_selection)):
                s, out, k, numbers = timed(lambda: mod.leaf_quantiles(reduce, 0, 1, leaves, v, wt, n_nodes, 0.9, definition))
                got[name] = out[0]
                rows.setdefault(f"leaf_quantiles {definition}, {name}", []).append((s, k, numbers))
            assert np.array_equal(got["cut by histogram"], got["sorted (before)"]), (t, definition)
    print("| step | ms per tree | reductions per tree | numbers reduced per tree |\n|---|---:|---:|---:|")
    for name, vals in rows.items():
        med = [statistics.median(x[i] for x in vals) for i in range(3)]
        print(f"| {name} | {1e3 * med[0]:.1f} | {med[1]:.0f} | {med[2]:.0f} |")
    print("(same leaf values from both selections on every tree)")
    print("load after %.2f %.2f %.2f" % os.getloadavg())


if __name__ == "__main__":
    main()
