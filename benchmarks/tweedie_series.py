"""Time per row of tweedie's nll (the Dunn-Smyth series) against the gamma nll, side by side.

Targets: 1e6 rows drawn from the Tweedie law itself (p = 1.5, dispersion 1, means e^raw with raw
~ N(0, 0.5^2): about 15% exact zeros); the gamma nll runs on the same raw scores with positive
targets of the same size.  Both use the unchecked kernel ``_nll`` (the per-row work) and the
public ``nll``.  Contenders alternate, medians of the repeats; the ratio is what counts on a
shared machine.  A second setting (p = 1.2, dispersion 0.2: fewer zeros, more series terms per
row) shows how the cost grows with y / phi.

``--clock cpu`` times with the process's CPU time instead of the wall clock (see
grad_hess_floor.py).

Run:  python benchmarks/tweedie_series.py [--rows 1e6] [--repeats 7] [--clock wall|cpu]
"""
from __future__ import annotations

import argparse
import time

import numpy as np

import lossfam
from lossfam.families import TweedieLaw


CLOCKS = {"wall": time.perf_counter, "cpu": time.process_time}
clock = time.perf_counter


def timed(fun):
    t0 = clock()
    fun()
    return clock() - t0


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=float, default=1e6)
    ap.add_argument("--repeats", type=int, default=7)
    ap.add_argument("--clock", choices=sorted(CLOCKS), default="wall")
    args = ap.parse_args(argv)
    global clock
    clock = CLOCKS[args.clock]
    n = int(args.rows)
    rng = np.random.default_rng(0)
    raw = rng.normal(scale=0.5, size=n)
    gamma = lossfam.family("gamma")
    print("| setting | zeros | gamma nll (ns/row) | tweedie nll (ns/row) | ratio | checked ratio |")
    print("|---|---:|---:|---:|---:|---:|")
    for p, phi in ((1.5, 1.0), (1.2, 0.2)):
        tw = lossfam.family("tweedie", power=p, dispersion=phi)
        y = TweedieLaw(np.exp(raw), p, phi).rvs(random_state=rng)
        yg = np.where(y > 0, y, np.exp(raw))
        tw._nll(y, raw), gamma._nll(yg, raw)  # warm-up
        rows = {"g": [], "t": [], "gc": [], "tc": []}
        for _ in range(args.repeats):
            rows["g"].append(timed(lambda: gamma._nll(yg, raw)))
            rows["t"].append(timed(lambda: tw._nll(y, raw)))
            rows["gc"].append(timed(lambda: gamma.nll(yg, raw)))
            rows["tc"].append(timed(lambda: tw.nll(y, raw)))
        g, t, gc, tc = (float(np.median(v)) for v in rows.values())
        print(f"| p={p}, phi={phi} | {np.mean(y == 0):.0%} | {1e9 * g / n:.0f} | {1e9 * t / n:.0f} | "
              f"{t / g:.1f} | {tc / gc:.1f} |", flush=True)


if __name__ == "__main__":
    main()
