r"""Which noise model fits?  Cross-validated held-out likelihood of every candidate family.

``lossfam.rank_families(X, y)`` fits one model per candidate family on each training
fold, scores the held-out fold by its negative log-likelihood per row (nats),
and puts the families in order, best (lowest held-out nll) first.  Beside the
mean nll per row it reports how uncertain that mean is (standard error of the
fold means), how far each family is behind the best one (with the standard
error of that distance, paired over rows), the fitted nuisance parameters, a
90% calibration check, the Kolmogorov-Smirnov distance of the held-out
quantile residuals from N(0, 1) (see :mod:`lossfam.diagnostics`) and, with a
boosting engine, the number of rounds each family used.

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

Scale-varying families
----------------------
A family with several raw scores per row (:class:`lossfam.SeveralScoreFamily`, e.g.
``gaussian_spread``) models its scale (or shape) per row, with its own linear model (linear
engine: ``lossfam.sklearn.JointLikelihoodRegressor``, every raw score fitted jointly on the
training fold); it has no constant nuisance parameters to fit afterwards.  ``spread=True`` adds
the spread version of each candidate after it, so the constant-scale and the scale-varying model
of one law are scored on the same held-out rows: the ``behind_best`` distance between the two,
with its paired standard error, says whether the varying scale is worth modelling.  The boosting
engines train them with ``train`` of the engine (one tree per raw score and round, the family's
default curvature), with the same booster settings, held-back slice and early stopping on the
held-back nll as the one-score families; the held-out rows are scored by the per-row laws.
A family over unordered class labels (``multinomial``) is listed as failed: the ranking's PIT,
residuals and interval coverage do not exist for it.

Nuisance parameters: fitted on rows the model did not train on
--------------------------------------------------------------
A boosted model fits its training rows more closely than new ones, so a scale
(or shape) fitted on its training residuals comes out too small and the
predictive intervals too narrow; a light-tailed family is hurt more than a
heavy-tailed one, which can flip the order.  With a boosting engine each
training fold is therefore split once more (seeded): a held-back slice of
``HOLD_BACK`` (20%) of its rows, and the rest, on which the trees grow.  The
held-back slice serves two purposes:

* fair rounds: it is the engine's validation set, scored by the family's own
  nll after every round; training stops ``STOP_PATIENCE`` rounds after the
  best round (``rounds`` is the maximum) and the model is cut back to its
  best round.  Each family thus gets the number of rounds that suits it; the
  column ``rounds_used`` reports the mean over folds;
* honest nuisance parameters: ``family.fit_nuisance(y, raw)`` on the
  held-back rows' targets and raw scores, which the trees never saw.

The held-out fold is then scored with that model and those parameters.  For
huber, whose location fit depends on the scale, the trees are grown once more
at the held-back scale (both boosting engines) and the scale refitted (one step of the
alternating location/scale fit).  The linear engine fits on the whole
training fold: a linear model with a handful of coefficients barely overfits,
and the nuisance parameters are its maximum-likelihood fits (huber: fitted
jointly with the coefficients).  Reported parameters are the means over folds.

Calibration column
------------------
``calibration90`` is the weighted fraction of held-out rows whose PIT value
u = F(y) lies in [0.05, 0.95]; it is 0.90 up to sampling noise when the
predictive law is right.  For count and label families the PIT is the
randomized one of :mod:`lossfam.diagnostics` (uniform under the right model),
and for continuous families scored on integer targets it is randomized over
the unit interval around y.  For a continuous family it equals the coverage
of the central 90% interval.  For discrete families the plain coverage of the
central 90% interval (whose end points are integers, so it over-covers by
construction) is kept as the labelled extra ``plain_interval90``.

Offsets and exposure
--------------------
``offset`` is added to every raw score (training, held-back and held-out
rows, every family and engine); ``exposure`` adds log(exposure), so a log-link
mean becomes rate x exposure.  Both may be given (they add).  Every score,
residual, calibration figure and plot is computed from the raw score with the
offset included.

Feature columns
---------------
X may be a numeric array or a pandas DataFrame.  In a DataFrame, numeric and
boolean columns are used as numbers; text (object/string) and categorical
columns are categories: LightGBM and XGBoost split on them natively (pandas
``category`` dtype), the linear engine uses a one-hot encoding fitted on each
training fold (first level as reference; levels not seen in the training fold
get the reference's coefficient).  Datetime columns are turned into one number,
days since 1970-01-01 (UTC for time-zone aware columns, fractional), so a
trend in time can be learnt; other dtypes are refused with the column's name.
"""
from __future__ import annotations

import math
import sys
import warnings

import numpy as np

from . import _checks, diagnostics
from .censoring import IntervalTarget
from .families._several import SeveralScoreFamily
from .registry import available, family as make_family

ENGINES = ("linear", "lightgbm", "xgboost")
BOOSTING = ("lightgbm", "xgboost")

#: families left out of the default candidates (see the module docstring)
NOT_BY_DEFAULT = ("asymmetric_laplace",)
#: engines that train at a given scale: families whose location depends on it
#: (``Family.location_needs_nuisance``) get one more location/scale round (the linear
#: engine fits huber jointly)
_REFIT_ENGINES = ("lightgbm", "xgboost")
#: PIT values inside [(1 - level)/2, (1 + level)/2] make the calibration column
CALIBRATION_LEVEL = 0.9
#: levels of the coverage table kept for plots
PLOT_LEVELS = (0.5, 0.8, 0.9, 0.95)
#: share of each training fold held back (boosting engines): early stopping and nuisance fits
HOLD_BACK = 0.2
#: rounds without improvement of the held-back nll before training stops
STOP_PATIENCE = 20
#: default maximum number of boosting rounds
DEFAULT_ROUNDS = 300

SCORED_DENSITY = "log density"
SCORED_MASS = "log probability"
SCORED_INTERVAL = "log probability of [y-1/2, y+1/2]"
SCORED_CENSORED = "log density (exact rows), log probability of [lower, upper] (censored rows)"

STATUS_OK = "ok"
STATUS_NA = "not applicable"
STATUS_FAILED = "failed"

#: boosting settings used when ``engine_params`` does not override them
BOOST_DEFAULTS = {
    "lightgbm": {"learning_rate": 0.1, "num_leaves": 15, "min_data_in_leaf": 20, "num_threads": 2, "verbose": -1},
    "xgboost": {"eta": 0.1, "max_depth": 4, "nthread": 2},
}
#: the engines' names for their thread count
THREAD_PARAM = {"lightgbm": "num_threads", "xgboost": "nthread"}

#: the table's columns, in order (see :func:`rank_families`)
COLUMNS = ("place", "family", "nll_per_row", "nll_uncertainty", "behind_best", "behind_best_uncertainty",
           "calibration90", "plain_interval90", "residual_ks", "rounds_used", "nuisance", "scored_by",
           "status", "note")

__all__ = ["rank_families", "spread_versions", "ENGINES", "NOT_BY_DEFAULT", "COLUMNS", "Ranking"]


# ---------------------------------------------------------------------- engines
def _fit_engine(engine, fam, X, y, w, *, seed, rounds, options, keep_params=False, offset=None, hold=None):
    """Fit a location model for ``fam``; return (function (X, offset) -> raw scores, rounds used).

    The one place that knows each engine's fitting call.  ``keep_params``:
    train with the family's nuisance parameters as given (no pilot fit).
    ``hold`` = (X, y, w, offset) of the held-back rows: the validation set of
    early stopping on the family's nll (boosting engines).
    """
    if isinstance(fam, SeveralScoreFamily) and not fam.ordered_values:
        raise ValueError(f"{fam.name}'s law is over unordered class labels: the ranking's PIT, residuals and "
                         "interval coverage do not exist for it; compare K-class models by held-out log loss "
                         "(lossfam.sklearn.MultinomialLikelihoodClassifier, the engines' train)")
    if engine == "linear":
        return _fit_linear(fam, X, y, w, offset, options, seed), None
    if engine == "lightgbm":
        import lightgbm as lgb

        from .lightgbm import train

        params = {**BOOST_DEFAULTS["lightgbm"], "seed": seed, **options}
        leaf = int(params.get("min_data_in_leaf", 20))
        if len(y) < 2 * leaf:  # LightGBM would stop with a native fatal error (no feature can be split)
            raise ValueError(f"too few rows to grow trees: {len(y)} training rows in a fold, fewer than "
                             f"2 x min_data_in_leaf = {2 * leaf}; use more rows, fewer folds or a smaller "
                             "min_data_in_leaf")
        from .lightgbm import censored_dataset

        def dataset(Xa, ya, wa):  # censored targets: lossfam's Dataset convention
            return censored_dataset(Xa, ya, weight=wa) if isinstance(ya, IntervalTarget) else lgb.Dataset(Xa, ya, weight=wa)

        kw = {}
        if hold is not None:
            kw = {"valid_sets": [dataset(hold[0], hold[1], hold[2])], "valid_offsets": [hold[3]],
                  "callbacks": [lgb.early_stopping(STOP_PATIENCE, first_metric_only=True, verbose=False)]}
        model = train(fam, params, dataset(X, y, w), num_boost_round=rounds, offset=offset,
                      prefit=not keep_params, **kw)
    elif engine == "xgboost":
        import xgboost as xgb

        from .xgboost import train

        params = {**BOOST_DEFAULTS["xgboost"], "seed": seed, **options}
        cat = _has_categories(X)

        def dmatrix(Xa, ya, wa, oa):  # censored targets: XGBoost's label_lower_bound / label_upper_bound
            if isinstance(ya, IntervalTarget):
                from .xgboost import censored_dmatrix
                return censored_dmatrix(Xa, ya, weight=wa, base_margin=oa, enable_categorical=cat)
            return xgb.DMatrix(Xa, ya, weight=wa, base_margin=oa, enable_categorical=cat)

        kw = {}
        if hold is not None:
            dh = dmatrix(*hold)
            kw = {"evals": [(dh, "held_back")], "early_stopping_rounds": STOP_PATIENCE, "verbose_eval": False}
        model = train(fam, params, dmatrix(X, y, w, offset), num_boost_round=rounds, prefit=not keep_params, **kw)
    else:
        raise ValueError(f"rank_families: engine must be one of {', '.join(ENGINES)}, got {engine!r}")
    # with early stopping the model keeps rounds 0..best_iteration
    used = model.best_iteration + 1 if model.best_iteration is not None else rounds
    return (lambda Z, off=None: np.asarray(model.predict_raw(Z, offset=off), dtype=float)), int(used)


#: ridge penalties (on standardised columns) tried when a family's unpenalised MLE is unbounded
RIDGE_FALLBACK = (1e-4, 1e-3, 1e-2, 1e-1)


def _fit_linear(fam, X, y, w, offset, options, seed):
    """The linear engine: LikelihoodRegressor on the (one-hot encoded, centred) features
    (JointLikelihoodRegressor, a linear model for every raw score, for several-score families).

    The unpenalised MLE, or a small ridge penalty where that MLE is unbounded:
    when the fit warns that the likelihood has no finite maximiser (separated
    0/1 classes for bernoulli, zero counts a linear score can push to a mean of
    0 for poisson), the fold is refitted with a ridge penalty alpha on the
    standardised columns x_j / sd(x_j), alpha chosen from RIDGE_FALLBACK by
    3-fold cross-validation within this training fold (held-out nll of the
    family).  The returned predictor carries ``note`` saying so (shown in the
    table).  A penalty given in ``options`` (alpha) is used as it is.
    """
    from .sklearn import JointLikelihoodRegressor, LikelihoodRegressor, UnboundedLikelihoodWarning

    if isinstance(fam, SeveralScoreFamily):
        # a linear model for every raw score, fitted jointly; an unbounded likelihood (a scale
        # shrinking to 0 on rows fitted exactly, a dispersion drifting to 0) shows as a fit that
        # does not converge or as a raw score drifting far from its constant fit
        from sklearn.exceptions import ConvergenceWarning

        Estimator, Unbounded = JointLikelihoodRegressor, (ConvergenceWarning, UnboundedLikelihoodWarning)
    else:
        Estimator, Unbounded = LikelihoodRegressor, (UnboundedLikelihoodWarning,)
    onehot = _OneHot(X) if _has_categories(X) else None
    Xe = X if onehot is None else onehot(X)
    # centre the columns at the training fold's means: the same model (the intercept absorbs the
    # shift, and a penalty never applies to it), but a column far from 0 with little spread (a date
    # as days since 1970) is no longer nearly collinear with the intercept
    centre = Xe.mean(axis=0)
    Xc = Xe - centre
    with warnings.catch_warnings(record=True) as caught:
        for category in Unbounded:
            warnings.simplefilter("always", category)
        est = Estimator(family=fam, **options).fit(Xc, y, sample_weight=w, offset=offset)
    unbounded = [c for c in caught if issubclass(c.category, Unbounded)]
    for c in caught:
        if c not in unbounded:
            warnings.warn_explicit(c.message, c.category, c.filename, c.lineno)
    sd = np.ones(Xc.shape[1])
    note = ""
    if unbounded and "alpha" not in options:
        sd = np.std(Xc, axis=0)
        sd[~(sd > 0)] = 1.0
        Xs = Xc / sd
        inner = _folds(y.size, 3, seed)
        best, best_alpha = np.inf, RIDGE_FALLBACK[-1]
        for alpha in RIDGE_FALLBACK:
            total = 0.0
            for test in inner:
                train = np.ones(y.size, dtype=bool)
                train[test] = False
                o_tr = None if offset is None else offset[train]
                o_te = None if offset is None else offset[test]
                m = Estimator(family=fam, alpha=alpha, **options).fit(
                    Xs[train], y[train], sample_weight=w[train], offset=o_tr)
                total += float(np.dot(w[test], m.family_.nll(y[test], m.predict_raw(Xs[test], offset=o_te))))
            if total < best:
                best, best_alpha = total, alpha
        est = Estimator(family=fam, alpha=best_alpha, **options).fit(Xs, y, sample_weight=w, offset=offset)
        note = (f"unpenalised MLE unbounded; ridge alpha={best_alpha:g} on standardised columns, "
                "chosen by 3-fold CV within the training fold")

    def predict(Z, off=None):
        Ze = Z if onehot is None else onehot(Z)
        return np.asarray(est.predict_raw((Ze - centre) / sd, offset=off), dtype=float)
    predict.note = note
    return predict


class _OneHot:
    """One-hot encoding of a DataFrame's category columns fitted on training rows (sparse, first level dropped)."""

    def __init__(self, frame):
        from sklearn.preprocessing import OneHotEncoder

        self.cats = [c for c in frame.columns if str(frame[c].dtype) == "category"]
        self.nums = [c for c in frame.columns if c not in self.cats]
        self.enc = OneHotEncoder(drop="first", handle_unknown="ignore", sparse_output=True)
        self.enc.fit(frame[self.cats].astype(object))

    def __call__(self, frame):
        import scipy.sparse as sp

        with warnings.catch_warnings():
            # levels unseen in the training fold are encoded as the reference level (documented)
            warnings.filterwarnings("ignore", message="Found unknown categories")
            dummies = self.enc.transform(frame[self.cats].astype(object))
        nums = sp.csr_matrix(frame[self.nums].to_numpy(dtype=float)) if self.nums else None
        out = dummies if nums is None else sp.hstack([nums, dummies], format="csr")
        # the linear estimators take dense arrays: the encoding is built sparse, handed over dense
        return out.toarray()


def _has_categories(X):
    return hasattr(X, "dtypes") and any(str(t) == "category" for t in X.dtypes)


def _fit_family(fit, engine, fam, X, y, w, off, hold):
    """Location, then nuisance parameters from held-back rows (boosting) or the training fold (linear)."""
    predict, used = fit(fam, X, y, w, off, hold, False)
    if isinstance(fam, SeveralScoreFamily):
        return fam, predict, used  # every parameter has its own raw score, fitted with the location
    Xn, yn, wn, on = hold if hold is not None else (X, y, w, off)
    fam = fam.fit_nuisance(yn, predict(Xn, on), wn)
    if engine in _REFIT_ENGINES and fam.location_needs_nuisance and fam.params:
        predict, used = fit(fam, X, y, w, off, hold, True)
        fam = fam.fit_nuisance(yn, predict(Xn, on), wn)
    return fam, predict, used


# ---------------------------------------------------------------------- scoring
def _score_fold(fam, y, raw, integer_footing, rng):
    """Per-row held-out nll, quantile residuals, PIT, interval indicators, P(y=1)."""
    if isinstance(y, IntervalTarget):
        return _score_censored_fold(fam, y, raw, rng)
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


def _score_censored_fold(fam, t, raw, rng):
    """_score_fold for censored targets: the censored nll, and residuals from the PIT randomized over
    each row's censoring interval (lossfam.diagnostics); a row counts as inside the central interval
    at a level when its PIT does (for an exact row, the same as y lying in the law's interval)."""
    nll = fam.nll(t, raw)
    z = diagnostics.quantile_residuals(fam, t, raw, seed=rng)
    from scipy.special import ndtr

    u = ndtr(z)
    inside = {level: (u >= (1 - level) / 2) & (u <= (1 + level) / 2) for level in PLOT_LEVELS}
    return nll, z, u, inside, None


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
    return fam.name + "(" + ", ".join(f"{k}={v}" if isinstance(v, (bool, np.bool_)) else f"{k}={v:g}"
                                      for k, v in fixed.items()) + ")"


def _constructible(cls):
    try:
        cls()
    except Exception:  # a user family whose parameters have no defaults
        return False
    return True


def spread_versions() -> dict:
    """{one-score family name: name of the registered several-score family that gives the same law
    a scale (or shape) of its own per row}, read from each several-score family's
    ``constant_scale()``."""
    out = {}
    for name in available(scores="several"):
        try:
            base = make_family(name).constant_scale()
        except (TypeError, ValueError):  # a registered class without usable defaults
            continue
        if base is not None and base.name not in out:
            out[base.name] = name
    return out


def _with_spread(families):
    """The candidates, each one-score family followed by its spread version (when one is registered
    and not already listed); a family object passes its shared fixed parameters (e.g. quantile) on."""
    table = spread_versions()
    listed = {f if isinstance(f, str) else f.name for f in families}
    out = []
    for spec in families:
        out.append(spec)
        name = spec if isinstance(spec, str) else spec.name
        twin = table.get(name)
        if twin is None or twin in listed:
            continue
        if isinstance(spec, str):
            out.append(twin)
        else:
            fam = make_family(twin)
            shared = {k: v for k, v in spec.params.items() if k in fam.params}
            out.append(fam.with_params(**shared) if shared else fam)
        listed.add(twin)
    return out


def _candidates(families, y, spread=False):
    """[(family or None, label, reason, given_as_object)] for the requested or default families."""
    if families is None:
        families = [n for n in available(scores="one") if n not in NOT_BY_DEFAULT]
    elif isinstance(families, str):
        families = [s.strip() for s in families.split(",") if s.strip()]
    if spread:
        families = _with_spread(list(families))
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


# ---------------------------------------------------------------------- inputs
def _features(X, n_rows_hint=None):
    """(features for the engines, feature names, kinds by name): a float array, or a DataFrame with categories."""
    if hasattr(X, "iloc") and hasattr(X, "dtypes") and hasattr(X, "columns"):
        return _frame_features(X)
    arr = np.asarray(X)
    if arr.dtype.kind in "OUS":
        import pandas as pd

        return _frame_features(pd.DataFrame(arr if arr.ndim == 2 else arr[:, None]))
    X = _checks.as_float_array(X, "X", "rank_families")
    if X.ndim == 1:
        X = X[:, None]
    names = [f"x{j}" for j in range(X.shape[1])] if X.ndim == 2 else []
    return X, names, {nm: "number" for nm in names}


def _frame_features(frame):
    import pandas as pd

    out, kinds = {}, {}
    for col in frame.columns:
        s = frame[col]
        name = str(col)
        kind = s.dtype.kind
        if isinstance(s.dtype, pd.CategoricalDtype):
            out[name] = s.cat.remove_unused_categories()
            kinds[name] = "category"
        elif kind == "M":
            if getattr(s.dt, "tz", None) is not None:
                s = s.dt.tz_convert("UTC").dt.tz_localize(None)
            days = (s - pd.Timestamp("1970-01-01")) / pd.Timedelta(days=1)
            out[name] = days.astype(float)
            kinds[name] = "date (days since 1970-01-01)"
        elif kind in "biuf":
            out[name] = s.astype(float)
            kinds[name] = "number"
        elif kind in "OSU" or isinstance(s.dtype, pd.StringDtype):
            bad = [i for i, v in enumerate(s.to_numpy()) if not (isinstance(v, str) or v is None
                                                               or (isinstance(v, float) and math.isnan(v)))]
            if bad:
                raise ValueError(f"rank_families: column {name!r} mixes text with other values, e.g. rows "
                                 f"{bad[:5]} (counted from 0); make it all text (a category) or all numbers")
            out[name] = s.astype("category")
            kinds[name] = "category"
        else:
            raise ValueError(f"rank_families: column {name!r} has dtype {s.dtype}, which is neither a number, "
                             "a category, text nor a date")
    if not out:
        raise ValueError("rank_families: X has no feature columns")
    feats = pd.DataFrame(out, index=range(len(frame)))
    if all(v == "number" or v.startswith("date") for v in kinds.values()):
        return feats.to_numpy(dtype=float), list(out), kinds
    return feats, list(out), kinds


def _rows(X, idx):
    return X.iloc[idx].reset_index(drop=True) if hasattr(X, "iloc") else X[idx]


def _offsets(offset, exposure, n):
    """The total raw-scale offset (offset + log exposure) or None."""
    total = None
    if offset is not None:
        total = _checks.as_float_array(offset, "offset", "rank_families").ravel()
        if total.size != n:
            raise ValueError(f"rank_families: offset has {total.size} values for {n} rows")
        _checks.REAL.check(total, "offset", "rank_families")
    if exposure is not None:
        e = _checks.as_float_array(exposure, "exposure", "rank_families").ravel()
        if e.size != n:
            raise ValueError(f"rank_families: exposure has {e.size} values for {n} rows")
        _checks.Domain("finite and > 0", lambda a: np.isfinite(a) & (a > 0)).check(e, "exposure", "rank_families")
        total = np.log(e) if total is None else total + np.log(e)
    return total


def _as_inputs(X, y, weight, engine):
    if isinstance(y, IntervalTarget):
        return _as_censored_inputs(X, y, weight, engine)
    y = _checks.as_float_array(y, "y", "rank_families")
    if y.ndim != 1:
        y = y.ravel() if y.ndim == 2 and 1 in y.shape else y
    if y.ndim != 1:
        raise ValueError(f"rank_families: y must be one-dimensional, got shape {y.shape}")
    _checks.REAL.check(y, "y", "rank_families")
    X, names, kinds = _features(X)
    if X.ndim != 2 or X.shape[0] != y.shape[0]:
        raise ValueError(f"rank_families: X must be 2-D with one row per target; X has shape {X.shape}, y has {y.shape[0]} rows")
    if X.shape[1] == 0:
        raise ValueError("rank_families: X has no feature columns")
    numeric = X if isinstance(X, np.ndarray) else X[[c for c in X.columns if kinds[c] != "category"]].to_numpy(float)
    if engine == "linear":
        _checks.REAL.check(numeric, "X (the linear engine needs finite features)", "rank_families")
    elif np.any(np.isinf(numeric)):
        _checks.Domain("finite or NaN (missing)", lambda a: ~np.isinf(a)).check(numeric, "X", "rank_families")
    w = _checks.check_weight(weight, y, "rank_families", need_positive_sum=True)
    w = np.ones_like(y) if w is None else np.ascontiguousarray(w, dtype=float)
    return X, y, w, names, kinds


def _as_censored_inputs(X, t, weight, engine):
    """_as_inputs for an IntervalTarget (censored rows): the same feature checks, weights per row."""
    X, names, kinds = _features(X)
    if X.ndim != 2 or X.shape[0] != t.size:
        raise ValueError(f"rank_families: X must be 2-D with one row per target; X has shape {X.shape}, "
                         f"the target has {t.size} rows")
    if X.shape[1] == 0:
        raise ValueError("rank_families: X has no feature columns")
    numeric = X if isinstance(X, np.ndarray) else X[[c for c in X.columns if kinds[c] != "category"]].to_numpy(float)
    if engine == "linear":
        _checks.REAL.check(numeric, "X (the linear engine needs finite features)", "rank_families")
    w = _checks.check_weight(weight, t.lower, "rank_families", need_positive_sum=True)
    w = np.ones(t.size) if w is None else np.ascontiguousarray(w, dtype=float)
    return X, t, w, names, kinds


def _engine_errors(engine):
    """Exceptions that mean "this family could not be fitted here" (listed as failed, not raised)."""
    # ArithmeticError: overflow, division by zero, floating-point traps; RuntimeError: a solver giving up
    errors = [ValueError, ArithmeticError, RuntimeError, np.linalg.LinAlgError]
    if engine == "lightgbm":
        import lightgbm as lgb

        errors.append(lgb.basic.LightGBMError)
    elif engine == "xgboost":
        import xgboost as xgb

        errors.append(xgb.core.XGBoostError)
    return tuple(errors)


def _split_hold(idx, seed, k):
    """Split a training fold's row indices into (grow, held back)."""
    rng = np.random.default_rng([seed, k, 7])
    perm = rng.permutation(idx)
    m = max(1, int(round(HOLD_BACK * perm.size)))
    return np.sort(perm[m:]), np.sort(perm[:m])


def _rank_detailed(X, y, families=None, engine="linear", folds=5, weight=None, seed=0, *,
                   offset=None, exposure=None, rounds=DEFAULT_ROUNDS, engine_params=None, threads=None,
                   progress=None, spread=False):
    """The machinery behind :func:`rank_families`: returns (rows, details by label, summary)."""
    if engine not in ENGINES:
        raise ValueError(f"rank_families: engine must be one of {', '.join(ENGINES)}, got {engine!r}")
    X, y, w, names, kinds = _as_inputs(X, y, weight, engine)
    n = y.size
    off = _offsets(offset, exposure, n)
    if isinstance(folds, bool) or not isinstance(folds, (int, np.integer)) or not 2 <= folds <= n:
        raise ValueError(f"rank_families: folds must be an integer between 2 and the number of rows ({n}), got {folds!r}")
    if isinstance(rounds, bool) or int(rounds) != rounds or int(rounds) < 1:
        raise ValueError(f"rank_families: rounds must be an integer >= 1, got {rounds!r}")
    options = dict(engine_params or {})
    if threads is not None:
        if isinstance(threads, bool) or int(threads) != threads or int(threads) < 1:
            raise ValueError(f"rank_families: threads must be an integer >= 1, got {threads!r}")
        if engine in THREAD_PARAM:
            options[THREAD_PARAM[engine]] = int(threads)
    boosting = engine in BOOSTING
    censored = isinstance(y, IntervalTarget)
    integer_footing = not censored and bool(np.all(np.floor(y) == y))
    say = progress if callable(progress) else (
        (lambda msg: print(f"[lossfam rank] {msg}", file=sys.stderr, flush=True)) if progress else (lambda msg: None))

    def fit(fam, Xa, ya, wa, oa, hold, keep_params):
        return _fit_engine(engine, fam, Xa, ya, wa, seed=seed, rounds=int(rounds), options=options,
                           keep_params=keep_params, offset=oa, hold=hold)

    def sub(a, idx):
        return None if a is None else a[idx]

    parts = _folds(n, int(folds), seed)
    fold_of = np.empty(n, dtype=int)
    for k, test in enumerate(parts):
        fold_of[test] = k
    failures = _engine_errors(engine)
    rows, details = [], {}
    cands = _candidates(families, y, spread)
    for ci, (fam0, na_label, reason, obj) in enumerate(cands):
        if reason is not None:
            rows.append({"family": na_label, "status": STATUS_NA, "note": reason})
            continue
        nll_rows = np.empty(n)
        z_all, u_all, mean_all = np.empty(n), np.empty(n), np.empty(n)
        inside = {lv: np.zeros(n, dtype=bool) for lv in PLOT_LEVELS}
        width90 = np.empty(n)
        p1 = np.empty(n) if not censored and np.all((y == 0) | (y == 1)) else None
        fold_means, params, used, penalty_notes = [], [], [], []
        label = fam0.name
        try:
            for k, test in enumerate(parts):
                say(f"{engine}: {fam0.name} fold {k + 1}/{len(parts)} ({ci + 1}/{len(cands)} families)")
                train = np.setdiff1d(np.arange(n), test)
                hold = None
                if boosting:
                    train, back = _split_hold(train, seed, k)
                    hold = (_rows(X, back), y[back], w[back], sub(off, back))
                fam, predict, k_used = _fit_family(fit, engine, fam0, _rows(X, train), y[train], w[train],
                                                   sub(off, train), hold)
                penalty_notes.append(getattr(predict, "note", ""))
                raw = predict(_rows(X, test), sub(off, test))
                if not np.all(np.isfinite(raw)):
                    raise ValueError(f"the model's raw scores on held-out fold {k + 1} are not all finite")
                rng = np.random.default_rng([seed, k])
                s_nll, s_z, s_u, s_in, s_p1 = _score_fold(fam, y[test], raw, integer_footing, rng)
                if not np.all(np.isfinite(s_nll)):
                    raise ValueError(f"the held-out nll on fold {k + 1} is not finite for "
                                     f"{int(np.sum(~np.isfinite(s_nll)))} row(s)")
                nll_rows[test], z_all[test], u_all[test] = s_nll, s_z, s_u
                law = fam.distribution(raw)
                mean_all[test] = np.asarray(law.mean(), dtype=float)
                lo90, hi90 = law.interval(CALIBRATION_LEVEL)
                width90[test] = np.broadcast_to(np.asarray(hi90, dtype=float) - np.asarray(lo90, dtype=float),
                                                (test.size,))
                for lv in PLOT_LEVELS:
                    inside[lv][test] = s_in[lv]
                if p1 is not None:
                    p1[test] = s_p1
                fold_means.append(_wmean(s_nll, w[test]))
                params.append(fam.params)
                if k_used is not None:
                    used.append(k_used)
                if k == 0:
                    label = _label(fam0, obj, fam.params)
                    while label in details:
                        label += "'"  # the same family listed twice
        except failures as exc:
            msg = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
            rows.append({"family": _label(fam0, obj, None), "status": STATUS_FAILED, "note": msg})
            continue
        kf = len(fold_means)
        se = float(np.std(fold_means, ddof=1) / math.sqrt(kf))
        # numbers: the mean over folds; switches (bool fields such as student_t's estimate_df) stay bools
        mean_params = {key: (params[0][key] if isinstance(params[0][key], (bool, np.bool_))
                             else float(np.mean([p[key] for p in params]))) for key in params[0]}
        scored = SCORED_MASS if fam0.discrete else (SCORED_INTERVAL if integer_footing else SCORED_DENSITY)
        if censored:
            scored = SCORED_CENSORED
        notes = []
        if scored == SCORED_INTERVAL:
            notes.append("continuous law scored on integer targets by the probability of the unit interval around y")
        several = isinstance(fam0, SeveralScoreFamily)
        link_name = fam0.links[0].name if several else fam0.link_function.name
        if several:
            notes.append(f"{', '.join(fam0.score_names[1:])} modelled per row (a raw score of its own)")
        if exposure is not None and link_name != "log":
            notes.append(f"log(exposure) shifts this family's raw score on its {link_name} "
                         "link; exposure scales the mean only under a log link")
        penalised = [t for t in penalty_notes if t]
        if penalised:
            notes.insert(0, f"{len(penalised)} of {len(penalty_notes)} folds: {penalised[0]}")
        note = "; ".join(notes)
        lo_u, hi_u = (1 - CALIBRATION_LEVEL) / 2, (1 + CALIBRATION_LEVEL) / 2
        discrete_like = fam0.discrete or integer_footing
        rows.append({
            "family": label,
            "status": STATUS_OK,
            "nll_per_row": _wmean(nll_rows, w),
            "nll_uncertainty": se,
            "calibration90": _wmean((u_all >= lo_u) & (u_all <= hi_u), w),
            "plain_interval90": _wmean(inside[CALIBRATION_LEVEL], w) if discrete_like else None,
            "residual_ks": diagnostics.ks_statistic(z_all),
            "rounds_used": float(np.mean(used)) if used else None,
            "nuisance": mean_params,
            "scored_by": scored,
            "note": note,
        })
        details[label] = {
            "nll_rows": nll_rows,
            "residuals": z_all,
            "pit": u_all,
            "mean": mean_all,
            "fold": fold_of,
            "coverage": {
                "level": np.asarray(PLOT_LEVELS),
                "observed": np.asarray([_wmean(inside[lv], w) for lv in PLOT_LEVELS]),
                "count": np.full(len(PLOT_LEVELS), n),
            },
            "p1": p1,
            # per row: the predicted central 90% interval's width (the spread used to group rows in
            # the coverage-by-spread plot) and whether the target lies in that interval
            "width90": width90,
            "inside90": inside[CALIBRATION_LEVEL],
            "several": isinstance(fam0, SeveralScoreFamily),
        }
    summary = {
        "rows": int(n), "features": names, "feature_kinds": kinds, "folds": int(folds), "engine": engine,
        "seed": seed, "max_rounds": int(rounds) if boosting else None,
        "offset": "given" if offset is not None else None, "exposure": "given" if exposure is not None else None,
    }
    return _finish(rows, details, y, w), details, summary


def _finish(rows, details, y, w):
    ok = sorted((r for r in rows if r["status"] == STATUS_OK), key=lambda r: r["nll_per_row"])
    rest = [r for r in rows if r["status"] == STATUS_FAILED] + [r for r in rows if r["status"] == STATUS_NA]
    out = []
    best = details[ok[0]["family"]]["nll_rows"] if ok else None
    for place, r in enumerate(ok, start=1):
        d = details[r["family"]]["nll_rows"] - best
        # paired over rows: the distance's standard error is that of the mean row-wise difference;
        # the best row has no distance to be uncertain about (None, null in JSON)
        unc = float(np.sqrt(np.cov(d, aweights=w)) / math.sqrt(d.size)) if place > 1 else None
        out.append(_row(place=place, behind_best=_wmean(d, w), behind_best_uncertainty=unc, **r))
    for r in rest:
        out.append(_row(place=None, **r))
    return out


def _row(**kw):
    return {c: kw.get(c) for c in COLUMNS} | {"note": kw.get("note") or ""}


class Ranking(list):
    """The rows of :func:`rank_families` (a list of dicts) that render as an HTML table in notebooks."""

    notes = ()

    def _repr_html_(self):
        from .report import table_html

        return table_html(self, notes=self.notes)


def _table_notes(rows):
    notes = []
    if any(r["scored_by"] == SCORED_INTERVAL for r in rows):
        notes.append("integer-valued targets: continuous families are scored by "
                     "-log(F(y+1/2) - F(y-1/2)), the probability of the unit interval around y")
    return notes


def rank_families(X, y, families=None, engine="linear", folds=5, weight=None, seed=0, *,
                  offset=None, exposure=None, rounds=DEFAULT_ROUNDS, engine_params=None, threads=None,
                  progress=False, as_frame=None, spread=False):
    """Put noise models in order by cross-validated held-out negative log-likelihood.

    Parameters
    ----------
    X : array-like (n, p) or pandas DataFrame
        Features (NaN allowed as missing for the boosting engines).  In a
        DataFrame, text and categorical columns are categories and datetime
        columns become days since 1970-01-01 (module docstring).
    y : array-like (n,) or lossfam.censoring.IntervalTarget
        Targets.  Integer-valued targets put continuous families on the
        interval-probability footing (module docstring).  An IntervalTarget
        (censored and interval rows) ranks the families that have a censored
        likelihood (the others are "not applicable"), scored by the censored
        nll, with residuals from the PIT randomized over each censoring interval.
    families : list of names or family objects, optional
        Default: every registered family with one raw score per row that is applicable to y,
        except asymmetric_laplace.  Families with several raw scores per row (a scale of their
        own per row, e.g. ``gaussian_spread``) may be listed too.
    engine : {"linear", "lightgbm", "xgboost"}
        "linear": ``lossfam.sklearn.LikelihoodRegressor``; the others boost
        trees with ``lossfam.lightgbm.train`` / ``lossfam.xgboost.train``.
    folds : int
        Number of cross-validation folds (rows shuffled with ``seed``).
    weight : array-like (n,), optional
        Row weights, used in fitting and in every mean reported.
    seed : int
        Seeds the folds, the held-back slices, the engines and the randomized residuals.
    offset : array-like (n,), optional
        Raw-scale offset added to every raw score.
    exposure : array-like (n,), optional
        Positive exposure; its log is added to the offset (log-link means
        become rate x exposure).
    rounds : int
        Maximum boosting rounds; each family stops early on its own held-back
        nll (module docstring).  Boosting engines only.
    engine_params : dict, optional
        Extra settings for the engine (estimator keyword arguments for
        "linear", booster parameters for the others).
    threads : int, optional
        Threads per boosting engine (default 2).
    progress : bool or callable
        Report progress (on stderr when True, or to the callable).
    spread : bool
        Add, after each candidate, its spread version where one is registered (the same law with
        its scale or shape modelled per row: ``spread_versions()``), so both compete on the same
        folds and the table says whether a varying scale is worth modelling.  Default False.
    as_frame : bool, optional
        Return a pandas DataFrame (default when pandas is installed) or a
        :class:`Ranking` (a list of dicts that renders as HTML in notebooks).

    Returns
    -------
    Table, best first, one row per family, columns :data:`COLUMNS`:

    * ``place``: 1 for the best family (None when not scored);
    * ``family``;
    * ``nll_per_row``: mean held-out nll per row (nats), lower is better;
    * ``nll_uncertainty``: its standard error over folds;
    * ``behind_best``: nll_per_row minus the best family's;
    * ``behind_best_uncertainty``: that distance's standard error, paired over
      rows (None for the best row);
    * ``calibration90``: fraction of held-out PIT values in [0.05, 0.95]
      (0.90 when the law is right; randomized PIT for discrete laws);
    * ``plain_interval90``: coverage of the central 90% interval, for discrete
      laws and integer footings only (over-covers by construction);
    * ``residual_ks``: Kolmogorov-Smirnov distance of the held-out quantile
      residuals from N(0, 1) (unweighted, all rows);
    * ``rounds_used``: boosting rounds kept after early stopping (mean over folds);
    * ``nuisance``: fitted nuisance parameters (mean over folds);
    * ``scored_by``: log density, log probability, or log probability of the
      unit interval around y;
    * ``status`` ("ok", "not applicable", "failed") and ``note`` (the reason,
      or the footing).
    """
    rows, _, _ = _rank_detailed(X, y, families, engine, folds, weight, seed, offset=offset, exposure=exposure,
                                rounds=rounds, engine_params=engine_params, threads=threads, progress=progress,
                                spread=spread)
    notes = _table_notes(rows)
    if as_frame is False:
        out = Ranking(rows)
        out.notes = tuple(notes)
        return out
    try:
        import pandas as pd
    except ImportError:
        if as_frame:
            raise ImportError('rank_families(as_frame=True) needs pandas: pip install "lossfam[all]"') from None
        out = Ranking(rows)
        out.notes = tuple(notes)
        return out
    frame = pd.DataFrame(rows, columns=list(COLUMNS))
    frame["place"] = frame["place"].astype("Int64")
    if notes:
        frame.attrs["note"] = notes[0]
    return frame
