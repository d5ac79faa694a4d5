r"""Which noise model fits?  Cross-validated held-out likelihood of every candidate family.

``lossfam.rank_families(X, y)`` fits one model per candidate family on each training
fold, scores the held-out fold by its negative log-likelihood per row (nats),
and ranks the families, best (lowest held-out nll) first.  Beside the score it
reports the standard error of the fold means, the gap to the best family with
a paired standard error, the fitted nuisance parameters, the observed coverage
of the central 90% prediction interval and the Kolmogorov-Smirnov distance of
the held-out quantile residuals from N(0, 1) (see :mod:`lossfam.diagnostics`).

One footing for discrete and continuous families
------------------------------------------------
A count law gives each integer y a probability; a continuous law gives a
density, which is not a probability and has units.  On integer-valued targets
a continuous family is therefore scored by the probability it gives to the unit
interval around each y,

    nll = -log(F(y + 1/2) - F(y - 1/2)),

the law of the rounded value, so both kinds are log-probabilities of the same
events and their nll can be compared.  The column ``scored_by`` says which
footing each row used.  On non-integer targets continuous families are scored
by their log density and count/label families are not applicable.

Applicability.  A family whose support excludes some target (counts for
non-integer targets, gamma for zeros or negatives, bernoulli for anything but
0/1) is listed with status "not applicable" and the reason from
``family.check_target(y)``; a family whose fit fails on a fold with a
ValueError is listed as "failed" with the message.  Neither stops the others.

Default candidates.  Every registered family that accepts y, except
``asymmetric_laplace``: at its default quantile 0.5 it is the Laplace law
reparametrised (scale 2b), so it would only duplicate the laplace row.  Pass it
explicitly (e.g. ``lossfam.family("asymmetric_laplace", quantile=0.9)``) to
compare a quantile model.

Nuisance parameters and the order of fitting
--------------------------------------------
Nuisance parameters are fitted on the training fold only, by
``family.fit_nuisance(y_train, raw_train)`` after the location model, and the
held-out fold is scored with them.  Where the location fit depends on the
scale, the order is: scale, location, scale.

* laplace, asymmetric_laplace: their location (a median or quantile) does
  not depend on the scale; the boosting engines grow their trees on the
  pinball subgradient and set leaves to exact residual quantiles, and the
  scale is fitted on the training residuals afterwards.  The linear engine
  solves the quantile problem exactly (a linear programme).
* huber (``location_needs_nuisance``): residuals beyond delta * scale are
  down-weighted, so the location estimate itself depends on the scale.  The
  linear engine fits scale and coefficients jointly.  With either boosting
  engine: pilot scale at the baseline, trees, scale from their residuals,
  then the trees once more at that scale (``prefit=False``) and the scale
  once more (one step of the alternating location/scale fit).
* gaussian, gamma (exact Hessians): the Newton step does not depend on the
  nuisance parameter, so the location is fitted with the defaults, then the parameter.

Reported parameters are the means over the training folds.
"""
from __future__ import annotations

import math
import sys

import numpy as np

from . import _checks, diagnostics
from .registry import available, family as make_family

ENGINES = ("linear", "lightgbm", "xgboost")

#: families left out of the default candidates (see the module docstring)
NOT_BY_DEFAULT = ("asymmetric_laplace",)
#: engines that train at a given scale: families whose location depends on it
#: (``Family.location_needs_nuisance``) get one more location/scale round (the linear
#: engine fits huber jointly)
_REFIT_ENGINES = ("lightgbm", "xgboost")
#: central interval whose coverage is reported
COVERAGE_LEVEL = 0.9
#: levels of the coverage table kept for plots
PLOT_LEVELS = (0.5, 0.8, 0.9, 0.95)

SCORED_DENSITY = "log density"
SCORED_MASS = "log probability"
SCORED_INTERVAL = "log probability of [y-1/2, y+1/2]"

STATUS_OK = "ok"
STATUS_NA = "not applicable"
STATUS_FAILED = "failed"

#: boosting settings used when ``engine_params`` does not override them
BOOST_DEFAULTS = {
    "lightgbm": {"learning_rate": 0.1, "num_leaves": 15, "min_data_in_leaf": 20, "num_threads": 2, "verbose": -1},
    "xgboost": {"eta": 0.1, "max_depth": 4, "nthread": 2},
}

__all__ = ["rank_families", "ENGINES", "NOT_BY_DEFAULT"]


# ---------------------------------------------------------------------- engines
def _fit_engine(engine, fam, X, y, w, *, seed, rounds, options, keep_params=False):
    """Fit a location model for ``fam``; return a function X -> raw scores.

    The one place that knows each engine's fitting call.  ``keep_params``:
    train with the family's nuisance parameters as given (no pilot fit).
    """
    if engine == "linear":
        from .sklearn import LikelihoodRegressor

        est = LikelihoodRegressor(family=fam, **options)
        est.fit(X, y, sample_weight=w)
        return lambda Z: np.asarray(est.predict_raw(Z), dtype=float)
    if engine == "lightgbm":
        import lightgbm as lgb

        from .lightgbm import train

        params = {**BOOST_DEFAULTS["lightgbm"], "seed": seed, **options}
        model = train(fam, params, lgb.Dataset(X, y, weight=w), num_boost_round=rounds, prefit=not keep_params)
        return lambda Z: np.asarray(model.predict_raw(Z), dtype=float)
    if engine == "xgboost":
        import xgboost as xgb

        from .xgboost import train

        params = {**BOOST_DEFAULTS["xgboost"], "seed": seed, **options}
        model = train(fam, params, xgb.DMatrix(X, y, weight=w), num_boost_round=rounds, prefit=not keep_params)
        return lambda Z: np.asarray(model.predict_raw(Z), dtype=float)
    raise ValueError(f"rank_families: engine must be one of {', '.join(ENGINES)}, got {engine!r}")


def _fit_family(fit, engine, fam, X, y, w):
    """Location then nuisance parameters on one training fold (order: module docstring)."""
    predict = fit(fam, X, y, w, False)
    fam = fam.fit_nuisance(y, predict(X), w)
    if engine in _REFIT_ENGINES and fam.location_needs_nuisance and fam.params:
        predict = fit(fam, X, y, w, True)
        fam = fam.fit_nuisance(y, predict(X), w)
    return fam, predict


# ---------------------------------------------------------------------- scoring
def _score_fold(fam, y, raw, integer_footing, rng):
    """Per-row held-out nll, quantile residuals, PIT, interval indicators, P(y=1)."""
    unit = integer_footing and not fam.discrete
    if unit:
        nll = -diagnostics.log_interval_probability(fam, y, raw)
    else:
        nll = fam.nll(y, raw)
    z = diagnostics.quantile_residuals(fam, y, raw, seed=rng, unit_interval=unit)
    # the same draws give the PIT: u = Phi(z) up to the documented clip
    from scipy.special import ndtr

    u = ndtr(z)
    law = fam.distribution(raw)
    inside = {}
    for level in PLOT_LEVELS:
        lo, hi = law.interval(level)
        inside[level] = (np.asarray(lo) <= y) & (y <= np.asarray(hi))
    p1 = None
    if np.all((y == 0) | (y == 1)):
        p1 = np.asarray(law.sf(0.5), dtype=float)
    return nll, z, u, inside, p1


def _folds(n, k, seed):
    perm = np.random.default_rng(seed).permutation(n)
    return np.array_split(perm, k)


def _wmean(values, w):
    return float(np.dot(w, values) / w.sum())


def _label(fam, given_as_object, fitted_params):
    """The family's name, plus the parameters that stay fixed when they are not the defaults."""
    if not given_as_object:
        return fam.name
    defaults = type(fam)().params if _constructible(type(fam)) else {}
    fixed = {
        k: v
        for k, v in fam.params.items()
        if (fitted_params is None or fitted_params.get(k) == v) and defaults.get(k) != v
    }
    if not fixed:
        return fam.name
    return fam.name + "(" + ", ".join(f"{k}={v:g}" for k, v in fixed.items()) + ")"


def _constructible(cls):
    try:
        cls()
    except Exception:  # a user family whose parameters have no defaults
        return False
    return True


def _candidates(families, y):
    """[(family or None, label, reason, given_as_object)] for the requested or default families."""
    if families is None:
        families = [n for n in available() if n not in NOT_BY_DEFAULT]
    elif isinstance(families, str):
        families = [s.strip() for s in families.split(",") if s.strip()]
    out = []
    for spec in families:
        obj = not isinstance(spec, str)
        if obj or spec not in available():
            fam = make_family(spec)  # a family object, or an unknown name: ValueError listing the choices
        else:
            try:
                fam = make_family(spec)
            except (TypeError, ValueError) as exc:  # a registered class without usable defaults
                out.append((None, spec, f"cannot be built with its default parameters ({exc}); "
                                        "pass a family object", obj))
                continue
        try:
            fam.check_target(y)
        except ValueError as exc:
            msg = str(exc)
            if msg.startswith(fam.name + ": "):
                msg = msg[len(fam.name) + 2:]  # the row already names the family
            out.append((fam, _label(fam, obj, None), msg + " (rows counted from 0)", obj))
            continue
        out.append((fam, None, None, obj))
    return out


# ---------------------------------------------------------------------- public
def _as_inputs(X, y, weight, engine):
    y = _checks.as_float_array(y, "y", "rank_families")
    if y.ndim != 1:
        y = y.ravel() if y.ndim == 2 and 1 in y.shape else y
    if y.ndim != 1:
        raise ValueError(f"rank_families: y must be one-dimensional, got shape {y.shape}")
    _checks.REAL.check(y, "y", "rank_families")
    X = _checks.as_float_array(X, "X", "rank_families")
    if X.ndim == 1:
        X = X[:, None]
    if X.ndim != 2 or X.shape[0] != y.shape[0]:
        raise ValueError(f"rank_families: X must be 2-D with one row per target; X has shape {X.shape}, y has {y.shape[0]} rows")
    if X.shape[1] == 0:
        raise ValueError("rank_families: X has no feature columns")
    if engine == "linear":
        _checks.REAL.check(X, "X (the linear engine needs finite features)", "rank_families")
    elif np.any(np.isinf(X)):
        _checks.Domain("finite or NaN (missing)", lambda a: ~np.isinf(a)).check(X, "X", "rank_families")
    w = _checks.check_weight(weight, y, "rank_families", need_positive_sum=True)
    w = np.ones_like(y) if w is None else np.ascontiguousarray(w, dtype=float)
    return X, y, w


def _rank_detailed(X, y, families=None, engine="linear", folds=5, weight=None, seed=0, *,
                      rounds=100, engine_params=None, progress=None):
    """The machinery behind :func:`rank_families`: returns (rows, details by label)."""
    if engine not in ENGINES:
        raise ValueError(f"rank_families: engine must be one of {', '.join(ENGINES)}, got {engine!r}")
    X, y, w = _as_inputs(X, y, weight, engine)
    n = y.size
    if isinstance(folds, bool) or not isinstance(folds, (int, np.integer)) or not 2 <= folds <= n:
        raise ValueError(f"rank_families: folds must be an integer between 2 and the number of rows ({n}), got {folds!r}")
    if int(rounds) < 1:
        raise ValueError(f"rank_families: rounds must be >= 1, got {rounds!r}")
    options = dict(engine_params or {})
    integer_footing = bool(np.all(np.floor(y) == y))
    say = progress if callable(progress) else (
        (lambda msg: print(f"[lossfam rank] {msg}", file=sys.stderr, flush=True)) if progress else (lambda msg: None))

    def fit(fam, Xa, ya, wa, keep_params):
        return _fit_engine(engine, fam, Xa, ya, wa, seed=seed, rounds=int(rounds), options=options,
                           keep_params=keep_params)

    parts = _folds(n, int(folds), seed)
    rows, details = [], {}
    cands = _candidates(families, y)
    for ci, (fam0, na_label, reason, obj) in enumerate(cands):
        if reason is not None:
            rows.append({"family": na_label, "status": STATUS_NA, "note": reason})
            continue
        nll_rows = np.empty(n)
        z_all, u_all = np.empty(n), np.empty(n)
        inside = {lv: np.zeros(n, dtype=bool) for lv in PLOT_LEVELS}
        p1 = np.empty(n) if np.all((y == 0) | (y == 1)) else None
        fold_means, params = [], []
        label = fam0.name
        try:
            for k, test in enumerate(parts):
                say(f"{engine}: {fam0.name} fold {k + 1}/{len(parts)} ({ci + 1}/{len(cands)} families)")
                train = np.ones(n, dtype=bool)
                train[test] = False
                fam, predict = _fit_family(fit, engine, fam0, X[train], y[train], w[train])
                raw = predict(X[test])
                rng = np.random.default_rng([seed, k])
                s_nll, s_z, s_u, s_in, s_p1 = _score_fold(fam, y[test], raw, integer_footing, rng)
                nll_rows[test], z_all[test], u_all[test] = s_nll, s_z, s_u
                for lv in PLOT_LEVELS:
                    inside[lv][test] = s_in[lv]
                if p1 is not None:
                    p1[test] = s_p1
                fold_means.append(_wmean(s_nll, w[test]))
                params.append(fam.params)
                if k == 0:
                    label = _label(fam0, obj, fam.params)
                    while label in details:
                        label += "'"  # the same family listed twice
        except ValueError as exc:
            rows.append({"family": _label(fam0, obj, None), "status": STATUS_FAILED, "note": str(exc)})
            continue
        kf = len(fold_means)
        se = float(np.std(fold_means, ddof=1) / math.sqrt(kf))
        mean_params = {key: float(np.mean([p[key] for p in params])) for key in params[0]}
        scored = SCORED_MASS if fam0.discrete else (SCORED_INTERVAL if integer_footing else SCORED_DENSITY)
        note = ""
        if scored == SCORED_INTERVAL:
            note = "continuous law scored on integer targets by the probability of the unit interval around y"
        rows.append({
            "family": label,
            "status": STATUS_OK,
            "nll": _wmean(nll_rows, w),
            "nll_se": se,
            "coverage90": _wmean(inside[COVERAGE_LEVEL], w),
            "ks": diagnostics.ks_statistic(z_all),
            "params": mean_params,
            "scored_by": scored,
            "note": note,
        })
        details[label] = {
            "nll_rows": nll_rows,
            "residuals": z_all,
            "pit": u_all,
            "coverage": {
                "level": np.asarray(PLOT_LEVELS),
                "observed": np.asarray([_wmean(inside[lv], w) for lv in PLOT_LEVELS]),
                "count": np.full(len(PLOT_LEVELS), n),
            },
            "p1": p1,
        }
    return _finish(rows, details, y, w), details


def _finish(rows, details, y, w):
    ok = sorted((r for r in rows if r["status"] == STATUS_OK), key=lambda r: r["nll"])
    rest = [r for r in rows if r["status"] == STATUS_FAILED] + [r for r in rows if r["status"] == STATUS_NA]
    out = []
    best = details[ok[0]["family"]]["nll_rows"] if ok else None
    for rank, r in enumerate(ok, start=1):
        d = details[r["family"]]["nll_rows"] - best
        # paired over rows: the gap's standard error is that of the mean row-wise difference
        gap_se = float(np.sqrt(np.cov(d, aweights=w)) / math.sqrt(d.size)) if rank > 1 else 0.0
        out.append(_row(rank=rank, gap=_wmean(d, w), gap_se=gap_se, **r))
    for r in rest:
        out.append(_row(rank=None, **r))
    return out


_COLUMNS = ("rank", "family", "nll", "nll_se", "gap", "gap_se", "coverage90", "ks", "params", "scored_by", "status", "note")


def _row(**kw):
    return {c: kw.get(c) for c in _COLUMNS} | {"note": kw.get("note") or ""}


def rank_families(X, y, families=None, engine="linear", folds=5, weight=None, seed=0, *,
            rounds=100, engine_params=None, progress=False, as_frame=None):
    """Rank noise models by cross-validated held-out negative log-likelihood.

    Parameters
    ----------
    X : array-like (n, p)
        Features (NaN allowed as missing for the boosting engines).
    y : array-like (n,)
        Targets.  Integer-valued targets put continuous families on the
        interval-probability footing (module docstring).
    families : list of names or family objects, optional
        Default: every registered family applicable to y except asymmetric_laplace.
    engine : {"linear", "lightgbm", "xgboost"}
        "linear": ``lossfam.sklearn.LikelihoodRegressor``; the others boost
        ``rounds`` trees with ``lossfam.lightgbm.train`` / ``lossfam.xgboost.train``.
    folds : int
        Number of cross-validation folds (rows shuffled with ``seed``).
    weight : array-like (n,), optional
        Row weights, used in fitting and in every mean reported.
    seed : int
        Seeds the folds, the engines and the randomized residuals.
    rounds : int
        Boosting rounds (boosting engines only).
    engine_params : dict, optional
        Extra settings for the engine (estimator keyword arguments for
        "linear", booster parameters for the others).
    progress : bool or callable
        Report progress (on stderr when True, or to the callable).
    as_frame : bool, optional
        Return a pandas DataFrame (default when pandas is installed) or a
        list of dicts.

    Returns
    -------
    Table, best first, one row per family with columns: ``rank`` (None when
    not scored), ``family``, ``nll`` (mean held-out nll per row, nats),
    ``nll_se`` (standard error of the fold means), ``gap`` (nll minus the
    best family's) and ``gap_se`` (its standard error, paired over rows),
    ``coverage90`` (observed coverage of the central 90% interval), ``ks``
    (Kolmogorov-Smirnov distance of the held-out quantile residuals from
    N(0, 1); unweighted, over all rows), ``params`` (fitted nuisance parameters, mean over folds),
    ``scored_by`` (log density, log probability, or log probability of the
    unit interval around y), ``status`` ("ok", "not applicable", "failed")
    and ``note`` (the reason, or the footing).
    """
    rows, _ = _rank_detailed(X, y, families, engine, folds, weight, seed,
                                rounds=rounds, engine_params=engine_params, progress=progress)
    if as_frame is False:
        return rows
    try:
        import pandas as pd
    except ImportError:
        if as_frame:
            raise ImportError('rank_families(as_frame=True) needs pandas: pip install "lossfam[all]"') from None
        return rows
    frame = pd.DataFrame(rows, columns=list(_COLUMNS))
    frame["rank"] = frame["rank"].astype("Int64")
    if any(r["scored_by"] == SCORED_INTERVAL for r in rows):
        frame.attrs["note"] = ("integer-valued targets: continuous families are scored by "
                               "-log(F(y+1/2) - F(y-1/2)), the probability of the unit interval around y")
    return frame
