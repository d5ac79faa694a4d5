"""How much the starting score alone moves the held-out score of the engines' median / quantile objectives.

For laplace and asymmetric_laplace (tau = 0.05 ... 0.95), each engine's built-in twin (LightGBM
``regression_l1`` / ``quantile``, XGBoost ``reg:absoluteerror`` / ``reg:quantileerror``) is trained
from its own starting score and from the training targets' sample quantile by each of five
definitions (numpy.quantile methods; R. J. Hyndman and Y. Fan, "Sample quantiles in statistical
packages", The American Statistician 50(4), 1996):

========================  ======================================================
``inverted_cdf``          HF 1: the smallest value whose cumulative share reaches tau
``averaged_inverted_cdf``  HF 2: the midpoint of the minimisers of the pinball loss (lossfam's baseline)
``linear``                HF 7 (LightGBM's own start and leaf renewal)
``weibull``               HF 6 (XGBoost's own, without weights)
``median_unbiased``       HF 8 (Hyndman and Fan's recommendation)
========================  ======================================================

(as the Dataset's ``init_score`` / the ``base_score``).  lossfam's native path is exactly the
built-in started at lossfam's baseline (tests/test_engine_parity.py,
``test_native_path_is_the_builtin_from_the_same_start``), so each column is the ratio the parity
test would see with that rule as the baseline.  Printed: held-out pinball loss (MAE / 2 for
laplace: the same ratio) from each start divided by the built-in's from its own start, pooled
over folds, on the parity test's data and settings (its ``_simulate`` seeds 0-2 and the 5-fold
diabetes data; learning rates 0.05 and 0.3, 100 and 1000 rounds, one thread).

Usage::

    python benchmarks/quantile_starts.py lightgbm starts_lgb.jsonl   # about 35 minutes
    python benchmarks/quantile_starts.py xgboost starts_xgb.jsonl    # about 60 minutes
    python benchmarks/quantile_starts.py --summary starts_lgb.jsonl starts_xgb.jsonl

A run appends one JSON line per cell and skips cells already in its file.
"""
from __future__ import annotations

import importlib.util
import json
import math
import sys
import time
from pathlib import Path

import numpy as np

RULES = ("inverted_cdf", "averaged_inverted_cdf", "linear", "weibull", "median_unbiased")
LABEL = {"inverted_cdf": "HF1", "averaged_inverted_cdf": "midpoint", "linear": "HF7", "weibull": "HF6",
         "median_unbiased": "HF8"}
TAUS = (0.05, 0.1, 0.25, 0.5, 0.75, 0.9, 0.95)
SOURCES = ("diabetes", "sim0", "sim1", "sim2")
SETTINGS = ((0.05, 100), (0.3, 100), (0.05, 1000), (0.3, 1000))


def _parity_module():
    path = Path(__file__).resolve().parents[1] / "tests" / "test_engine_parity.py"
    spec = importlib.util.spec_from_file_location("engine_parity", path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def _fit_predict(engine, params, twin, X, y, Xt, rounds, start):
    """Held-out raw scores of the built-in twin, from its own start (None) or from ``start``."""
    if engine == "lightgbm":
        import lightgbm as lgb

        data = lgb.Dataset(X, y, init_score=None if start is None else np.full(y.size, start))
        booster = lgb.train({**params, **twin}, data, rounds)
        return booster.predict(Xt, raw_score=True) + (0.0 if start is None else start)
    import xgboost as xgb

    p = {**params, **twin}
    if start is not None:
        p["base_score"] = float(np.float32(start))
    booster = xgb.train(p, xgb.DMatrix(X, label=y), rounds)
    return booster.predict(xgb.DMatrix(Xt), output_margin=True)


def run(engine, out_path):
    from sklearn.metrics import mean_pinball_loss

    parity = _parity_module()
    done = set()
    if Path(out_path).exists():
        for line in open(out_path):
            r = json.loads(line)
            done.add((r["name"], r["tau"], r["source"], r["lr"], r["rounds"]))
    cases = [("laplace", None)] + [("asymmetric_laplace", t) for t in TAUS]
    with open(out_path, "a") as out:
        for lr, rounds in SETTINGS:
            for name, tau in cases:
                q = 0.5 if tau is None else tau
                twin = parity._BENCH.twin(engine, name, tau, None)
                params = parity._engine_params(engine, lr)
                for source in SOURCES:
                    if (name, tau, source, lr, rounds) in done:
                        continue
                    t0 = time.time()
                    preds = {k: [] for k in ("own",) + RULES}
                    starts = {k: [] for k in RULES}
                    ys = []
                    for X, y, Xt, yt in parity._splits(source, name):
                        by_start = {}
                        preds["own"].append(_fit_predict(engine, params, twin, X, y, Xt, rounds, None))
                        for rule in RULES:
                            s = float(np.quantile(y, q, method=rule))
                            key = float(np.float32(s)) if engine == "xgboost" else s
                            if key not in by_start:
                                by_start[key] = _fit_predict(engine, params, twin, X, y, Xt, rounds, s)
                            preds[rule].append(by_start[key])
                            starts[rule].append(s)
                        ys.append(yt)
                    y_all = np.concatenate(ys)
                    own = mean_pinball_loss(y_all, np.concatenate(preds["own"]), alpha=q)
                    ratios = {k: mean_pinball_loss(y_all, np.concatenate(preds[k]), alpha=q) / own for k in RULES}
                    rec = dict(engine=engine, name=name, tau=tau, source=source, lr=lr, rounds=rounds, own=own,
                               ratios=ratios, starts=starts, secs=round(time.time() - t0, 1))
                    out.write(json.dumps(rec) + "\n")
                    out.flush()
                    print(engine, name, tau, source, lr, rounds, {LABEL[k]: round(v, 4) for k, v in ratios.items()},
                          flush=True)


def summary(paths):
    recs = [json.loads(line) for p in paths for line in open(p)]
    for engine in sorted({r["engine"] for r in recs}):
        cells = [r for r in recs if r["engine"] == engine]
        print(f"{engine}: {len(cells)} cells (case x source x setting)")
        for rule in RULES:
            v = [r["ratios"][rule] for r in cells]
            over = sum(x > 1.01 for x in v)
            geo = math.exp(sum(map(math.log, v)) / len(v))
            print(f"  start {LABEL[rule]:9s} over 1.01: {over:3d}  max {max(v):.4f}  min {min(v):.4f}  geometric mean {geo:.4f}")
    print(f"one rule for both engines, cells over 1.01 of {len(recs)}:",
          {LABEL[k]: sum(r["ratios"][k] > 1.01 for r in recs) for k in RULES})
    print("\n| engine | case | source | lr x rounds | " + " | ".join(LABEL[k] for k in RULES) + " |")
    print("|---" * (4 + len(RULES)) + "|")
    for r in sorted(recs, key=lambda r: (r["engine"], r["lr"], r["rounds"], r["tau"] or 0.5, r["name"], r["source"])):
        case = "laplace" if r["tau"] is None else f"AL {r['tau']}"
        cells = " | ".join(("**%.4f**" if r["ratios"][k] > 1.01 else "%.4f") % r["ratios"][k] for k in RULES)
        print(f"| {r['engine']} | {case} | {r['source']} | {r['lr']} x {r['rounds']} | {cells} |")


if __name__ == "__main__":
    if sys.argv[1] == "--summary":
        summary(sys.argv[2:])
    else:
        run(sys.argv[1], sys.argv[2])
