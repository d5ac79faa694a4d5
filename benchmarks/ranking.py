"""Time of ``lossfam.rank_families`` against the trainings it runs and against plain built-in trainings.

Data (a demo scenario, invented): n rows x 20 standard-normal features, a
log-linear mean exp(0.8 + X b) with b drawn once from N(0, 0.15^2), and
y = 1 + Poisson(mean) (integers >= 1, so every candidate applies).  Six
families: gaussian, laplace, huber, gamma, poisson, asymmetric_laplace at the
0.8 quantile; 5 folds; each engine.

For each engine the script measures, in one process:

* ``rank``: wall time of the whole ranking (median of --repeats runs);
* ``trainings``: the part of it spent inside the engine-fitting function
  (``selection._fit_engine``: every training the ranking runs, held-back
  early-stopping sets and huber's second round included), summed;
* ``overhead``: (rank - trainings) / trainings: folds, held-back splits,
  nuisance fits, scoring, PIT and residuals, the table;
* ``plain``: one plain training of the same size with the engine's built-in
  objective (squared error; LightGBM ``regression``, XGBoost
  ``reg:squarederror``, scikit-learn ``LinearRegression`` for the linear
  engine) on the rows of one training fold, at the median number of rounds the
  ranking's trainings kept, with the ranking's booster settings; the ratio is
  rank / (plain x families x folds).

Run:  python benchmarks/ranking.py [--rows 100000] [--engines linear,lightgbm,xgboost]
      [--repeats 1] [--threads 2]
"""
from __future__ import annotations

import argparse
import os
import statistics
import time

os.environ.setdefault("OMP_NUM_THREADS", "2")
os.environ.setdefault("OPENBLAS_NUM_THREADS", "2")

import numpy as np  # noqa: E402

import lossfam  # noqa: E402
from lossfam import selection  # noqa: E402

FAMILIES = ["gaussian", "laplace", "huber", "gamma", "poisson", lossfam.family("asymmetric_laplace", quantile=0.8)]
FOLDS = 5


def make_data(n, p=20, seed=0):
    rng = np.random.default_rng(seed)
    X = rng.standard_normal((n, p))
    beta = rng.normal(0.0, 0.15, p)
    y = 1.0 + rng.poisson(np.exp(0.8 + X @ beta)).astype(float)
    return X, y


def time_rank(X, y, engine, threads):
    spent = {"fit": 0.0, "rounds": []}
    original = selection._fit_engine

    def timed(*args, **kw):
        t = time.perf_counter()
        predict, used = original(*args, **kw)
        spent["fit"] += time.perf_counter() - t
        if used is not None:
            spent["rounds"].append(used)
        return predict, used

    selection._fit_engine = timed
    try:
        t = time.perf_counter()
        rows = lossfam.rank_families(X, y, families=FAMILIES, engine=engine, folds=FOLDS, threads=threads,
                                     as_frame=False)
        total = time.perf_counter() - t
    finally:
        selection._fit_engine = original
    assert all(r["status"] == "ok" for r in rows), [(r["family"], r["note"]) for r in rows]
    return total, spent["fit"], spent["rounds"]


def time_plain(X, y, engine, rounds, threads):
    n_train = X.shape[0] - X.shape[0] // FOLDS
    Xt, yt = X[:n_train], y[:n_train]
    t = time.perf_counter()
    if engine == "lightgbm":
        import lightgbm as lgb

        params = {**selection.BOOST_DEFAULTS["lightgbm"], "objective": "regression", "num_threads": threads}
        lgb.train(params, lgb.Dataset(Xt, yt), num_boost_round=rounds)
    elif engine == "xgboost":
        import xgboost as xgb

        params = {**selection.BOOST_DEFAULTS["xgboost"], "objective": "reg:squarederror", "nthread": threads}
        xgb.train(params, xgb.DMatrix(Xt, yt), num_boost_round=rounds)
    else:
        from sklearn.linear_model import LinearRegression

        LinearRegression().fit(Xt, yt)
    return time.perf_counter() - t


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=100_000)
    ap.add_argument("--engines", default="linear,lightgbm,xgboost")
    ap.add_argument("--repeats", type=int, default=1)
    ap.add_argument("--threads", type=int, default=2)
    args = ap.parse_args()
    X, y = make_data(args.rows)
    print(f"{args.rows} rows x {X.shape[1]} features, {len(FAMILIES)} families, {FOLDS} folds, "
          f"{args.threads} threads, median of {args.repeats}")
    print()
    print("| engine | rank (s) | trainings (s) | overhead beyond trainings | median rounds kept "
          "| plain built-in training (s) | rank / (plain x families x folds) |")
    print("|---|---|---|---|---|---|---|")
    for engine in args.engines.split(","):
        runs = [time_rank(X, y, engine, args.threads) for _ in range(args.repeats)]
        total = statistics.median(r[0] for r in runs)
        fit = statistics.median(r[1] for r in runs)
        rounds = int(statistics.median(runs[0][2])) if runs[0][2] else 0
        plain = statistics.median(time_plain(X, y, engine, max(rounds, 1), args.threads) for _ in range(args.repeats))
        ratio = total / (plain * len(FAMILIES) * FOLDS)
        print(f"| {engine} | {total:.1f} | {fit:.1f} | {100 * (total - fit) / fit:.1f}% | "
              f"{rounds if engine != 'linear' else '-'} | {plain:.3f} | {ratio:.1f} |", flush=True)


if __name__ == "__main__":
    main()
