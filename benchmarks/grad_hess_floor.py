"""grad_hess time per family against the memory-bandwidth floor, measured side by side.

The floor is the time numpy needs to read and write the same bytes as grad_hess does: read two
float64 arrays (y and raw) and write two fresh float64 arrays (gradient and Hessian), i.e.
``y.copy(); raw.copy()``.  Each timing is the median of several repeats, alternating the floor
and the family so that machine noise hits both alike.  Two columns are reported:

* ``checked``: the public ``family.grad_hess(y, raw)`` (validates y and raw, then computes);
* ``kernel``: ``family._grad_hess(y, raw)``, the unchecked kernel the engine adapters call
  every boosting round after validating y once.

``--clock cpu`` times with the process's CPU time (user + system, so page faults count) instead
of the wall clock: on a shared, loaded machine the wall clock also counts the time the process
waits for a core, which hits the longer calls harder.

Run:  python benchmarks/grad_hess_floor.py [--rows 1e6 1e7] [--repeats 7] [--clock wall|cpu]
"""
from __future__ import annotations

import argparse
import time

import numpy as np

import lossfam


def make_data(name, n, rng):
    raw = rng.normal(scale=0.5, size=n)
    if name == "bernoulli":
        y = (rng.uniform(size=n) < 0.5).astype(float)
    elif name == "poisson":
        y = rng.poisson(np.exp(raw)).astype(float)
    elif name == "gamma":
        y = rng.gamma(2.0, np.exp(raw) / 2.0)
    elif lossfam.family(name).link_function.name == "identity":
        y = raw + rng.normal(size=n)
    else:  # any other family: targets drawn from its own predictive law
        y = np.asarray(lossfam.family(name).distribution(raw).rvs(random_state=rng), dtype=float)
        if name == "beta":  # draws may round to 0 or 1, outside the support
            y = np.clip(y, 1e-12, 1 - 1e-12)
    return y, raw


CLOCKS = {"wall": time.perf_counter, "cpu": time.process_time}
clock = time.perf_counter


def median_time(fun, repeats):
    times = []
    for _ in range(repeats):
        t0 = clock()
        fun()
        times.append(clock() - t0)
    return float(np.median(times))


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=float, nargs="+", default=[1e6, 1e7])
    ap.add_argument("--repeats", type=int, default=7)
    ap.add_argument("--families", default=",".join(lossfam.available(scores="one")))
    ap.add_argument("--clock", choices=sorted(CLOCKS), default="wall")
    args = ap.parse_args(argv)
    global clock
    clock = CLOCKS[args.clock]
    rng = np.random.default_rng(0)
    print("| family | rows | floor (ms) | checked (ms) | checked / floor | kernel (ms) | kernel / floor |")
    print("|---|---:|---:|---:|---:|---:|---:|")
    for n in (int(r) for r in args.rows):
        for name in args.families.split(","):
            fam = lossfam.family(name)
            y, raw = make_data(name, n, rng)
            # warm-up: the allocator adapts to arrays of this size after the first few frees
            for _ in range(3):
                y.copy(), raw.copy()
                fam.grad_hess(y, raw)
            floors, checked, kernel = [], [], []
            for _ in range(args.repeats):  # interleave so noise hits all three alike
                floors.append(median_time(lambda: (y.copy(), raw.copy()), 1))
                checked.append(median_time(lambda: fam.grad_hess(y, raw), 1))
                with np.errstate(over="ignore"):
                    kernel.append(median_time(lambda: fam._grad_hess(y, raw), 1))
            f, c, k = (float(np.median(v)) for v in (floors, checked, kernel))
            print(f"| {name} | {n:.0e} | {1e3 * f:.1f} | {1e3 * c:.1f} | {c / f:.2f} | {1e3 * k:.1f} | {k / f:.2f} |",
                  flush=True)


if __name__ == "__main__":
    main()
