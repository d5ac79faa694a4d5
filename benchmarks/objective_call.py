"""Time of one call of lossfam's LightGBM objective, alone, as ``lossfam.lightgbm.train`` calls it.

A family without a LightGBM twin (huber by default) trains on lossfam's Python objective: every
round LightGBM hands it the raw scores and takes back float32 gradient and Hessian buffers.  This
script times that call on its own, on the data of ``engine_twins.py`` (the same simulation, a
``lightgbm.Dataset`` built and constructed, so the labels are LightGBM's float32 ones), with the
family as ``train`` trains it (nuisance parameters fitted at the baseline) and raw scores
scattered around the baseline as after a few rounds.

For each ``--workers`` value (threads that assemble the gradients) it reports the median time per
call over ``--calls`` calls, repeated ``--repeats`` times with the worker counts alternated
(the median of the repeats' medians is printed, with their range).  It also reports the
family's bare kernel ``family._grad_hess`` on float64 inputs (the arithmetic alone, fresh float64
outputs, no unit, checks or float32 buffers) as a reference.

Run::

    python benchmarks/objective_call.py --rows 1e6 1e4 --workers 1 2
"""
from __future__ import annotations

import argparse
import os
import statistics
import sys
import time

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))

import engine_twins  # noqa: E402  (the simulation of the engine benchmarks)


def make_case(name, n, features, seed=2026):
    import lightgbm as lgb

    import lossfam
    from lossfam._boost.plan import start_plan

    fam = lossfam.family(name)
    X, y = engine_twins.simulate(name, n, features, seed)
    data = lgb.Dataset(X, y, params={"verbosity": -1}, free_raw_data=False).construct()
    label = data.get_label()
    plan = start_plan(fam, label.astype(np.float64), None, None, prefit=True, engine="lightgbm")
    rng = np.random.default_rng(seed + 1)
    raw = plan.start + rng.normal(scale=0.3, size=n)
    return plan.family, data, raw


def objective(fam, workers):
    from lossfam import lightgbm as adapter
    from lossfam._boost.gradients import resolve_guard

    guard = resolve_guard(fam, "auto")
    try:
        return adapter._Objective(fam, guard, check_start=False, engine_buffers=True, workers=workers)
    except TypeError:  # code from before the workers option: one thread only
        if workers != 1:
            return None
        return adapter._Objective(fam, guard, check_start=False, engine_buffers=True)


def per_call(fn, calls):
    times = []
    for _ in range(calls):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return statistics.median(times)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--family", default="huber")
    ap.add_argument("--rows", type=float, nargs="+", default=[1e6, 1e4])
    ap.add_argument("--workers", type=int, nargs="+", default=[1, 2])
    ap.add_argument("--features", type=int, default=20)
    ap.add_argument("--calls", type=int, default=0, help="calls per repeat (default: 30 at 1e6 rows, 1000 at 1e4)")
    ap.add_argument("--repeats", type=int, default=5)
    args = ap.parse_args(argv)

    print(f"{args.family}: median time per objective call, median of {args.repeats} alternated repeats "
          f"[range]; load average {os.getloadavg()[0]:.2f} at the start")
    print("| rows | " + " | ".join(f"{k} worker{'s' if k > 1 else ''} (ms)" for k in args.workers)
          + " | bare kernel, float64 (ms) |")
    print("|---" * (len(args.workers) + 2) + "|")
    for n in (int(r) for r in args.rows):
        fam, data, raw = make_case(args.family, n, args.features)
        calls = args.calls or (30 if n >= 100_000 else 1000)
        objs = {k: objective(fam, k) for k in args.workers}
        y64 = data.get_label().astype(np.float64)
        runs = {k: [] for k in args.workers}
        bare = []
        for k, obj in objs.items():  # warm-up: buffers, pool, caches
            if obj is not None:
                for _ in range(3):
                    obj(raw, data)
        for r in range(args.repeats):
            order = list(objs) if r % 2 == 0 else list(objs)[::-1]
            for k in order:
                if objs[k] is not None:
                    runs[k].append(per_call(lambda: objs[k](raw, data), calls))
            bare.append(per_call(lambda: fam._grad_hess(y64, raw), calls))
        cells = []
        for k in args.workers:
            t = runs[k]
            cells.append("—" if not t else f"{1e3 * statistics.median(t):.3f} [{1e3 * min(t):.3f}-{1e3 * max(t):.3f}]")
        print(f"| {n:.0e} | " + " | ".join(cells)
              + f" | {1e3 * statistics.median(bare):.3f} [{1e3 * min(bare):.3f}-{1e3 * max(bare):.3f}] |", flush=True)
        g1, h1 = (a.copy() for a in objs[args.workers[0]](raw, data))
        for k, obj in objs.items():
            if obj is not None:
                g, h = obj(raw, data)
                if not (np.array_equal(g, g1) and np.array_equal(h, h1)):
                    print(f"  workers={k}: gradients differ from workers={args.workers[0]}")


if __name__ == "__main__":
    main()
