"""Fit time of LikelihoodRegressor against scikit-learn's GLM estimators, side by side in one run.

Poisson and gamma (log link), n x p = 500000 x 30 by default, no penalty.
For each family the script times (median of --repeats rounds; in each round
every contender fits once, in turn, on the same data):

* LikelihoodRegressor(family=..., alpha=0) -- Newton, one pass over X per step, tol=1e-8 (its default)
* scikit-learn PoissonRegressor / GammaRegressor(solver="lbfgs", alpha=0) at
  its default tol=1e-4, and at tol=1e-8
* scikit-learn ...(solver="newton-cholesky", alpha=0) at its default tol

and prints wall and CPU (process) time, their ratios to the default lbfgs fit,
and the largest relative difference of each fit's coefficients (intercept
included) from a tightly converged reference: scikit-learn's newton-cholesky
solver with tol=1e-12 (an implementation independent of lossfam).  Every fit
runs on one BLAS thread, so CPU time is the work done; it is less disturbed
than wall time when the machine is shared.

Two more sections:

* equilibration cost on the same well-scaled data: the time of the column
  scales computed exactly in a separate pass (``_solvers.column_scales``; not
  done by the fit, shown for scale), of the column scales the fit takes from
  its start's row subsample (``_solvers._scales_from_subsample``; the squares
  themselves come from the subsample fit's first pass over its rows), of the
  symmetric scaling of each Newton matrix (``_solvers._equilibrate``) and of
  the refinement at the end (``_solvers._refine_dense``), as shares of the
  whole fit;
* sparse: a claim-count scenario with ten categorical rating factors of 200
  levels each, one-hot encoded (first level dropped) into a CSR matrix of
  --sparse-n rows x 1990 columns (~10 non-zeros a row), poisson, alpha=0,
  LikelihoodRegressor (truncated Newton, conjugate gradients) against
  ``PoissonRegressor(solver="lbfgs", alpha=0)`` on the same matrix.  Each fit
  runs in its own child process (the matrix is written once to a .npz file
  and loaded by each child; the two estimators alternate), which reports its
  wall and CPU time and its peak resident memory during the fit (VmHWM, reset
  after loading through /proc/self/clear_refs), in total and above the loaded
  data; medians over --repeats children.

Run:  python benchmarks/linear_fit.py [--n 500000] [--p 30] [--repeats 3] [--sparse-n 1000000]
      (--section dense|equilibration|sparse to run one section; --layout F|dataframe for the
      dense section on column-major X or a DataFrame, as pandas hands its values over)
Synthetic data only (a demo scenario: standard-normal features, coefficients
drawn once from N(0, 0.15^2); for the sparse section level effects from N(0, 0.3^2)).
"""
from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import tempfile
import time
import warnings

# one BLAS thread for every estimator: on a shared, loaded machine OpenBLAS threads that spin
# while preempted make level-3 calls (the Newton solver's factorisations) up to 20x slower
os.environ.setdefault("OMP_NUM_THREADS", "1")
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("MKL_NUM_THREADS", "1")

import numpy as np  # noqa: E402
from sklearn.exceptions import ConvergenceWarning  # noqa: E402
from sklearn.linear_model import GammaRegressor, PoissonRegressor  # noqa: E402

from scipy import sparse  # noqa: E402

from lossfam._sk import _solvers  # noqa: E402
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


def fit_once(make, X, y):
    est = make()
    t0, c0 = time.perf_counter(), time.process_time()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        est.fit(X, y)
    return time.perf_counter() - t0, time.process_time() - c0, est


def alternated(rows, X, y, repeats):
    """Median wall and CPU time of each contender; each round fits every contender once, in turn
    (the order reversed every other round, so no contender always runs right after the same one)."""
    wall = {label: [] for label, _ in rows}
    cpu = {label: [] for label, _ in rows}
    last = {}
    for r in range(repeats):
        for label, make in (rows if r % 2 == 0 else rows[::-1]):
            w, c, last[label] = fit_once(make, X, y)
            wall[label].append(w)
            cpu[label].append(c)
    return [(label, float(np.median(wall[label])), float(np.median(cpu[label])), last[label]) for label, _ in rows]


def load_average():
    try:
        return "load average %.2f %.2f %.2f" % os.getloadavg()
    except OSError:
        return "load average unknown"


def dense_section(args):
    print(f"{time.strftime('%Y-%m-%d %H:%M:%S', time.gmtime())} UTC, {load_average()}")
    print(f"n = {args.n}, p = {args.p}, X {args.layout}, median of {args.repeats} alternating rounds; "
          "coef diff = max relative difference from the reference (newton-cholesky, tol=1e-12)")
    print()
    print(f"{'family':8s} {'estimator':42s} {'wall [s]':>9s} {'ratio':>6s} {'CPU [s]':>8s} {'ratio':>6s} "
          f"{'n_iter':>7s} {'coef diff':>10s}")
    sk_cls = {"poisson": PoissonRegressor, "gamma": GammaRegressor}
    for fam in ("poisson", "gamma"):
        X, y = make_data(args.n, args.p, fam)
        if args.layout == "F":
            X = np.asfortranarray(X)
        elif args.layout == "dataframe":
            import pandas as pd
            X = pd.DataFrame(X, columns=[f"x{j}" for j in range(X.shape[1])])  # column-major values
        cls = sk_cls[fam]
        ref = cls(alpha=0.0, solver="newton-cholesky", tol=1e-12, max_iter=1000).fit(X, y)
        ref_params = params(ref)
        rows = [
            ("LikelihoodRegressor (Newton, tol=1e-8)", lambda: LikelihoodRegressor(family=fam)),
            (f"{cls.__name__} lbfgs tol=1e-4 (default)", lambda: cls(alpha=0.0, solver="lbfgs")),
            (f"{cls.__name__} lbfgs tol=1e-8", lambda: cls(alpha=0.0, solver="lbfgs", tol=1e-8, max_iter=10_000)),
            (f"{cls.__name__} newton-cholesky tol=1e-4", lambda: cls(alpha=0.0, solver="newton-cholesky")),
        ]
        results = alternated(rows, X, y, args.repeats)
        w_lbfgs, c_lbfgs = results[1][1], results[1][2]
        for label, w, c, est in results:
            diff = float(np.max(np.abs(params(est) - ref_params) / np.maximum(np.abs(ref_params), 1e-12)))
            print(f"{fam:8s} {label:42s} {w:9.3f} {w / w_lbfgs:6.2f} {c:8.3f} {c / c_lbfgs:6.2f} "
                  f"{int(np.max(est.n_iter_)):7d} {diff:10.2e}")
    print()
    print("ratio = time / time of the default lbfgs fit of the same family (target for LikelihoodRegressor: <= 1.0)")
    print(f"{time.strftime('%Y-%m-%d %H:%M:%S', time.gmtime())} UTC, {load_average()}")


def equilibration_section(args):
    """Share of a fit spent on what the scale-free solver adds: column scales, matrix scaling, refinement."""
    X, y = make_data(args.n, args.p, "poisson")
    v = np.full(args.n, 1.0 / args.n)
    sub = np.ascontiguousarray(X[::_solvers.SUBSAMPLE_FRACTION])
    v_sub = np.full(sub.shape[0], 1.0 / sub.shape[0])
    t_scale, t_sub, t_fit = [], [], []
    spent = {"_scales_from_subsample": [], "_equilibrate": [], "_refine_dense": [], "_raw": []}
    originals = {name: getattr(_solvers, name) for name in spent}

    def timing(name):
        def wrapper(*a, **k):
            t0 = time.perf_counter()
            out = originals[name](*a, **k)
            if name != "_raw" or (a[0].shape[0] == args.n and a[3] is None):  # _raw: X d on all rows only
                spent[name][-1] += time.perf_counter() - t0
            return out
        return wrapper

    for name in spent:
        setattr(_solvers, name, timing(name))
    try:
        for _ in range(args.repeats):
            t0 = time.perf_counter()
            _solvers.column_scales(X, v)
            t_scale.append(time.perf_counter() - t0)
            t0 = time.perf_counter()
            _solvers.weighted_column_squares(sub, v_sub)
            t_sub.append(time.perf_counter() - t0)
            for name in spent:
                spent[name].append(0.0)
            t0 = time.perf_counter()
            LikelihoodRegressor(family="poisson").fit(X, y)
            t_fit.append(time.perf_counter() - t0)
    finally:
        for name, f in originals.items():
            setattr(_solvers, name, f)
    fit, sc, sq = np.median(t_fit), np.median(t_scale), np.median(t_sub)
    ss = np.median(spent["_scales_from_subsample"])
    eq, rf = np.median(spent["_equilibrate"]), np.median(spent["_refine_dense"])
    xd = np.median(spent["_raw"])
    print(f"poisson, n = {args.n}, p = {args.p} (standard-normal columns), medians of {args.repeats}; "
          f"{time.strftime('%H:%M:%S', time.gmtime())} UTC, {load_average()}")
    print(f"  whole fit                              {fit:8.3f} s")
    print(f"  exact column scales, a separate pass   {sc:8.3f} s  ({100 * sc / fit:5.1f}% of the fit; "
          "not made by the fit)")
    print(f"  squares on the start's rows, alone     {sq:8.3f} s  ({100 * sq / fit:5.1f}% of the fit; "
          "in the fit they share the subsample fit's first pass)")
    print(f"  column scales from those squares       {ss:8.3f} s  ({100 * ss / fit:5.1f}% of the fit)")
    print(f"  scaling of the Newton matrices         {eq:8.3f} s  ({100 * eq / fit:5.1f}% of the fit)")
    print(f"  refinement at the end                  {rf:8.3f} s  ({100 * rf / fit:5.1f}% of the fit)")
    print(f"  final unchecked correction X d         {xd:8.3f} s  ({100 * xd / fit:5.1f}% of the fit; "
          "early stop or refinement)")


def make_sparse(n, factors=10, levels=200, seed=0):
    rng = np.random.default_rng(seed)
    codes = rng.integers(0, levels, size=(n, factors))
    rows, cols = [], []
    for f in range(factors):
        keep = codes[:, f] > 0  # first level of each factor dropped: full column rank with an intercept
        rows.append(np.flatnonzero(keep))
        cols.append(f * (levels - 1) + codes[keep, f] - 1)
    rows, cols = np.concatenate(rows), np.concatenate(cols)
    X = sparse.csr_matrix((np.ones(rows.size), (rows, cols)), shape=(n, factors * (levels - 1)))
    effects = rng.normal(0.0, 0.3, X.shape[1])
    y = rng.poisson(np.exp(-0.5 + X @ effects)).astype(float)
    return X, y


def _rss_kb(field):
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith(field + ":"):
                return int(line.split()[1])
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss


def _reset_peak():
    """Linux: writing 5 to clear_refs resets the peak resident set size (VmHWM) to the current one."""
    try:
        with open("/proc/self/clear_refs", "w") as fh:
            fh.write("5")
    except OSError:
        pass


def child(path, which):
    """Load the matrix, record the peak memory so far, fit, print time and peak memory as JSON."""
    X = sparse.load_npz(path + ".npz").tocsr()
    y = np.load(path + ".y.npy")
    base = _rss_kb("VmRSS")
    _reset_peak()
    est = (LikelihoodRegressor(family="poisson") if which == "lossfam"
           else PoissonRegressor(alpha=0.0, solver="lbfgs"))
    t0, c0 = time.perf_counter(), time.process_time()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        est.fit(X, y)
    t, c = time.perf_counter() - t0, time.process_time() - c0
    peak = _rss_kb("VmHWM")
    np.save(path + f".{which}.coef.npy", params(est))
    print(json.dumps({"time": t, "cpu": c, "peak_kb": peak, "data_kb": base, "n_iter": int(np.max(est.n_iter_))}))


def sparse_section(args):
    X, y = make_sparse(args.sparse_n)
    print(f"sparse poisson: {X.shape[0]} rows x {X.shape[1]} one-hot columns, {X.nnz / X.shape[0]:.2f} "
          f"non-zeros a row; each fit in its own child process, median of {args.repeats}")
    with tempfile.TemporaryDirectory() as tmp:
        path = os.path.join(tmp, "onehot")
        sparse.save_npz(path + ".npz", X, compressed=False)
        np.save(path + ".y.npy", y)
        ref = PoissonRegressor(alpha=0.0, solver="newton-cholesky", tol=1e-12, max_iter=100).fit(X, y)
        ref_params = params(ref)
        runs = {"lossfam": [], "sklearn": []}
        for _ in range(args.repeats):
            for which in runs:  # the two estimators alternate
                out = subprocess.run([sys.executable, __file__, "--child", path, which],
                                     check=True, capture_output=True, text=True).stdout
                runs[which].append(json.loads(out.strip().splitlines()[-1]))
        res = {}
        for which, rs in runs.items():
            coef = np.load(path + f".{which}.coef.npy")
            res[which] = {k: float(np.median([r[k] for r in rs])) for k in rs[0]}
            res[which]["diff"] = float(np.max(np.abs(coef - ref_params) / np.maximum(np.abs(ref_params), 1e-12)))
    print()
    print(f"{'estimator':44s} {'wall [s]':>9s} {'ratio':>6s} {'CPU [s]':>8s} {'ratio':>6s} {'peak MB':>8s} "
          f"{'ratio':>6s} {'above data MB':>14s} {'n_iter':>7s} {'coef diff':>10s}")
    labels = {"lossfam": "LikelihoodRegressor (Newton-CG, tol=1e-8)", "sklearn": "PoissonRegressor lbfgs (default tol)"}
    sk = res["sklearn"]
    for which in ("lossfam", "sklearn"):
        r = res[which]
        print(f"{labels[which]:44s} {r['time']:9.2f} {r['time'] / sk['time']:6.2f} {r['cpu']:8.2f} "
              f"{r['cpu'] / sk['cpu']:6.2f} {r['peak_kb'] / 1024:8.0f} "
              f"{r['peak_kb'] / sk['peak_kb']:6.2f} {(r['peak_kb'] - r['data_kb']) / 1024:14.0f} "
              f"{int(r['n_iter']):7d} {r['diff']:10.2e}")
    print("coef diff: max relative difference from PoissonRegressor(solver='newton-cholesky', tol=1e-12)")


def main():
    if len(sys.argv) == 4 and sys.argv[1] == "--child":
        child(sys.argv[2], sys.argv[3])
        return
    ap = argparse.ArgumentParser()
    ap.add_argument("--n", type=int, default=500_000)
    ap.add_argument("--p", type=int, default=30)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--sparse-n", type=int, default=1_000_000)
    ap.add_argument("--section", choices=("all", "dense", "equilibration", "sparse"), default="all")
    ap.add_argument("--layout", choices=("C", "F", "dataframe"), default="C",
                    help="dense section: X row-major, column-major, or a pandas DataFrame")
    args = ap.parse_args()
    if args.section in ("all", "dense"):
        dense_section(args)
        print()
    if args.section in ("all", "equilibration"):
        equilibration_section(args)
        print()
    if args.section in ("all", "sparse"):
        sparse_section(args)


if __name__ == "__main__":
    main()
