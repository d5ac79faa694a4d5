"""Fit time of LikelihoodRegressor against scikit-learn's GLM estimators, side by side in one run.

Poisson and gamma (log link), n x p = 500000 x 30 by default, no penalty.
For each family the script times (median of --repeats runs, same data):

* LikelihoodRegressor(family=..., alpha=0) -- Newton with Cholesky, tol=1e-8
* scikit-learn PoissonRegressor / GammaRegressor(solver="lbfgs", alpha=0) at
  its default tol=1e-4, and at tol=1e-8
* scikit-learn ...(solver="newton-cholesky", alpha=0) at its default tol

and prints the time ratio to the default lbfgs fit together with the largest
relative difference of each fit's coefficients (intercept included) from a
tightly converged reference: scikit-learn's newton-cholesky solver with
tol=1e-12 (an implementation independent of lossfam).

Run:  /work/venv/bin/python benchmarks/linear_fit.py [--n 500000] [--p 30] [--repeats 3]
Synthetic data only (a demo scenario: standard-normal features, coefficients
drawn once from N(0, 0.15^2)).
"""
from __future__ import annotations

import argparse
import os
import time
import warnings

os.environ.setdefault("OMP_NUM_THREADS", "2")
os.environ.setdefault("OPENBLAS_NUM_THREADS", "2")

import numpy as np  # noqa: E402
from sklearn.exceptions import ConvergenceWarning  # noqa: E402
from sklearn.linear_model import GammaRegressor, PoissonRegressor  # noqa: E402

from lossfam.sklearn import LikelihoodRegressor  # noqa: E402


def make_data(n, p, family, seed=0):
    rng = np.random.default_rng(seed)
    X = rng.standard_normal((n, p))
    beta = rng.normal(0.0, 0.15, p)
    mu = np.exp(0.3 + X @ beta)
    if family == "poisson":
        y = rng.poisson(mu).astype(float)
    else:
        shape = 2.0
        y = rng.gamma(shape, mu / shape)
    return X, y


def params(est):
    return np.r_[est.intercept_, est.coef_]


def timed(make, X, y, repeats):
    times, est = [], None
    for _ in range(repeats):
        est = make()
        t0 = time.perf_counter()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", ConvergenceWarning)
            est.fit(X, y)
        times.append(time.perf_counter() - t0)
    return float(np.median(times)), est


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--n", type=int, default=500_000)
    ap.add_argument("--p", type=int, default=30)
    ap.add_argument("--repeats", type=int, default=3)
    args = ap.parse_args()

    print(f"n = {args.n}, p = {args.p}, median of {args.repeats} fits each; "
          "coef diff = max relative difference from the reference (newton-cholesky, tol=1e-12)")
    print()
    print(f"{'family':8s} {'estimator':42s} {'time [s]':>9s} {'ratio':>7s} {'n_iter':>7s} {'coef diff':>10s}")
    sk_cls = {"poisson": PoissonRegressor, "gamma": GammaRegressor}
    for fam in ("poisson", "gamma"):
        X, y = make_data(args.n, args.p, fam)
        cls = sk_cls[fam]
        ref = cls(alpha=0.0, solver="newton-cholesky", tol=1e-12, max_iter=1000).fit(X, y)
        ref_params = params(ref)
        rows = [
            ("LikelihoodRegressor (Newton, tol=1e-8)", lambda: LikelihoodRegressor(family=fam)),
            (f"{cls.__name__} lbfgs tol=1e-4 (default)", lambda: cls(alpha=0.0, solver="lbfgs")),
            (f"{cls.__name__} lbfgs tol=1e-8", lambda: cls(alpha=0.0, solver="lbfgs", tol=1e-8, max_iter=10_000)),
            (f"{cls.__name__} newton-cholesky tol=1e-4", lambda: cls(alpha=0.0, solver="newton-cholesky")),
        ]
        results = [(label, *timed(make, X, y, args.repeats)) for label, make in rows]
        t_lbfgs = results[1][1]
        for label, t, est in results:
            diff = float(np.max(np.abs(params(est) - ref_params) / np.maximum(np.abs(ref_params), 1e-12)))
            print(f"{fam:8s} {label:42s} {t:9.3f} {t / t_lbfgs:7.2f} {int(np.max(est.n_iter_)):7d} {diff:10.2e}")
    print()
    print("ratio = time / time of the default lbfgs fit of the same family (target for LikelihoodRegressor: <= 1.0)")


if __name__ == "__main__":
    main()
