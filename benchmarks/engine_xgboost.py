"""Benchmark: lossfam's custom XGBoost objective against XGBoost's built-in twin, side by side.

For Poisson (built-in count:poisson) and Gaussian (built-in reg:squarederror), with the same
parameters (tree_method hist, nthread 2, XGBoost's default depth and learning rate), it
times the training call only (data and DMatrix built beforehand):

* 1e6 rows x 20 features, 100 rounds   (target: lossfam / built-in <= 1.05)
* 1e4 rows x 20 features, 1000 rounds  (target: <= 1.15)

Same parameters on both sides means the same loss and the same step guard.  Gaussian:
``lossfam.xgboost.train`` lets reg:squarederror compute the gradients (they are exactly the
family's: ``builtin_if_exact=True``, the default).  Poisson: ``train(..., step_cap="damped")``
uses count:poisson's own guard (Hessian x e^0.7, leaves clipped at 0.7), so count:poisson
computes exactly the family's guarded gradients.  The column "pure custom" is the Python
objective path (``builtin_if_exact=False``, same guard), and for Poisson the last column
"default guard" is lossfam's default (``step_cap="auto"``, 2.0), which grows different trees.  The lossfam time includes everything ``train`` does (target checks, baseline, guards, the fitted nuisance
parameters at the end).  Wall time is the target; CPU time (user + system of the process)
is shown too because the machine is shared, and so is the time of one call of lossfam's
objective alone (labels cached), times the rounds, as a share of the lossfam wall time: the
part of the run that is lossfam's own work.  Every run is a fresh subprocess; runs of the two sides alternate
and each cell is the median over the repeats.  The subprocess also reports its peak resident
memory (ru_maxrss, the whole process: data, DMatrix, engine), compared at 1e6 rows
(target: within 10%).  Held-out metric: mean Poisson deviance or mean squared error on
100 000 (1e6 case) or 10 000 (1e4 case) fresh rows from the same simulation.

Simulated data (demo scenario of our own): 20 standard normal features, signal
f = 0.5 x0 - 0.3 x1 x2 + 0.4 sin(x3) + 0.2 x4^2; Poisson counts with mean exp(0.5 + f),
Gaussian targets f + N(0, 1); numpy Generator seeded 2026.

Usage: python benchmarks/engine_xgboost.py [--repeats 3] [--quick]
"""
from __future__ import annotations

import argparse
import json
import statistics
import subprocess
import sys

_CHILD = r"""
import json, resource, sys, time
import numpy as np
import xgboost as xgb
import lossfam
import lossfam.xgboost as lx

family, side, n, rounds, n_test = sys.argv[1], sys.argv[2], int(sys.argv[3]), int(sys.argv[4]), int(sys.argv[5])
rng = np.random.default_rng(2026)
X = rng.standard_normal((n + n_test, 20), dtype=np.float32)
f = 0.5 * X[:, 0] - 0.3 * X[:, 1] * X[:, 2] + 0.4 * np.sin(X[:, 3]) + 0.2 * X[:, 4] ** 2
if family == "poisson":
    y = rng.poisson(np.exp(0.5 + f)).astype(np.float32)
    builtin = "count:poisson"
else:
    y = (f + rng.standard_normal(n + n_test)).astype(np.float32)
    builtin = "reg:squarederror"
Xte, yte = X[n:], y[n:].astype(float)
dtrain = xgb.DMatrix(X[:n], label=y[:n], nthread=2)
params = {"tree_method": "hist", "nthread": 2, "disable_default_eval_metric": 1}
def cpu():
    r = resource.getrusage(resource.RUSAGE_SELF)
    return r.ru_utime + r.ru_stime
obj_ms = float("nan")
t0, c0 = time.perf_counter(), cpu()
if side == "builtin":
    booster = xgb.train({**params, "objective": builtin}, dtrain, rounds)
    seconds, cpu_s = time.perf_counter() - t0, cpu() - c0
    mean = booster.inplace_predict(Xte).astype(float)
else:
    guard = {"step_cap": "damped"} if family == "poisson" and side != "defaultguard" else {}
    model = lx.train(family, params, dtrain, rounds, builtin_if_exact=(side == "lossfam"), **guard)
    seconds, cpu_s = time.perf_counter() - t0, cpu() - c0
    mean = model.predict(Xte)
    # lossfam's own work per round, timed alone: one objective call on the training DMatrix
    obj = lx.objective(family)
    margin = model.booster.predict(dtrain, output_margin=True)
    obj(margin, dtrain)  # first call validates and caches the labels
    t1 = time.perf_counter()
    for _ in range(20):
        obj(margin, dtrain)
    obj_ms = (time.perf_counter() - t1) / 20 * 1e3
if family == "poisson":
    score = float(np.mean(lossfam.family("poisson").deviance(yte, np.log(mean))))
else:
    score = float(np.mean((yte - mean) ** 2))
peak_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
print(json.dumps({"seconds": seconds, "cpu": cpu_s, "score": score, "peak_mb": peak_mb, "obj_ms": obj_ms}))
"""

CASES = [  # (rows, rounds, held-out rows, time target)
    (1_000_000, 100, 100_000, 1.05),
    (10_000, 1000, 10_000, 1.15),
]


def run(family, side, n, rounds, n_test):
    out = subprocess.run([sys.executable, "-c", _CHILD, family, side, str(n), str(rounds), str(n_test)],
                         check=True, capture_output=True, text=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--quick", action="store_true", help="1e5 rows and 100 rounds instead (smoke run)")
    args = ap.parse_args()
    cases = [(100_000, 20, 10_000, 1.05), (10_000, 100, 10_000, 1.15)] if args.quick else CASES

    rows = []
    for n, rounds, n_test, target in cases:
        for family in ("poisson", "gaussian"):
            sides = ("builtin", "lossfam", "custom") + (("defaultguard",) if family == "poisson" else ())
            res = {s: [] for s in sides}
            repeats = args.repeats if n >= 1_000_000 else max(args.repeats, 5)  # small runs are cheap
            for r in range(repeats):
                order = sides if r % 2 == 0 else sides[::-1]
                for side in order:
                    res[side].append(run(family, side, n, rounds, n_test))
            med = {s: {k: statistics.median(x[k] for x in v) for k in ("seconds", "cpu", "score", "peak_mb", "obj_ms")}
                   for s, v in res.items()}
            rows.append((family, n, rounds, target, med, res))
            print(f"done {family} n={n} rounds={rounds}: "
                  f"{med['lossfam']['seconds']:.2f}s vs {med['builtin']['seconds']:.2f}s", file=sys.stderr)

    metric = {"poisson": "mean Poisson deviance", "gaussian": "MSE"}
    builtin = {"poisson": "count:poisson", "gaussian": "reg:squarederror"}
    print(f"XGBoost {__import__('xgboost').__version__}, nthread=2, tree_method=hist, "
          f"medians of {args.repeats} runs per cell at 1e6 rows and {max(args.repeats, 5)} at 1e4 "
          "(fresh subprocess each, the two sides alternating)\n")
    print("| family (built-in twin) | rows x rounds | built-in s | lossfam s | time ratio (target) "
          "| pure custom s (ratio) | CPU-time ratio | objective ms/round (share of lossfam time) "
          "| held-out metric built-in / lossfam | peak MB built-in / lossfam (ratio) "
          "| default guard s (ratio), metric |")
    print("|---|---|---|---|---|---|---|---|---|---|---|")
    for family, n, rounds, target, med, _ in rows:
        b, o = med["builtin"], med["lossfam"]
        ratio = o["seconds"] / b["seconds"]
        mem = o["peak_mb"] / b["peak_mb"]
        c = med.get("custom", o)
        share = c["obj_ms"] * rounds / 1e3 / c["seconds"]
        print(f"| {family} ({builtin[family]}) | {n:.0e} x {rounds} | {b['seconds']:.2f} | {o['seconds']:.2f} "
              f"| {ratio:.3f} (<= {target}) | {c['seconds']:.2f} ({c['seconds'] / b['seconds']:.3f}) "
              f"| {o['cpu'] / b['cpu']:.3f} | {c['obj_ms']:.2f} ({share:.1%}) "
              f"| {metric[family]}: {b['score']:.5f} / {o['score']:.5f} "
              f"| {b['peak_mb']:.0f} / {o['peak_mb']:.0f} ({mem:.3f}) "
              + (f"| {med['defaultguard']['seconds']:.2f} ({med['defaultguard']['seconds'] / b['seconds']:.3f}), "
                 f"{med['defaultguard']['score']:.5f} |" if "defaultguard" in med else "| - |"))
    print("\nAll runs (seconds):")
    for family, n, rounds, _, _, res in rows:
        print(f"- {family} {n:.0e} x {rounds}: " + ", ".join(
            f"{side} {[round(x['seconds'], 2) for x in runs]}" for side, runs in res.items()))


if __name__ == "__main__":
    main()
