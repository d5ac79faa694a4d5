"""Censored gradient and Hessian against the uncensored kernel of the same family, side by side.

For each family with a censored likelihood: rows drawn from the family's own law at raw scores
around 0, then a share of them right-censored at a uniform fraction of their value (bounds
(c, +inf)) and a share interval-censored ((0.8 y, 1.2 y) for positive families, (y - 1, y + 1)
otherwise); the rest exact.  Timed (medians of alternating repeats, CPU time of this process so
that waiting for a core on a loaded machine does not count):

* ``exact``: ``family._grad_hess(y, raw)``, the uncensored kernel the engines call every round;
* ``censored``: the censored kernel (``lossfam.families._censored.censored_grad_hess``) on the
  IntervalTarget, what the engines call every round for censored targets.

The ratio censored / exact is the figure the target "at most 4x" refers to.

Run:  python benchmarks/censored_kernel.py [--rows 1e6] [--repeats 5] [--share 0.3 1.0]
"""
from __future__ import annotations

import argparse
import time

import numpy as np

import lossfam
from lossfam.censoring import interval_target
from lossfam.families._censored import censored_grad_hess

FAMILIES = ("gaussian", "lognormal", "weibull", "gamma", "laplace", "student_t")


def make(name, n, share, rng):
    fam = lossfam.family(name)
    raw = rng.normal(scale=0.5, size=n) + (0.5 if fam.support_edges[0] == 0 else 0.0)
    y = np.asarray(fam.distribution(raw).rvs(random_state=rng), dtype=float)
    if fam.support_edges[0] == 0:
        y = np.maximum(y, 1e-300)
    lo, hi = y.copy(), y.copy()
    pick = rng.uniform(size=n)
    right = pick < share / 2
    closed = (pick >= share / 2) & (pick < share)
    lo[right] = y[right] * rng.uniform(0.2, 1.0, right.sum()) if fam.support_edges[0] == 0 else y[right] - rng.uniform(0, 2, right.sum())
    hi[right] = np.inf
    if fam.support_edges[0] == 0:
        lo[closed], hi[closed] = 0.8 * y[closed], 1.2 * y[closed]
    else:
        lo[closed], hi[closed] = y[closed] - 1.0, y[closed] + 1.0
    return fam, y, interval_target(lo, hi), raw


def clock():
    return time.process_time()


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--rows", type=float, nargs="+", default=[1e6])
    ap.add_argument("--repeats", type=int, default=5)
    ap.add_argument("--share", type=float, nargs="+", default=[0.3, 1.0])
    args = ap.parse_args()
    rng = np.random.default_rng(0)
    print(f"{'family':<10} {'rows':>9} {'censored':>9} {'exact s':>9} {'censored s':>11} {'ratio':>7}")
    for n in (int(r) for r in args.rows):
        for share in args.share:
            for name in FAMILIES:
                fam, y, t, raw = make(name, n, share, rng)
                te, tc = [], []
                for _ in range(args.repeats):
                    a = clock()
                    with np.errstate(all="ignore"):
                        fam._grad_hess(y, raw)
                    b = clock()
                    with np.errstate(all="ignore"):
                        censored_grad_hess(fam, t, raw)
                    c = clock()
                    te.append(b - a)
                    tc.append(c - b)
                e, cc = float(np.median(te)), float(np.median(tc))
                print(f"{name:<10} {n:>9} {share:>9.2f} {e:>9.4f} {cc:>11.4f} {cc / e:>7.2f}", flush=True)


if __name__ == "__main__":
    main()
