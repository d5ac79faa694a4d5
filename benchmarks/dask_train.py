"""``train`` on a Dask LocalCluster against local ``train``, and the share of lossfam's own cluster steps.

For each engine and family (poisson with an exposure offset; asymmetric_laplace at tau = 0.9 on
weighted rows), alternately:

* local: ``lossfam.<engine>.train`` on numpy arrays with ``--local-threads`` threads;
* cluster: ``lossfam.<engine>.train`` on ``lossfam.ClusterData`` over a
  ``LocalCluster(n_workers=2, threads_per_worker=1)`` (worker processes), the data already
  persisted on the workers in ``--partitions`` partitions.

Printed (medians over ``--repeats``), first one row per cell: local seconds, cluster seconds (the
whole ``train`` call), their ratio; the engine's training call on the cluster
(``fit.info["cluster"]["engine_seconds"]``: ``lightgbm.dask`` / ``xgboost.dask`` growing the trees);
lossfam's own cluster steps (``lossfam_seconds``: checks, baseline, starting scores, nuisance
fit, refits, metric, ...) and their share of the engine time (``overhead``, the target is at most
10%); the passes over the partitions; the held-out mean nll of the cluster model over the local
model's.  Then one row per cell with each step's median seconds and its share of the engine time
(``fit.info["cluster"]["seconds"]``, steps in ``lossfam._boost.cluster.STEPS``).  The load average
(``os.getloadavg``) is printed before and after: on a shared machine the seconds mean little
without it.

Usage::

    python benchmarks/dask_train.py --rows 1e6 --rounds 100 --local-threads 2 --repeats 3

The scenario (demo data of our own): 10 features, N(0, 1); claim counts with years at risk in
[0.2, 3] as exposure; skewed delivery delays with weights in [0.5, 2].  Held-out: 20% extra rows.
"""
from __future__ import annotations

import argparse
import statistics
import warnings
import time

import numpy as np


def claims(rng, n):
    X = rng.normal(size=(n, 10))
    years = rng.uniform(0.2, 3.0, n)
    y = rng.poisson(years * np.exp(-1.2 + 0.5 * np.sin(2 * X[:, 0]) + 0.4 * X[:, 1] - 0.2 * X[:, 2] * X[:, 3]))
    return X, y.astype(float), None, np.log(years)


def delays(rng, n):
    X = rng.normal(size=(n, 10))
    y = np.exp(0.3 * X[:, 0] - 0.2 * X[:, 1] + 0.1 * X[:, 2] * X[:, 3]) * rng.gamma(2.0, 1.5, n) + 0.5 * np.abs(X[:, 4])
    return X, y, rng.uniform(0.5, 2.0, n), None


CASES = {"poisson+exposure": ("poisson", {}, claims, True),
         "asymmetric_laplace(0.9)": ("asymmetric_laplace", {"quantile": 0.9}, delays, True),
         # the custom path (native=False) with lossfam's leaf refit on the workers, in both engines
         "asymmetric_laplace(0.9) refit": ("asymmetric_laplace", {"quantile": 0.9}, delays, False)}


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--rows", type=float, default=1e6)
    ap.add_argument("--rounds", type=int, default=100)
    ap.add_argument("--partitions", type=int, default=16)
    ap.add_argument("--local-threads", type=int, default=2)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--local-repeats", type=int, default=None,
                    help="local trainings per cell (default: --repeats); fewer on a loaded machine")
    ap.add_argument("--engines", nargs="+", default=["xgboost", "lightgbm"])
    ap.add_argument("--cases", nargs="+", default=list(CASES), help=f"of {list(CASES)}")
    ap.add_argument("--also-predicted", action="store_true",
                    help="LightGBM: also time each cell with the training rows predicted instead of LightGBM's kept "
                         "trained scores (alternating with the default, extra rows marked 'rows predicted')")
    args = ap.parse_args()
    warnings.filterwarnings("ignore", message="Sending large graph")  # the data, sent once before timing
    warnings.filterwarnings("ignore", message="Parameter n_jobs will be ignored")

    import dask.array as da
    import lightgbm as lgb
    import xgboost as xgb
    from dask.distributed import Client, LocalCluster

    import lossfam
    from lossfam import lightgbm as lfl
    from lossfam import xgboost as lfx

    import os

    from lossfam._boost.cluster import STEPS, KeptRows

    n = int(args.rows)
    rows = -(-n // args.partitions)
    print(f"rows {n}, rounds {args.rounds}, partitions {args.partitions}, local threads {args.local_threads}, "
          f"cluster 2 workers x 1 thread, repeats {args.repeats} (medians), local repeats "
          f"{args.repeats if args.local_repeats is None else args.local_repeats}")
    print("load average before (1, 5, 15 min): %.2f %.2f %.2f" % os.getloadavg())
    med = statistics.median
    cells = []
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None) as lc, \
            Client(lc) as client:
        t0 = time.perf_counter()
        client.run(lambda: __import__("lossfam.lightgbm") and __import__("lossfam.xgboost"))  # one-time import cost
        print(f"(workers import lossfam and the engines once: {time.perf_counter() - t0:.1f} s, not counted below)")
        print("| engine | family | local s | cluster s | cluster / local | engine s | lossfam steps s | overhead "
              "| passes (baseline, nuisance) | held-out nll cluster / local |")
        print("|---|---|---:|---:|---:|---:|---:|---:|---|---:|", flush=True)
        for engine in args.engines:
            for case, (name, params, make, native) in CASES.items():
                if case not in args.cases:
                    continue
                fam = lossfam.family(name, **params)
                rng = np.random.default_rng(2026)
                X, y, w, o = make(rng, n)
                Xt, yt, wt, ot = make(rng, n // 5)

                def chunked(a):  # persisted on the workers before timing
                    return None if a is None else client.persist(da.from_array(a, chunks=(rows,) + a.shape[1:]))
                data = lossfam.ClusterData(chunked(X), chunked(y), weight=chunked(w), offset=chunked(o))
                if engine == "lightgbm":
                    p = {"num_leaves": 31, "learning_rate": 0.1, "verbosity": -1}

                    def local():
                        return lfl.train(fam, dict(p, num_threads=args.local_threads), lgb.Dataset(X, y, weight=w),
                                         args.rounds, offset=o, native=native)

                    def remote():
                        return lfl.train(fam, p, data, args.rounds, client=client, native=native)
                else:
                    p = {"max_depth": 6, "eta": 0.1, "tree_method": "hist"}

                    def local():
                        return lfx.train(fam, dict(p, nthread=args.local_threads), xgb.DMatrix(X, y, weight=w, base_margin=o),
                                         args.rounds, verbose_eval=False, native=native)

                    def remote():
                        return lfx.train(fam, dict(p, nthread=1), data, args.rounds, client=client, native=native)
                variants = [""] + ([" (rows predicted)"] if args.also_predicted and engine == "lightgbm" else [])
                t_loc, t_cl, infos, fcs = [], {v: [] for v in variants}, {v: [] for v in variants}, {}
                for r in range(args.repeats):
                    if r < (args.repeats if args.local_repeats is None else args.local_repeats):
                        t0 = time.perf_counter()
                        fl = local()
                        t_loc.append(time.perf_counter() - t0)
                    for v in variants:
                        if v:  # the kept scores refused: every training row predicted, as before they were kept
                            check, KeptRows.check = KeptRows.check, lambda self, fam, n, need, stats: (False, None)
                        try:
                            t0 = time.perf_counter()
                            fcs[v] = remote()
                            t_cl[v].append(time.perf_counter() - t0)
                        finally:
                            if v:
                                KeptRows.check = check
                        infos[v].append(fcs[v].info["cluster"])
                for v in variants:
                    info, fc = infos[v][-1], fcs[v]
                    held = fc.mean_loss(Xt, yt, weight=wt, offset=ot) / fl.mean_loss(Xt, yt, weight=wt, offset=ot)
                    eng = med(i["engine_seconds"] for i in infos[v])
                    own = med(i["lossfam_seconds"] for i in infos[v])
                    share = med(i["overhead"] for i in infos[v])
                    print(f"| {engine} | {case}{v} | {med(t_loc):.2f} | {med(t_cl[v]):.2f} | "
                          f"{med(t_cl[v]) / med(t_loc):.2f} | {eng:.2f} | {own:.2f} | {100 * share:.1f}% | "
                          f"{info['baseline_passes']}, {info['nuisance_passes']} | {held:.4f} |", flush=True)
                    steps = {k: med(i["seconds"].get(k, 0.0) for i in infos[v]) for k in STEPS}
                    steps_share = {k: med(i["seconds"].get(k, 0.0) / i["engine_seconds"] for i in infos[v]) for k in STEPS}
                    cells.append((engine, case + v, steps, steps_share))
                    print("  steps, median s (share of engine time): " + ", ".join(
                        f"{k} {steps[k]:.3f} ({100 * steps_share[k]:.1f}%)" for k in STEPS if steps[k] > 0)
                        + f"; trained check: {info['trained_check']}; load %.1f" % os.getloadavg()[0], flush=True)
                    if "refit_detail" in info:  # one worker's figures (the last training)
                        r = info["refit_detail"]
                        print(f"  refit (one worker, last training): {r['seconds']:.3f} s, of which reductions "
                              f"{r['reduce_seconds']:.3f} s ({r['reductions']}); trees read by pred_leaf "
                              f"{r['by_prediction']}, rows of the other trees read by it {r['rows_by_prediction']}",
                              flush=True)
    print("load average after (1, 5, 15 min): %.2f %.2f %.2f" % os.getloadavg())
    used = [k for k in STEPS if any(c[2][k] > 0 for c in cells)]
    print("\nlossfam's steps: median seconds (share of the engine's training time)")
    print("| engine | family | " + " | ".join(used) + " |")
    print("|---|---|" + "---:|" * len(used))
    for engine, case, steps, steps_share in cells:
        print(f"| {engine} | {case} | " + " | ".join(f"{steps[k]:.3f} ({100 * steps_share[k]:.1f}%)" for k in used) + " |")

if __name__ == "__main__":
    main()
