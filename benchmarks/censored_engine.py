"""XGBoost training on right-censored durations: lossfam's censored lognormal against the built-in
``survival:aft`` (normal errors on log time) at the same scale, side by side.

Both train the same trees' settings for the same rounds on one DMatrix layout (label_lower_bound /
label_upper_bound), 1 thread, CPU time of this process, alternated, median of the repeats.
lossfam trains one pass at the given scale (``prefit=False``); its default with a fitted scale is
two passes (``lossfam._boost.plan.censored_passes``), about twice this time.

Run:  python benchmarks/censored_engine.py [--rows 1e5] [--features 20] [--rounds 100] [--repeats 3]
"""
from __future__ import annotations

import argparse
import time

import numpy as np

import lossfam
from lossfam.censoring import right_censored


def main():
    import xgboost as xgb

    import lossfam.xgboost as lxgb

    ap = argparse.ArgumentParser()
    ap.add_argument("--rows", type=float, default=1e5)
    ap.add_argument("--features", type=int, default=20)
    ap.add_argument("--rounds", type=int, default=100)
    ap.add_argument("--repeats", type=int, default=3)
    args = ap.parse_args()
    n, p = int(args.rows), args.features
    rng = np.random.default_rng(3)
    X = rng.normal(size=(n, p)).astype(np.float32)
    eta = 1.0 + 0.5 * X[:, 0] - 0.3 * X[:, 1]
    T = np.exp(eta + 0.5 * rng.normal(size=n))
    C = rng.exponential(np.exp(1.6), n)
    t = right_censored(np.minimum(T, C), T <= C)
    fam = lossfam.family("lognormal", scale=0.5)
    params = {"max_depth": 6, "eta": 0.1, "nthread": 1, "tree_method": "hist"}
    aft = dict(params, objective="survival:aft", aft_loss_distribution="normal", aft_loss_distribution_scale=0.5)
    ratios = []
    print(f"{n} rows x {p} features x {args.rounds} rounds, {t.censored_fraction:.0%} censored")
    for rep in range(args.repeats):
        dm = lxgb.censored_dmatrix(X, t)
        a = time.process_time()
        lxgb.train(fam, params, dm, args.rounds, verbose_eval=False, prefit=False)
        b = time.process_time()
        xgb.train(aft, lxgb.censored_dmatrix(X, t), args.rounds)
        c = time.process_time()
        ratios.append((b - a) / (c - b))
        print(f"repeat {rep}: lossfam {b - a:.2f} s, survival:aft {c - b:.2f} s, ratio {ratios[-1]:.3f}", flush=True)
    print(f"median ratio {np.median(ratios):.3f}")


if __name__ == "__main__":
    main()
