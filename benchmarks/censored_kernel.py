"""Censored gradient and Hessian against the uncensored kernel of the same family, side by side.

For each family with a censored likelihood: rows drawn from the family's own law at raw scores
around 0 (around 0.5 for positive families), then a share of them censored (the rest exact):

* ``right``: every censored row right-censored at a uniform fraction of its value (bounds
  (c, +inf); durations still running at a cut-off);
* ``mixed``: the censored rows split in three equal parts, right-censored as above,
  left-censored ((-inf, y) or (0, y) for positive families: below a detection limit) and
  interval-censored ((0.8 y, 1.2 y) for positive families, (y - 1, y + 1) otherwise).

Timed (medians of alternating repeats, CPU time of this process so that waiting for a core on a
loaded machine counts less; run it with one thread, e.g. OMP_NUM_THREADS=1, numpy is
single-threaded for these operations anyway):

* ``exact``: ``family._grad_hess(y, raw)``, the uncensored kernel the engines call every round;
* ``censored``: the censored kernel (``lossfam.families._censored.censored_grad_hess``) on the
  IntervalTarget, what the engines call every round for censored targets.  The target is made
  once and the kernel called once before timing (the engines call it every round with the same
  target, whose row split and transformed bounds are kept on it).

The ratio censored / exact is the figure the target "at most 4x" refers to.  ``gamma(k=2)`` is
gamma at shape 2: at the default shape 1 the gamma law is the exponential law, whose tails are
in closed form.

Run:  python benchmarks/censored_kernel.py [--rows 1e7] [--repeats 5] [--share 0.3]
      [--layout right mixed] [--families gaussian,weibull]
"""
from __future__ import annotations

import argparse
import time

import numpy as np

import lossfam
from lossfam.censoring import interval_target
from lossfam.families._censored import censored_grad_hess

FAMILIES = {"gaussian": {}, "lognormal": {}, "weibull": {}, "gamma": {}, "gamma(k=2)": {"shape": 2.0},
            "laplace": {}, "student_t": {}}


def make(label, n, share, layout, rng):
    fam = lossfam.family(label.split("(")[0], **FAMILIES[label])
    positive = fam.support_edges[0] == 0
    raw = rng.normal(scale=0.5, size=n) + (0.5 if positive else 0.0)
    y = np.asarray(fam.distribution(raw).rvs(random_state=rng), dtype=float)
    if positive:
        y = np.maximum(y, 1e-300)
    lo, hi = y.copy(), y.copy()
    pick = rng.uniform(size=n)
    if layout == "right":
        right, left, closed = pick < share, np.zeros(n, bool), np.zeros(n, bool)
    else:
        right = pick < share / 3
        left = (pick >= share / 3) & (pick < 2 * share / 3)
        closed = (pick >= 2 * share / 3) & (pick < share)
    if positive:
        lo[right] = y[right] * rng.uniform(0.2, 1.0, right.sum())
        lo[left] = 0.0
        lo[closed], hi[closed] = 0.8 * y[closed], 1.2 * y[closed]
    else:
        lo[right] = y[right] - rng.uniform(0, 2, right.sum())
        lo[left] = -np.inf
        lo[closed], hi[closed] = y[closed] - 1.0, y[closed] + 1.0
    hi[right] = np.inf
    return fam, y, interval_target(lo, hi), raw


def clock():
    return time.process_time()


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--rows", type=float, nargs="+", default=[1e7])
    ap.add_argument("--repeats", type=int, default=5)
    ap.add_argument("--share", type=float, nargs="+", default=[0.3])
    ap.add_argument("--layout", nargs="+", default=["right", "mixed"], choices=["right", "mixed"])
    ap.add_argument("--families", default=",".join(FAMILIES))
    args = ap.parse_args()
    rng = np.random.default_rng(0)
    print(f"{'family':<11} {'rows':>9} {'layout':>7} {'share':>6} {'exact s':>9} {'censored s':>11} {'ratio':>7}")
    for n in (int(r) for r in args.rows):
        for layout in args.layout:
            for share in args.share:
                for label in args.families.split(","):
                    fam, y, t, raw = make(label, n, share, layout, rng)
                    with np.errstate(all="ignore"):
                        censored_grad_hess(fam, t, raw)  # the target's row split, as after a first round
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
                    print(f"{label:<11} {n:>9} {layout:>7} {share:>6.2f} {e:>9.4f} {cc:>11.4f} {cc / e:>7.2f}",
                          flush=True)
                    del fam, y, t, raw


if __name__ == "__main__":
    main()
