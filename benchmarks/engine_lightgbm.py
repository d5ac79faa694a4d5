"""Training time and peak memory of lossfam.lightgbm against LightGBM's built-in objectives.

Side by side in one run, num_threads=2, for poisson (vs objective="poisson")
and gaussian (vs objective="regression"):

* large: 1e6 rows x 20 features, 100 rounds (target: time ratio <= 1.05)
* small: 1e4 rows x 20 features, 1000 rounds (target: time ratio <= 1.15)

Wall-clock and process CPU seconds (user + system, all threads; less
sensitive to other processes on a shared machine) per row of the table, each
the median over --repeats runs,
alternating the contenders so that load from other processes hits all alike:

* built-in: lightgbm.train with the built-in objective,
* train: lossfam.lightgbm.train with its defaults (poisson: the Python
  objective with the step guard; gaussian: LightGBM's built-in l2 computes
  the gradients, which are exactly the family's, see builtin_if_exact),
* objective: lightgbm.train with params["objective"] = lossfam.lightgbm.objective(...)
  and the baseline as init_score (the bare custom-objective path).

Held-out metric (sklearn's mean_poisson_deviance or mean_squared_error on 1e5
fresh rows) is printed next to each time.  Peak memory: each contender
trains once on the large data in a fresh subprocess that reports
resource.getrusage(RUSAGE_SELF).ru_maxrss; the data are generated inside
the child the same way for all, so the ratio compares what training adds.

Data (simulated, seeded): x ~ N(0, I_20); s(x) = 0.5 sin(2 x0) + 0.4 x1 - 0.3 x2 x3
+ 0.2 x4^2; poisson y ~ Poisson(exp(0.2 + s)); gaussian y = 5 + 2 s + N(0, 1).

Usage:  python benchmarks/engine_lightgbm.py [--repeats 3] [--quick]
"""
from __future__ import annotations

import argparse
import json
import statistics
import subprocess
import sys
import time

import numpy as np

P = 20


def simulate(kind, n, seed):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, P))
    s = 0.5 * np.sin(2 * X[:, 0]) + 0.4 * X[:, 1] - 0.3 * X[:, 2] * X[:, 3] + 0.2 * X[:, 4] ** 2
    if kind == "poisson":
        y = rng.poisson(np.exp(0.2 + s)).astype(np.float64)
    else:
        y = 5.0 + 2.0 * s + rng.normal(size=n)
    return X, y


BUILTIN = {"poisson": "poisson", "gaussian": "regression"}


def base_params():
    return dict(learning_rate=0.1, num_leaves=31, verbosity=-1, num_threads=2, seed=1,
                deterministic=True, force_row_wise=True, metric="None")


def cpu_seconds():
    """User + system CPU time of this process (all its threads)."""
    import resource

    r = resource.getrusage(resource.RUSAGE_SELF)
    return r.ru_utime + r.ru_stime


def fit_once(how, kind, X, y, rounds):
    """Train one contender; returns (wall seconds, predict_raw function)."""
    import lightgbm as lgb

    import lossfam
    from lossfam import lightgbm as lfl

    params = base_params()
    t0 = time.perf_counter()
    if how == "built-in":
        b = lgb.train(dict(params, objective=BUILTIN[kind]), lgb.Dataset(X, y), rounds)
        dt = time.perf_counter() - t0
        return dt, lambda Z: b.predict(Z, raw_score=True)
    if how == "train":
        m = lfl.train(kind, params, lgb.Dataset(X, y), rounds)
        dt = time.perf_counter() - t0
        return dt, m.predict_raw
    fam = lossfam.family(kind)
    base = fam.baseline(y)
    b = lgb.train(dict(params, objective=lfl.objective(fam)), lgb.Dataset(X, y, init_score=np.full(y.size, base)), rounds)
    dt = time.perf_counter() - t0
    return dt, lambda Z: base + b.predict(Z, raw_score=True)


def held_out(kind, raw, y):
    from sklearn.metrics import mean_poisson_deviance, mean_squared_error

    if kind == "poisson":
        return mean_poisson_deviance(y, np.exp(raw))
    return mean_squared_error(y, raw)


def child(args):
    """Subprocess entry: generate the large data, train one contender once, print peak RSS (MiB)."""
    import resource

    X, y = simulate(args.kind, args.n, 1)
    before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    fit_once(args.how, args.kind, X, y, args.rounds)
    after = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(json.dumps({"maxrss_mib": after, "before_training_mib": before}))


def peak_memory(how, kind, n, rounds):
    out = subprocess.run([sys.executable, __file__, "--child", "--how", how, "--kind", kind,
                          "--n", str(n), "--rounds", str(rounds)], capture_output=True, text=True, check=True)
    doc = json.loads(out.stdout.strip().splitlines()[-1])
    return doc["maxrss_mib"], doc["before_training_mib"]


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--quick", action="store_true", help="small sizes, to check the script runs")
    ap.add_argument("--child", action="store_true")
    ap.add_argument("--how", default="train")
    ap.add_argument("--kind", default="poisson")
    ap.add_argument("--n", type=int, default=1_000_000)
    ap.add_argument("--rounds", type=int, default=100)
    args = ap.parse_args()
    if args.child:
        return child(args)

    import lightgbm

    sizes = [(1_000_000, 100, 1.05), (10_000, 1000, 1.15)]
    if args.quick:
        sizes = [(50_000, 20, 1.05), (2_000, 50, 1.15)]
    contenders = ["built-in", "train", "objective"]
    print(f"lightgbm {lightgbm.__version__}, numpy {np.__version__}, num_threads=2, "
          f"median of {args.repeats} runs per cell\n")
    print("| family | rows x rounds | contender | wall s (median) | wall ratio | CPU s (median) | CPU ratio "
          "| target | held-out metric |")
    print("|---|---|---|---|---|---|---|---|---|")
    for kind in ("poisson", "gaussian"):
        for n, rounds, target in sizes:
            X, y = simulate(kind, n, 1)
            Xte, yte = simulate(kind, 100_000 if not args.quick else 10_000, 2)
            times = {c: [] for c in contenders}
            cpus = {c: [] for c in contenders}
            score = {}
            for _ in range(args.repeats):
                for c in contenders:
                    c0 = cpu_seconds()
                    dt, pr = fit_once(c, kind, X, y, rounds)
                    cpus[c].append(cpu_seconds() - c0)
                    times[c].append(dt)
                    score[c] = held_out(kind, pr(Xte), yte)
            ref = statistics.median(times["built-in"])
            ref_cpu = statistics.median(cpus["built-in"])
            metric = "Poisson deviance" if kind == "poisson" else "MSE"
            for c in contenders:
                med = statistics.median(times[c])
                mcpu = statistics.median(cpus[c])
                tgt = "" if c == "built-in" else f"<= {target}"
                print(f"| {kind} | {n:.0e} x {rounds} | {c} | {med:.3f} | {med / ref:.3f} | {mcpu:.2f} | "
                      f"{mcpu / ref_cpu:.3f} | {tgt} | {metric} {score[c]:.5f} |", flush=True)
    print()
    n_mem, r_mem = (1_000_000, 100) if not args.quick else (50_000, 20)
    print(f"Peak RSS (MiB) of a fresh process that generates {n_mem:.0e} x {P} data and trains {r_mem} rounds once:\n")
    print("| family | contender | peak RSS MiB | of which before training (imports + data) | added by training "
          "| peak ratio vs built-in | added ratio vs built-in |")
    print("|---|---|---|---|---|---|---|")
    for kind in ("poisson", "gaussian"):
        mem = {c: peak_memory(c, kind, n_mem, r_mem) for c in contenders}
        ref_peak, ref_before = mem["built-in"]
        for c in contenders:
            peak, before = mem[c]
            print(f"| {kind} | {c} | {peak:.0f} | {before:.0f} | {peak - before:.0f} | {peak / ref_peak:.3f} | "
                  f"{(peak - before) / max(ref_peak - ref_before, 1e-9):.3f} |", flush=True)


if __name__ == "__main__":
    main()
