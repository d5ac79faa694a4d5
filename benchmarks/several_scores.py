"""Several raw scores per row: training time of a 2-parameter family against the one-parameter
family in the same engine, XGBoost's two multi-output layouts, multinomial against the built-in
multiclass, and natural gradient against Newton steps (held-out nll per round).

Run from the repository root (the machine is shared: 1 thread, runs alternated side by side,
medians and ratios):

    nice -n 19 python benchmarks/several_scores.py time  [rows] [rounds] [repeats]
    nice -n 19 python benchmarks/several_scores.py multinomial [rows] [rounds] [repeats]
    nice -n 19 python benchmarks/several_scores.py curvature [rows] [rounds]

Data: simulated rows of our own making (20 uniform features; the mean a staircase of x0, the
scale growing x10 across x1; K = 5 classes from a softmax of linear scores for multinomial).
"""
import statistics
import sys
import time

import numpy as np

import lossfam
import lossfam.lightgbm
import lossfam.xgboost


def scene(n, seed=0, p=20):
    rng = np.random.default_rng(seed)
    X = rng.uniform(0, 1, size=(n, p)).astype(np.float32)
    scale = 0.3 * 10 ** X[:, 1]
    y = np.floor(4 * X[:, 0]) / 2 + np.sin(6 * X[:, 2]) + scale * rng.normal(size=n)
    return X, y


def classes(n, k=5, seed=0, p=20):
    rng = np.random.default_rng(seed)
    X = rng.uniform(0, 1, size=(n, p)).astype(np.float32)
    B = np.random.default_rng(12345).normal(0, 2, size=(p, k))  # one law for training and held-out rows
    logits = X @ B + 0.5 * np.sin(6 * X[:, :k])
    u = rng.uniform(size=(n, 1))
    prob = np.exp(logits - logits.max(axis=1, keepdims=True))
    prob /= prob.sum(axis=1, keepdims=True)
    return X, (u > np.cumsum(prob, axis=1)).sum(axis=1).astype(float)


LGB = dict(verbosity=-1, num_threads=1, learning_rate=0.1, num_leaves=31, min_data_in_leaf=100)
XGB = dict(nthread=1, learning_rate=0.1, max_depth=6, min_child_weight=100.0, tree_method="hist")


def run_time(n, rounds, repeats):
    import lightgbm as lgb
    import xgboost as xgb
    X, y = scene(n)
    Xv, yv = scene(100_000, seed=1)
    ds = lgb.Dataset(X, y, free_raw_data=False)
    ds.construct()
    dm = xgb.DMatrix(X, label=y)
    cases = {
        "lgb gaussian native": lambda: lossfam.lightgbm.train("gaussian", LGB, ds, rounds),
        "lgb gaussian custom": lambda: lossfam.lightgbm.train("gaussian", LGB, ds, rounds, native=False),
        "lgb gaussian_spread": lambda: lossfam.lightgbm.train("gaussian_spread", LGB, ds, rounds),
        "xgb gaussian native": lambda: lossfam.xgboost.train("gaussian", XGB, dm, rounds),
        "xgb gaussian custom": lambda: lossfam.xgboost.train("gaussian", XGB, dm, rounds, native=False),
        "xgb gaussian_spread per-tree": lambda: lossfam.xgboost.train("gaussian_spread", XGB, dm, rounds),
        "xgb gaussian_spread vector-leaf": lambda: lossfam.xgboost.train(
            "gaussian_spread", XGB, dm, rounds, multi_strategy="multi_output_tree"),
    }
    times = {k: [] for k in cases}
    nll = {}
    for r in range(repeats):
        for name, fn in cases.items():
            t = time.perf_counter()
            fit = fn()
            times[name].append(time.perf_counter() - t)
            nll[name] = fit.mean_loss(Xv, yv)
            print(f"rep {r} {name}: {times[name][-1]:.2f} s, held-out nll {nll[name]:.4f}", flush=True)
    med = {k: statistics.median(v) for k, v in times.items()}
    print(f"\n{n} rows x 20 features x {rounds} rounds, 1 thread, median of {repeats} alternated runs")
    print("| case | median s | / native gaussian | / custom gaussian | held-out nll |")
    print("|---|---|---|---|---|")
    for k, v in med.items():
        e = k[:3]
        print(f"| {k} | {v:.2f} | {v / med[e + ' gaussian native']:.2f} | {v / med[e + ' gaussian custom']:.2f} "
              f"| {nll[k]:.4f} |")


MULTI = lossfam.family("multinomial", n_classes=5)


def run_multinomial(n, rounds, repeats):
    import lightgbm as lgb
    import xgboost as xgb
    X, y = classes(n)
    Xv, yv = classes(100_000, seed=1)
    ds = lgb.Dataset(X, y, free_raw_data=False)
    ds.construct()
    dm = xgb.DMatrix(X, label=y)

    def lgb_builtin():
        return lgb.train(dict(LGB, objective="multiclass", num_class=5), ds, rounds)

    def xgb_builtin():
        return xgb.train(dict(XGB, objective="multi:softprob", num_class=5), dm, rounds)

    def logloss(p):
        return float(-np.mean(np.log(p[np.arange(yv.size), yv.astype(int)])))
    cases = {
        "lgb multiclass built-in": (lgb_builtin, lambda b: logloss(b.predict(Xv))),
        "lgb multinomial lossfam": (lambda: lossfam.lightgbm.train(MULTI, LGB, ds, rounds),
                                    lambda f: f.mean_loss(Xv, yv)),
        "lgb multinomial lossfam custom": (lambda: lossfam.lightgbm.train(MULTI, LGB, ds, rounds,
                                                                          native=False),
                                           lambda f: f.mean_loss(Xv, yv)),
        "xgb multi:softprob built-in": (xgb_builtin, lambda b: logloss(b.predict(xgb.DMatrix(Xv)))),
        "xgb multinomial lossfam": (lambda: lossfam.xgboost.train(MULTI, XGB, dm, rounds),
                                    lambda f: f.mean_loss(Xv, yv)),
        "xgb multinomial lossfam custom": (lambda: lossfam.xgboost.train(MULTI, XGB, dm, rounds,
                                                                         native=False),
                                           lambda f: f.mean_loss(Xv, yv)),
    }
    times = {k: [] for k in cases}
    score = {}
    for r in range(repeats):
        for name, (fn, sc) in cases.items():
            t = time.perf_counter()
            fit = fn()
            times[name].append(time.perf_counter() - t)
            score[name] = sc(fit)
            print(f"rep {r} {name}: {times[name][-1]:.2f} s, held-out log loss {score[name]:.5f}", flush=True)
    med = {k: statistics.median(v) for k, v in times.items()}
    print(f"\n{n} rows x 20 features x {rounds} rounds, K = 5, 1 thread, median of {repeats} alternated runs")
    print("| case | median s | / built-in | held-out log loss | / built-in |")
    print("|---|---|---|---|---|")
    for k, v in med.items():
        b = [c for c in cases if c.startswith(k[:3]) and "built-in" in c][0]
        print(f"| {k} | {v:.2f} | {v / med[b]:.3f} | {score[k]:.5f} | {score[k] / score[b]:.4f} |")


def run_curvature(n, rounds):
    import lightgbm as lgb
    import xgboost as xgb
    X, y = scene(n)
    Xv, yv = scene(100_000, seed=1)
    print(f"\nheld-out nll per round, gaussian_spread, {n} rows, learning rate 0.1")
    curves = {}
    for cur in ("newton", "fisher", "natural"):
        log = {}
        vs = lgb.Dataset(Xv, yv)
        lossfam.lightgbm.train("gaussian_spread", LGB, lgb.Dataset(X, y), rounds, valid_sets=[vs], valid_names=["v"],
                               curvature=cur, callbacks=[lgb.record_evaluation(log)])
        curves["lgb " + cur] = log["v"]["gaussian_spread_nll"]
        ev = {}
        lossfam.xgboost.train("gaussian_spread", XGB, xgb.DMatrix(X, label=y), rounds,
                              evals=[(xgb.DMatrix(Xv, label=yv), "v")], curvature=cur, evals_result=ev,
                              verbose_eval=False)
        curves["xgb " + cur] = ev["v"]["gaussian_spread_nll"]
    marks = [r for r in (1, 5, 10, 25, 50, 100, 200, 400) if r <= rounds]
    print("| engine, curvature | " + " | ".join(f"round {r}" for r in marks) + " | best (round) |")
    print("|---|" + "---|" * (len(marks) + 1))
    for k, c in curves.items():
        print(f"| {k} | " + " | ".join(f"{c[r - 1]:.4f}" for r in marks) + f" | {min(c):.4f} ({int(np.argmin(c)) + 1}) |")


if __name__ == "__main__":
    what = sys.argv[1] if len(sys.argv) > 1 else "time"
    args = [int(float(a)) for a in sys.argv[2:]]
    if what == "time":
        run_time(*(args + [1_000_000, 100, 3][len(args):]))
    elif what == "multinomial":
        run_multinomial(*(args + [1_000_000, 100, 3][len(args):]))
    else:
        run_curvature(*(args + [200_000, 400][len(args):]))
