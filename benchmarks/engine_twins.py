"""Training time and peak memory of lossfam's ``train`` against each engine's built-in twin.

For every family with a built-in twin objective (huber: LightGBM only), with the same engine
parameters (the engines' defaults, ``num_threads``/``nthread`` 2, LightGBM ``force_row_wise``),
each run trains one contender once in a fresh child process:

* ``builtin``: ``lightgbm.train`` / ``xgboost.train`` with the twin objective
  (regression, regression_l1, huber, quantile, binary, poisson, gamma;
  reg:squarederror, reg:absoluteerror, reg:quantileerror, binary:logistic, count:poisson,
  reg:gamma);
* ``train``: ``lossfam.<engine>.train(family, params, data, rounds)``, its default path
  (the native twin where there is one), everything included: target checks, baseline,
  nuisance pre-fit and final fit;
* ``custom``: the same with ``native=False``, the pure custom-objective path;
* ``floor``: the engine's custom-objective mechanism alone: an objective that returns
  gradient and Hessian arrays computed once before training (the family's, at the
  starting score), so no objective can be cheaper.  The starting score is the baseline,
  as ``init_score`` / ``base_margin``.

Only the training call is timed: data are simulated, and the ``lightgbm.Dataset`` (binned)
or ``xgboost.DMatrix`` built, before the clock starts.  The time of a cell is the minimum
(``--stat median``: the median) over ``--repeats`` runs; within each repeat the contenders run
one after the other, in alternating order, so that load from other processes hits all of them
alike.  ``--clock cpu`` times the process's CPU time instead of the wall clock: at 1 thread on a
loaded machine it leaves out the time spent waiting for a core (at more threads it sums them,
so it says nothing about wall time there).  With ``--inline``
the timed runs share this process (no start-up per run, for a heavily loaded machine) and each
contender's peak memory comes from one extra child process.  The child also
reports its peak resident memory (``ru_maxrss``: data, engine and training) and the part of it
reached before training; the table gives the peak's ratio to the built-in's (median over
repeats).  Held-out score (the same scikit-learn metric for all contenders: MSE, MAE, pinball
loss, Huber loss, log loss, mean Poisson or gamma deviance) on fresh rows of the same
simulation is printed beside the times.

Simulated data (a demo scenario of our own): features x ~ N(0, I_p) in float32, signal
s = 0.5 sin(2 x0) + 0.4 x1 - 0.3 x2 x3 + 0.2 x4^2; gaussian y = 3 + 2 s + N(0, 1); laplace,
huber and quantiles y = 3 + 2 s + (0.5 + 0.5 |x5|) Gumbel; bernoulli y ~ B(expit(s)); poisson
y ~ Poisson(exp(0.3 + s)); gamma y ~ Gamma(shape 2, mean exp(1 + s)).

Usage::

    python benchmarks/engine_twins.py                       # the full run (about an hour)
    python benchmarks/engine_twins.py --sizes 200000x100:1.05 10000x1000:1.10 \\
        --engines lightgbm --families poisson,asymmetric_laplace:0.1 --repeats 3
"""
from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import time

FAMILIES = ("gaussian", "laplace", "asymmetric_laplace:0.9", "bernoulli", "poisson", "gamma", "huber", "tweedie:1.5")
SIZES = ("1000000x100:1.05", "10000x1000:1.10")
CONTENDERS = ("builtin", "train", "custom", "floor")
#: ``--clock``: wall time, or the process's CPU time (all its threads: meaningful at 1 thread only, where
#: it leaves out the time the process waits for a core on a loaded machine)
CLOCKS = {"wall": time.perf_counter, "cpu": time.process_time}


def has_twin(engine, name):
    return not (engine == "xgboost" and name == "huber")  # XGBoost's pseudo-Huber is another loss


def huber_threshold(trained):
    """Huber's threshold on the target's scale: delta times the (fitted) scale."""
    return trained.params["delta"] * trained.params["scale"]


def twin(engine, name, tau, trained):
    """The built-in objective whose loss is the family's (as trained)."""
    if name == "tweedie":  # both engines call the power tweedie_variance_power
        return {"objective": "tweedie" if engine == "lightgbm" else "reg:tweedie", "tweedie_variance_power": tau}
    if engine == "lightgbm":
        if name == "huber":  # LightGBM's alpha is the threshold on the target's scale
            return {"objective": "huber", "alpha": huber_threshold(trained)}
        if name == "asymmetric_laplace":
            return {"objective": "quantile", "alpha": tau}
        return {"objective": {"gaussian": "regression", "laplace": "regression_l1", "bernoulli": "binary",
                              "poisson": "poisson", "gamma": "gamma"}[name]}
    if name == "asymmetric_laplace":
        return {"objective": "reg:quantileerror", "quantile_alpha": tau}
    return {"objective": {"gaussian": "reg:squarederror", "laplace": "reg:absoluteerror",
                          "bernoulli": "binary:logistic", "poisson": "count:poisson", "gamma": "reg:gamma"}[name]}


# ------------------------------------------------------------------------------------------
# child process: one contender, one training run


def simulate(name, n, p, seed):
    import numpy as np
    from scipy import special

    rng = np.random.default_rng(seed)
    X = rng.standard_normal((n, p), dtype=np.float32)
    s = 0.5 * np.sin(2 * X[:, 0]) + 0.4 * X[:, 1] - 0.3 * X[:, 2] * X[:, 3] + 0.2 * X[:, 4] ** 2
    s = s.astype(np.float64)
    if name == "bernoulli":
        y = (rng.uniform(size=n) < special.expit(s)).astype(np.float64)
    elif name == "poisson":
        y = rng.poisson(np.exp(0.3 + s)).astype(np.float64)
    elif name == "gamma":
        y = rng.gamma(2.0, np.exp(1.0 + s) / 2.0)
    elif name == "gaussian":
        y = 3.0 + 2.0 * s + rng.standard_normal(n)
    elif name == "tweedie":  # compound Poisson-gamma at p = 1.5, dispersion 1: about 25% exact zeros
        from lossfam.families import TweedieLaw

        y = TweedieLaw(np.exp(0.3 + s), 1.5, 1.0).rvs(random_state=rng)
    else:
        y = 3.0 + 2.0 * s + (0.5 + 0.5 * np.abs(X[:, 5])) * rng.gumbel(size=n)
    return X, y


def held_out_score(name, tau, trained, y, mean):
    """Held-out score of a mean / median / quantile / probability prediction, lower is better
    (scikit-learn's metrics; Huber loss by scipy.special.huber at the trained threshold)."""
    import numpy as np
    from scipy import special
    from sklearn import metrics

    if name == "gaussian":
        return metrics.mean_squared_error(y, mean)
    if name == "laplace":
        return metrics.mean_absolute_error(y, mean)
    if name == "asymmetric_laplace":
        return metrics.mean_pinball_loss(y, mean, alpha=tau)
    if name == "bernoulli":
        return metrics.log_loss(y, mean, labels=[0.0, 1.0])
    if name == "poisson":
        return metrics.mean_poisson_deviance(y, mean)
    if name == "gamma":
        return metrics.mean_gamma_deviance(y, mean)
    if name == "tweedie":
        return metrics.mean_tweedie_deviance(y, mean, power=tau)
    return float(np.mean(special.huber(huber_threshold(trained), y - mean)))


def sample(spec):
    """(X, y, X_test, y_test) of one benchmark case."""
    n = spec["rows"]
    X, y = simulate(spec["family"], n + min(max(n // 10, 10_000), 100_000), spec["features"], seed=2026)
    return X[:n], y[:n], X[n:], y[n:]


def child(spec):
    """Subprocess entry: train one contender once, print the JSON line of :func:`measure`."""
    print(json.dumps(measure(spec)))


def measure(spec, data_sets=None):
    """Train one contender once: seconds, peak memory (MiB, before and after) and held-out score."""
    import resource

    import numpy as np
    from scipy import special

    import lossfam

    engine, side, name, tau = spec["engine"], spec["side"], spec["family"], spec["tau"]
    n, rounds, threads = spec["rows"], spec["rounds"], spec["threads"]
    if tau is None:
        fam = lossfam.family(name)
    else:  # the number after the colon: asymmetric_laplace's quantile, tweedie's power
        fam = lossfam.family(name, **{"power" if name == "tweedie" else "quantile": tau})
    X, y, Xt, yt = data_sets or sample(spec)
    inverse = {"log": np.exp, "logit": special.expit}.get(fam.link_function.name, lambda r: r)

    if engine == "lightgbm":
        import lightgbm as lgb

        from lossfam import lightgbm as adapter

        params = {"num_threads": threads, "verbosity": -1, "seed": 1, "deterministic": True, "force_row_wise": True}
        data = lgb.Dataset(X, y, params=params, free_raw_data=False).construct()
    else:
        import xgboost as xgb

        from lossfam import xgboost as adapter

        params = {"tree_method": "hist", "nthread": threads, "seed": 1}
        data = xgb.DMatrix(X, label=y, nthread=threads)

    trained = fam
    if side in ("builtin", "floor") and name == "huber":  # the threshold of the family as lossfam trains it
        trained = fam.fit_nuisance(y, np.full(n, fam.baseline(y)))
    if side == "floor":
        start = np.full(n, fam.baseline(y))
        g, h = (a.astype(np.float32) for a in fam.grad_hess(y, start))
    before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    t0 = CLOCKS[spec.get("clock", "wall")]()
    if side in ("train", "custom"):
        fit = adapter.train(fam, params, data, rounds, native=(side == "train"))
        seconds = CLOCKS[spec.get("clock", "wall")]() - t0
        trained = fit.family
        raw = fit.predict_raw(Xt)
    elif engine == "lightgbm":
        if side == "builtin":
            booster = lgb.train({**params, **twin(engine, name, tau, trained)}, data, rounds)
            seconds = CLOCKS[spec.get("clock", "wall")]() - t0
            raw = None
            mean = booster.predict(Xt)
        else:
            data.set_init_score(start)
            booster = lgb.train({**params, "objective": lambda preds, ds: (g, h)}, data, rounds)
            seconds = CLOCKS[spec.get("clock", "wall")]() - t0
            raw = start[0] + booster.predict(Xt, raw_score=True)
    else:
        if side == "builtin":
            booster = xgb.train({**params, **twin(engine, name, tau, trained)}, data, rounds)
            seconds = CLOCKS[spec.get("clock", "wall")]() - t0
            raw = None
            mean = booster.inplace_predict(Xt)
        else:
            data.set_base_margin(start)
            booster = xgb.train({**params, "disable_default_eval_metric": 1}, data, rounds,
                                obj=lambda preds, dm: (g, h))
            seconds = CLOCKS[spec.get("clock", "wall")]() - t0
            raw = booster.inplace_predict(Xt, base_margin=np.full(len(Xt), start[0]), predict_type="margin")
    if raw is not None:
        mean = inverse(np.asarray(raw, dtype=np.float64))
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    # the floor repeats one tree: not a model, its raw scores may run off, so it gets no score
    score = None if side == "floor" else held_out_score(name, tau, trained, yt, np.asarray(mean, dtype=np.float64))
    return {"seconds": seconds, "peak_mib": peak, "before_mib": before, "score": score}


# ------------------------------------------------------------------------------------------
# parent: alternate the contenders, collect, print the table


def run_child(spec):
    out = subprocess.run([sys.executable, os.path.abspath(__file__), "--child", json.dumps(spec)],
                         capture_output=True, text=True)
    if out.returncode != 0:
        return {"error": (out.stderr.strip().splitlines() or ["?"])[-1]}
    return json.loads(out.stdout.strip().splitlines()[-1])


def parse_family(text):
    name, _, tau = text.partition(":")
    return name, (float(tau) if tau else None)


def parse_size(text):
    shape, _, limit = text.partition(":")
    rows, rounds = shape.lower().split("x")
    return int(float(rows)), int(rounds), (float(limit) if limit else None)


def label(name, tau):
    return name if tau is None else f"{name} {'p' if name == 'tweedie' else 'τ'}={tau}"


def fmt(x, spec=".2f"):
    return "—" if x is None else format(x, spec)


def summarise(runs, stat="min"):
    ok = [r for r in runs if "error" not in r]
    if not ok:
        return None
    mem = [r for r in ok if r.get("peak_mib") is not None]
    timed = [r["seconds"] for r in ok if r["seconds"] != float("inf")]  # inline: the memory-only run has inf
    return {"seconds": (min if stat == "min" else statistics.median)(timed),
            "peak_mib": statistics.median(r["peak_mib"] for r in mem) if mem else None,
            "score": statistics.median(r["score"] for r in ok) if ok[0]["score"] is not None else None}


def table_row(engine, name, tau, n, rounds, limit, runs, others, stat="min"):
    """One markdown row: seconds and ratios to the built-in, held-out scores, peak memory ratios."""
    cell = {c: summarise(v, stat) for c, v in runs.items()}
    b = cell["builtin"]
    row = [engine, label(name, tau), f"{n:.0e} × {rounds}", fmt(b and b["seconds"])]
    for c in others:
        x = cell[c]
        if x is None or b is None:
            row.append("failed: " + next((r["error"] for r in runs[c] if "error" in r), "?")[:60])
            continue
        lim = f", ≤ {limit}" if c == "train" and limit else ""
        row.append(f"{x['seconds']:.2f} ({x['seconds'] / b['seconds']:.3f}{lim})")
    row.append(" / ".join(fmt(cell[c] and cell[c]["score"], ".4g") for c in ["builtin", *others] if c != "floor"))
    row.append(fmt(b and b["peak_mib"], ".0f"))
    row += [fmt(cell[c] and b and b["peak_mib"] and cell[c]["peak_mib"] and cell[c]["peak_mib"] / b["peak_mib"], ".3f")
            for c in others]
    return "| " + " | ".join(row) + " |"


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--engines", default="lightgbm,xgboost")
    ap.add_argument("--families", default=",".join(FAMILIES),
                    help="comma-separated; asymmetric_laplace takes its quantile as name:tau")
    ap.add_argument("--sizes", nargs="+", default=list(SIZES), help="ROWSxROUNDS[:LIMIT], e.g. 1e6x100:1.05")
    ap.add_argument("--contenders", default=",".join(CONTENDERS))
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--features", type=int, default=20)
    ap.add_argument("--threads", type=int, default=2)
    ap.add_argument("--clock", choices=sorted(CLOCKS), default="wall",
                    help="cpu: the process's CPU time instead of the wall clock (1 thread on a loaded machine)")
    ap.add_argument("--stat", choices=("min", "median"), default="min", help="of the repeats, per cell")
    ap.add_argument("--inline", action="store_true",
                    help="time in this process (no per-run start-up: for a loaded machine); peak memory "
                         "then comes from one extra child process per contender")
    ap.add_argument("--child", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.child:
        return child(json.loads(args.child))

    import lightgbm
    import numpy
    import xgboost

    engines = args.engines.split(",")
    families = [parse_family(f) for f in args.families.split(",")]
    sizes = [parse_size(s) for s in args.sizes]
    contenders = [c for c in CONTENDERS if c in args.contenders.split(",")]
    if "builtin" not in contenders:
        ap.error("--contenders must include builtin (every ratio is against it)")

    print(f"lightgbm {lightgbm.__version__}, xgboost {xgboost.__version__}, numpy {numpy.__version__}; "
          f"{args.features} features, {args.threads} threads; time = {args.stat} of {args.repeats} alternated runs "
          f"({'CPU time' if args.clock == 'cpu' else 'wall clock'}) "
          + ("in this process; peak memory = peak RSS of one more child process per contender\n" if args.inline else
             "(fresh process each); peak memory = median peak RSS of those processes\n"))
    others = [c for c in contenders if c != "builtin"]
    head = ["engine", "family", "rows × rounds", "built-in s"]
    head += [f"{c} s (ratio{', limit' if c == 'train' else ''})" for c in others]
    head += ["held-out: " + " / ".join(["built-in"] + [c for c in others if c != "floor"])]
    head += ["peak MiB built-in", *[f"{c} peak ratio" for c in others]]
    print("| " + " | ".join(head) + " |")
    print("|" + "---|" * len(head), flush=True)
    results = []
    for n, rounds, limit in sizes:
        for engine in engines:
            for name, tau in families:
                if not has_twin(engine, name):
                    continue
                runs = {c: [] for c in contenders}
                case = {"engine": engine, "family": name, "tau": tau, "rows": n, "rounds": rounds,
                        "features": args.features, "threads": args.threads, "clock": args.clock}
                data_sets = sample(case) if args.inline else None
                for r in range(args.repeats):
                    for c in (contenders if r % 2 == 0 else contenders[::-1]):
                        if args.inline:
                            runs[c].append({**measure({**case, "side": c}, data_sets), "peak_mib": None})
                        else:
                            runs[c].append(run_child({**case, "side": c}))
                if args.inline:
                    for c in contenders:
                        runs[c].append({**run_child({**case, "side": c}), "seconds": float("inf")})
                results.append((engine, name, tau, n, rounds, runs))
                print(table_row(engine, name, tau, n, rounds, limit, runs, others, args.stat), flush=True)

    print("\nAll runs (seconds, in run order):")
    for engine, name, tau, n, rounds, runs in results:
        print(f"- {engine} {label(name, tau)} {n:.0e} × {rounds}: " + "; ".join(
            f"{c} " + ", ".join("error" if "error" in r else f"{r['seconds']:.2f}" for r in v
                               if r.get("seconds") != float("inf"))
            for c, v in runs.items()))


if __name__ == "__main__":
    main()
