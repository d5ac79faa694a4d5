r"""LightGBM adapter: a lossfam family as LightGBM objective, metric and trained model.

Three entry points, from thin to complete:

``objective(family)``
    One callable usable as ``params["objective"]`` in ``lightgbm.train``
    (called as ``f(preds, train_data)``) and as ``objective=`` of
    ``LGBMRegressor`` / ``DaskLGBMRegressor`` (called as
    ``f(y_true, y_pred, weight, group)``).  It returns the family's gradient
    and Hessian in the raw score, times the row weights, expressed in the
    family's dispersion units (below), with the log-link step guard.
``metric(family, kind="nll")``
    The weighted mean nll (or unit deviance) as a LightGBM metric for both
    call styles, reported as ``"<family>_nll"`` / ``"<family>_deviance"``;
    lower is better, so it drives early stopping.
``train(family, params, data, ...)``
    Fits the baseline, sets the starting scores (baseline + offset) on the
    training and validation sets, trains, fits the nuisance parameters on the
    training data and returns a :class:`TrainedModel` (``predict``,
    ``predict_raw``, ``distribution``, ``save``); :func:`load` restores it.

lightgbm is imported on first use; ``import lossfam`` never imports it.

Dispersion units
----------------
The objective multiplies gradient and Hessian by one constant per family: the
squared ``scale`` when the family has one (gaussian, laplace,
asymmetric_laplace, huber), ``1 / shape`` when it has a ``shape`` (gamma), 1
otherwise.  A Newton step ``-sum g / sum h`` does not change, but LightGBM's
absolute thresholds (``min_sum_hessian_in_leaf``, ``lambda_l2``,
``min_gain_to_split``) then mean what they mean for the built-in objectives:
gaussian gives exactly the built-in ``regression`` gradients ``raw - y`` and
Hessian 1 whatever the scale, gamma exactly the built-in ``gamma`` ones.

Step guard for log links (``max_row_step``)
-------------------------------------------
Under a log link the Newton step of one row, ``-g / h``, is ``y / mu - 1``
(poisson) or ``1 - mu / y`` (gamma): unbounded where the Hessian ``mu`` (or
``y / mu``) is tiny, e.g. a count far above a near-zero mean.  A leaf of such
rows jumps by hundreds of log units and the next rounds crawl back.  The
guard raises each row's Hessian to ``|g| / max_row_step`` where it is
smaller::

    h_guarded = max(h, |g| / max_row_step)

so no row asks for a raw-scale step larger than ``max_row_step`` and, since
``|sum g| <= sum |g|``, no leaf moves by more than ``max_row_step`` (before
the learning rate).  Where the step is already small the Hessian is exact.
The gradient is untouched, so the fixed point of boosting (sum of gradients
zero in each leaf) is unchanged; only the path is damped.  Default
``max_row_step="auto"``: 0.5 for log-link families (one round moves a mean by
at most a factor e^(0.5 * learning_rate)), off otherwise; pass a number to set
it for any family, ``None`` to switch it off.  (LightGBM's built-in poisson
instead multiplies every Hessian by e^0.7, which halves every step and still
allows unbounded ones.)

Families without a positive Hessian (laplace, asymmetric_laplace, huber)
-------------------------------------------------------------------------
The core returns an MM/IRLS surrogate Hessian for them (see
``lossfam.families.laplace``).  ``objective()`` uses that surrogate, in
dispersion units, and ``train()`` by default fits the nuisance parameters at
the baseline first (``prefit_params=True``) so the surrogate's floor is in the
data's units.  For huber this is enough: the surrogate is exact inside the
quadratic core and gives outlying rows the IRLS weight, and it reaches the
built-in ``huber`` accuracy.  For the median and quantiles it is not: one
IRLS step moves a leaf only a fraction of the way to the leaf's
median/quantile, so at equal rounds the fit lags the built-in by a few
percent.  ``train()`` therefore re-fits leaves (``leaf_refit=True``, laplace
and asymmetric_laplace):

1. the tree is grown on the (sub)gradient in scale units with a unit Hessian
   (times the row weight), the recipe of the built-in ``regression_l1`` /
   ``quantile``;
2. each leaf value is replaced by ``learning_rate`` times the weighted
   tau-quantile (tau = 0.5 for laplace) of the residuals ``y - raw`` of the
   training rows in that leaf, via ``Booster.set_leaf_output``.  The weighted
   quantile minimises the family's nll over the leaf's constant, so each
   leaf takes the exact minimising step rather than one IRLS iteration.

LightGBM's own training and validation score caches do not see edited leaves,
so ``train()`` keeps its own raw scores for the training set and every
validation set (updated from each new tree's leaf indices,
``predict(pred_leaf=True)`` on the in-memory feature data).  Its objective
and metrics read those scores; the refit of tree t happens at the start of
round t + 1 (a before-iteration callback) or when the metric first asks.
Leaf refit therefore needs the feature data in memory (not a file path) and
refuses LightGBM's built-in metrics (they would see the unedited scores).
Each refit uses all training rows (with bagging, the built-in uses the
in-bag rows only).

Built-in objective where it is exact
------------------------------------
In dispersion units the gaussian gradient and Hessian are exactly LightGBM's
``regression`` ones (raw - y, 1).  For gaussian ``train``
(``builtin_if_exact=True``, the default) therefore lets LightGBM compute them
in C++, and the engine, knowing the Hessian is constant, also skips summing
it.  The baseline is still the ``init_score`` (which also switches off
LightGBM's own boost-from-average), so trees, predictions, metrics and saved
files are those of the Python objective (tested to 1e-6).  Other families
keep the Python objective: bernoulli's gradients equal ``binary``'s, but
LightGBM hands a metric the probability instead of the raw score for built-in
objectives, and logit(expit(raw)) loses the raw score where p rounds to 1;
poisson and gamma differ through the step guard.  ``builtin_if_exact=False``
forces the Python objective.

Offsets
-------
An offset is a known per-row term on the raw scale (e.g. log exposure of
claim counts).  Pass ``offset=`` for the training Dataset and
``valid_offsets=[...]`` (one entry per validation set, ``None`` for none) to
``train``; the baseline is fitted given the training offset, each Dataset's
``init_score`` is set to ``baseline + offset`` for the duration of training,
and ``predict(X, offset=...)`` adds it back.  Datasets that already carry an
``init_score`` are refused (pass it as an offset instead), so nothing is
silently added twice.  With the bare ``objective()``, put ``baseline +
offset`` in ``init_score`` yourself: the objective works on whatever raw
score LightGBM hands it.
"""
from __future__ import annotations

import math
import weakref

import numpy as np

from . import _checks
from ._modelfile import read_model_file, write_model_file
from ._scoring import check_metric_kind, per_row_loss
from .families import AsymmetricLaplace, Gaussian, Laplace
from .links import LOG
from .registry import family as make_family

__all__ = ["objective", "metric", "train", "load", "TrainedModel"]

_INSTALL = 'lossfam.lightgbm needs lightgbm: install it with pip install "lossfam[lightgbm]"'
_ENGINE = "lightgbm"
_DEFAULT_LOG_STEP = 0.5
_LR_NAMES = ("learning_rate", "shrinkage_rate", "eta")
_THREAD_NAMES = ("num_threads", "num_thread", "nthread", "nthreads", "n_jobs")


def _lgb():
    """Import lightgbm on first use, with an install hint when it is missing."""
    try:
        import lightgbm
    except ImportError as exc:
        raise ImportError(_INSTALL) from exc
    return lightgbm


def _is_dataset(obj) -> bool:
    lgb = _lgb()
    return isinstance(obj, lgb.Dataset)


def _dispersion_unit(fam) -> float:
    """The constant that brings gradient and Hessian to dispersion units (see module doc)."""
    p = fam.params
    if "scale" in p:
        return float(p["scale"]) ** 2
    if "shape" in p:
        return 1.0 / float(p["shape"])
    return 1.0


def _resolve_step(fam, max_row_step):
    if max_row_step == "auto":
        return _DEFAULT_LOG_STEP if fam.link_function is LOG else None
    if max_row_step is None:
        return None
    v = float(max_row_step)
    if not (v > 0 and math.isfinite(v)):
        raise ValueError(f"max_row_step must be a positive finite number, 'auto' or None; got {max_row_step!r}")
    return v


def _native_params(fam, step):
    """LightGBM built-in objective settings that compute exactly the family's gradient and Hessian
    (in dispersion units), or None.  See "Built-in objective where it is exact" in the module doc."""
    if type(fam) is Gaussian and step is None:  # exact class: a user subclass may change the loss
        return {"objective": "regression"}
    return None


def _refit_level(fam):
    """The quantile a leaf refit targets, or None when the family takes no refit."""
    if isinstance(fam, AsymmetricLaplace):
        return fam.quantile
    if isinstance(fam, Laplace):
        return 0.5
    return None


class _TargetCache:
    """Validated float64 copies of a label (and weight) array, checked once.

    The engine hands the objective the same label array every round; this
    keeps a weak reference to it and re-validates only when it changes.
    Nothing here is needed for correctness: a deep or pickled copy starts empty.
    """

    def __init__(self):
        self._ref = None
        self._wref = None
        self._y = None
        self._w = None
        self._buf = None

    def get(self, fam, y, w, *, for_nll):
        same = self._ref is not None and self._ref() is y
        if same and w is not None and (self._wref is None or self._wref() is not w):
            same = False
        if same and w is None and self._w is not None:
            same = False
        if not same:
            y64 = fam.check_target(y, for_nll=for_nll)
            w64 = None if w is None else _checks.check_weight(w, y64, fam.name)
            try:
                self._ref = weakref.ref(y)
                self._wref = None if w is None else weakref.ref(w)
            except TypeError:  # lists and the like cannot be weakly referenced: no caching
                return y64, w64
            self._y, self._w = y64, w64
        return self._y, self._w

    def scratch(self, n):
        """A float64 work buffer of length n, reused across rounds."""
        buf = getattr(self, "_buf", None)
        if buf is None or buf.size != n:
            buf = self._buf = np.empty(n)
        return buf

    def __deepcopy__(self, memo):
        return _TargetCache()

    def __getstate__(self):
        return {}

    def __setstate__(self, state):
        self.__init__()


def _as_array_or_none(x):
    if x is None:
        return None
    return np.asarray(x, dtype=np.float64)


class _Objective:
    """The family's gradient and Hessian as a LightGBM custom objective (see ``objective``)."""

    def __init__(self, fam, max_row_step):
        self.family = fam
        self.max_row_step = max_row_step
        self.unit = _dispersion_unit(fam)
        self._cache = _TargetCache()

    def gradients(self, y, raw, w):
        """(g, h) for validated float64 ``y`` and raw scores, weighted, in dispersion units, guarded."""
        with np.errstate(over="ignore"):
            g, h = self.family._grad_hess(y, raw)
        if self.unit != 1.0:
            g *= self.unit
            h *= self.unit
        if self.max_row_step is not None:
            lim = self._cache.scratch(g.size)
            np.abs(g, out=lim)
            lim *= 1.0 / self.max_row_step
            np.maximum(h, lim, out=h)
        if w is not None:
            g *= w
            h *= w
        return g, h

    def __call__(self, a, b, c=None, d=None):
        if _is_dataset(b):  # lightgbm.train: f(preds, train_data)
            raw, data = a, b
            y, w = data.get_label(), data.get_weight()
        else:  # scikit-learn API: f(y_true, y_pred, weight, group)
            y, raw, w = a, b, c
        y64, w64 = self._cache.get(self.family, y, w, for_nll=False)
        raw = np.asarray(raw, dtype=np.float64)
        if raw.shape != y64.shape:
            raise ValueError(
                f"{self.family.name} objective: got {raw.size} raw scores for {y64.size} targets "
                "(multiclass or multi-output models are not supported)"
            )
        return self.gradients(y64, raw, w64)

    def __repr__(self):
        return f"lossfam.lightgbm.objective({self.family!r}, max_row_step={self.max_row_step!r})"


def objective(family, *, max_row_step="auto"):
    """The family's negative log-likelihood as a LightGBM custom objective.

    Parameters
    ----------
    family : str or Family
        A family name (``lossfam.available()``) or object.
    max_row_step : "auto", float or None
        The log-link step guard (module docstring): each row's Hessian is
        raised to ``|g| / max_row_step``.  "auto": 0.5 for log-link families,
        off otherwise.

    Returns
    -------
    callable
        ``f(preds, train_data)`` for ``lightgbm.train`` and
        ``f(y_true, y_pred, weight, group)`` for the scikit-learn and Dask
        estimators; returns ``(grad, hess)`` (weighted).  It holds no state
        that matters across calls, so LightGBM's deep copy of ``params`` and
        Dask's pickling are harmless.  LightGBM starts from raw score 0 unless
        the Dataset has an ``init_score``: pass ``family.baseline(y, w)`` there
        (``train`` does this for you).
    """
    fam = make_family(family)
    return _Objective(fam, _resolve_step(fam, max_row_step))


class _Metric:
    """Weighted mean nll or unit deviance as a LightGBM metric (see ``metric``)."""

    def __init__(self, fam, kind):
        self.family = fam
        self.kind = check_metric_kind(kind)
        self.name = f"{fam.name}_{kind}"
        self._cache = _TargetCache()

    def value(self, y, raw, w):
        """Weighted mean of the per-row nll (or deviance) for validated ``y``."""
        per_row = per_row_loss(self.family, self.kind, y, raw)
        if w is None:
            return float(np.mean(per_row))
        return float(np.dot(w, per_row) / np.sum(w))

    def __call__(self, a, b, c=None):
        if _is_dataset(b):  # lightgbm.train: feval(preds, eval_data)
            raw, data = a, b
            y, w = data.get_label(), data.get_weight()
        else:  # scikit-learn API: eval_metric(y_true, y_pred, weight)
            y, raw, w = a, b, c
        y64, w64 = self._cache.get(self.family, y, w, for_nll=self.kind == "nll")
        raw = np.asarray(raw, dtype=np.float64)
        if raw.shape != y64.shape:
            raise ValueError(f"{self.name}: got {raw.size} raw scores for {y64.size} targets")
        return self.name, self.value(y64, raw, w64), False

    def __repr__(self):
        return f"lossfam.lightgbm.metric({self.family!r}, kind={self.kind!r})"


def metric(family, kind="nll"):
    """The family's weighted mean nll (``kind="nll"``) or unit deviance as a LightGBM metric.

    Works as ``feval=`` in ``lightgbm.train`` (``f(preds, eval_data)``) and as
    ``eval_metric=`` in the scikit-learn estimators (``f(y_true, y_pred,
    weight)``); returns ``(name, value, False)`` with name
    ``"<family>_nll"`` or ``"<family>_deviance"``.  ``preds`` must be raw
    scores including the starting score, as LightGBM supplies under a custom
    objective.  The nll uses the family's nuisance parameters as given.
    """
    return _Metric(make_family(family), kind)


# --------------------------------------------------------------------------- model
class TrainedModel:
    """A LightGBM booster together with its family, baseline and fitted nuisance parameters.

    Attributes
    ----------
    family : Family
        The family the booster was trained with.
    fitted_family : Family
        ``family`` with its nuisance parameters fitted on the training data
        (used by :meth:`distribution`).
    baseline : float
        The starting raw score, added to the booster's raw output.
    booster : lightgbm.Booster
    """

    def __init__(self, booster, family, baseline, fitted_family=None):
        self.booster = booster
        self.family = family
        self.baseline = float(baseline)
        self.fitted_family = family if fitted_family is None else fitted_family

    def predict_raw(self, X, offset=None):
        """Raw scores: booster output + baseline (+ offset, one per row)."""
        raw = np.asarray(self.booster.predict(X, raw_score=True), dtype=np.float64)
        raw += self.baseline
        if offset is not None:
            off = _checks.check_raw(offset, raw, f"{self.family.name} offset")
            raw += off
        return raw

    def predict(self, X, offset=None):
        """Predictions on the response scale: the inverse link of :meth:`predict_raw`."""
        return self.family.link_function.inverse(self.predict_raw(X, offset))

    def distribution(self, X, offset=None):
        """The predictive law per row, nuisance parameters fitted on the training data."""
        return self.fitted_family.distribution(self.predict_raw(X, offset))

    def save(self, path, key=None):
        """Write the model (LightGBM model text + family + baseline) to ``path`` (JSON, no pickle).

        The file is sealed with a checksum, or signed with HMAC-SHA-256 when ``key`` is given
        (see ``lossfam._modelfile``); the save is atomic.
        """
        text = self.booster.model_to_string()
        extra = {
            "fitted_params": self.fitted_family.params,
            "num_trees": int(self.booster.num_trees()),
        }
        write_model_file(path, engine=_ENGINE, family=self.family, baseline=self.baseline, model=text, extra=extra,
                         key=key)

    def __repr__(self):
        return (f"TrainedModel(family={self.family!r}, baseline={self.baseline!r}, "
                f"trees={self.booster.num_trees()})")


def load(path, key=None) -> TrainedModel:
    """Restore a model written by :meth:`TrainedModel.save` (``key``: the key it was signed with).

    Raises ValueError for files that are truncated, corrupted, edited, signed
    with another key, written by another engine's adapter, or not lossfam
    model files at all.  Load only files from sources you trust.
    """
    lgb = _lgb()
    doc = read_model_file(path, engine=_ENGINE, key=key)
    fam = doc["family"]
    baseline = doc["baseline"]
    if not isinstance(baseline, (int, float)) or not math.isfinite(baseline):
        raise ValueError(f"{path}: the baseline {baseline!r} is not a finite number")
    extra = doc["extra"]
    try:
        fitted = fam.with_params(**extra.get("fitted_params", {}))
    except (TypeError, ValueError) as exc:
        raise ValueError(f"{path}: the fitted parameters are malformed ({exc})") from None
    try:
        booster = lgb.Booster(model_str=doc["model"])
    except lgb.basic.LightGBMError as exc:
        raise ValueError(f"{path}: the LightGBM model text is corrupted ({exc})") from None
    want = extra.get("num_trees")
    if want is not None and booster.num_trees() != want:
        raise ValueError(f"{path}: the LightGBM model has {booster.num_trees()} trees, the file says {want}; "
                         "was it truncated or edited?")
    return TrainedModel(booster, fam, baseline, fitted)


# --------------------------------------------------------------------------- train
def _field(data, name):
    """A Dataset field without forcing construction (None when absent)."""
    if data._handle is None:
        return getattr(data, name)
    return getattr(data, f"get_{name}")()


def _label_weight(data, fam, what):
    y = _field(data, "label")
    if y is None and (isinstance(data.data, (str, bytes)) or hasattr(data.data, "__fspath__")):
        data.construct()  # a Dataset file: its label is inside; construction reads it
        y = data.get_label()
    if y is None:
        raise ValueError(f"{what}: the Dataset has no label; build it with lightgbm.Dataset(X, label=y)")
    y = fam.check_target(np.asarray(y, dtype=np.float64).ravel(), for_nll=False)
    _checks.check_nonempty(y, fam.name)
    w = _as_array_or_none(_field(data, "weight"))
    w = None if w is None else _checks.check_weight(w.ravel(), y, fam.name, need_positive_sum=True)
    return y, w


def _check_no_user_init_score(data, what):
    if _field(data, "init_score") is not None:
        raise ValueError(
            f"{what} already has an init_score; lossfam.lightgbm.train sets the starting score "
            "itself (baseline + offset): pass a per-row raw-scale term as offset=/valid_offsets= instead"
        )


def _clear_start(data):
    """Remove the starting scores lossfam set (also on the constructed C-side Dataset)."""
    if data._handle is not None:
        data.set_field("init_score", None)
    data.init_score = None


def _learning_rate(params) -> float:
    for k in _LR_NAMES:
        if k in params:
            return float(params[k])
    return 0.1


def _grouped_quantile(leaf, r, w, q, n_leaves):
    """Per leaf, the smallest residual whose cumulative weight reaches q * leaf total.

    Returns (values, has_rows); the rule is numpy's "inverted_cdf", the one
    lossfam.families.laplace.weighted_quantile uses.
    """
    order = np.lexsort((r, leaf))
    ls = leaf[order]
    rs = r[order]
    cw = np.cumsum(w[order]) if w is not None else np.arange(1, r.size + 1, dtype=np.float64)
    ids = np.arange(n_leaves)
    starts = np.searchsorted(ls, ids, side="left")
    ends = np.searchsorted(ls, ids, side="right")
    has = ends > starts
    before = np.where(starts > 0, cw[np.maximum(starts - 1, 0)], 0.0)
    total = np.where(has, cw[np.maximum(ends - 1, 0)] - before, 0.0)
    has &= total > 0
    target = before + q * total
    idx = np.searchsorted(cw, target, side="left")
    idx = np.clip(idx, starts, np.maximum(ends - 1, starts))
    idx = np.minimum(idx, r.size - 1)
    return rs[idx], has


class _LeafRefit:
    """Leaf refit to the weighted residual quantile, with lossfam's own score tracking.

    ``raw[k]`` are the current raw scores of tracked set k (0 = training set);
    ``X[k]`` its in-memory features.  ``catch_up(booster)`` refits every tree
    not refitted yet and adds its (edited) output to every tracked score.
    """

    def __init__(self, fam, q, lr, y, w, X_train, start_train):
        self.family = fam
        self.q = q
        self.lr = lr
        self.y = y
        self.w = w
        self.X = [X_train]
        self.raw = [start_train.copy()]
        self.datasets = []
        self.booster = None
        self.done = 0
        self.scale = float(fam.params.get("scale", 1.0))
        self.predict_kw = {}  # e.g. num_threads, so leaf lookups use the training's thread count

    def track(self, data, X, start):
        self.datasets.append(data)
        self.X.append(X)
        self.raw.append(start.copy())

    def raw_for(self, data):
        for k, d in enumerate(self.datasets):
            if d is data:
                return self.raw[k + 1]
        return None

    def catch_up(self, booster=None):
        if booster is not None:
            self.booster = booster
        b = self.booster
        if b is None:
            return
        while self.done < b.num_trees():
            t = self.done
            leaves = [np.asarray(b.predict(X, pred_leaf=True, start_iteration=t, num_iteration=1,
                                           **self.predict_kw)).astype(np.int64).ravel()
                      for X in self.X]
            n_leaves = int(leaves[0].max()) + 1
            for lv in leaves[1:]:
                if lv.size:
                    n_leaves = max(n_leaves, int(lv.max()) + 1)
            resid = self.y - self.raw[0]
            q, has = _grouped_quantile(leaves[0], resid, self.w, self.q, n_leaves)
            values = np.array([b.get_leaf_output(t, j) for j in range(n_leaves)])
            values[has] = self.lr * q[has]
            for j in np.flatnonzero(has):
                b.set_leaf_output(t, int(j), float(values[j]))
            for k, lv in enumerate(leaves):
                self.raw[k] += values[lv]
            self.done += 1

    def grow_gradients(self):
        """Subgradient in scale units, unit Hessian (times weights): the built-in growth recipe."""
        with np.errstate(over="ignore"):
            g, _ = self.family._grad_hess(self.y, self.raw[0])
        g *= self.scale
        if self.w is not None:
            g *= self.w
            h = self.w.copy()
        else:
            h = np.ones_like(g)
        return g, h


def _feature_data(data, what):
    X = data.data
    if X is None or isinstance(X, (str, bytes)) or hasattr(X, "__fspath__"):
        raise ValueError(
            f"{what}: leaf refit needs the feature data in memory (Dataset built from an array or "
            "DataFrame, not a file, and not yet freed); pass leaf_refit=False to use the surrogate Hessian"
        )
    return X


def train(family, params, data, num_boost_round=100, *, offset=None, valid_offsets=None,
          max_row_step="auto", prefit_params=True, leaf_refit=True, builtin_if_exact=True,
          metric_kind="nll", **engine_kwargs) -> TrainedModel:
    """Train a LightGBM model with the family's nll as the loss.

    Parameters
    ----------
    family : str or Family
    params : dict
        LightGBM parameters; must not contain "objective" (the family is the
        objective).  "metric" defaults to "None" (lossfam's metric is added).
    data : lightgbm.Dataset
        Training data with its label (and weights); no init_score.
    num_boost_round : int
    offset : array of shape (n,), optional
        Per-row raw-scale offset of the training rows (e.g. log exposure).
    valid_offsets : list, optional
        One offset array (or None) per entry of ``valid_sets``.
    max_row_step : "auto", float or None
        The log-link step guard (module docstring).
    prefit_params : bool
        Fit the nuisance parameters at the baseline before training, so the
        objective works in the data's units (matters for huber's threshold
        and the surrogate's floor).  With False the family's parameters are
        used as given.
    leaf_refit : bool
        For laplace and asymmetric_laplace: refit each leaf to the weighted
        residual median / quantile (module docstring).  Ignored otherwise.
    builtin_if_exact : bool
        Let LightGBM's built-in ``regression`` objective compute the
        gaussian gradients (exactly the family's, in dispersion units): same
        trees, predictions, metrics, baseline and saved file, only faster.
        False: always the Python objective.
    metric_kind : "nll" or "deviance"
        The lossfam metric evaluated on ``valid_sets``.
    **engine_kwargs
        Passed to ``lightgbm.train``: ``valid_sets``, ``valid_names``,
        ``feval`` (evaluated after lossfam's metric), ``callbacks``,
        ``keep_training_booster``.

    Returns
    -------
    TrainedModel
        With early stopping, the booster is cut back to its best iteration.
    """
    lgb = _lgb()
    fam = make_family(family)
    if not isinstance(data, lgb.Dataset):
        raise ValueError(f"data must be a lightgbm.Dataset, got {type(data).__name__}")
    params = dict(params or {})
    if "objective" in params or "objective_type" in params or "app" in params or "application" in params:
        raise ValueError("params must not set the objective: the family is the objective")
    if "init_model" in engine_kwargs:
        raise ValueError("init_model is not supported by lossfam.lightgbm.train (the baseline would be added twice)")
    step = _resolve_step(fam, max_row_step)
    valid_sets = engine_kwargs.pop("valid_sets", None)
    if isinstance(valid_sets, lgb.Dataset):
        valid_sets = [valid_sets]
    valid_sets = list(valid_sets or [])
    user_feval = engine_kwargs.pop("feval", None)
    user_feval = [] if user_feval is None else (list(user_feval) if isinstance(user_feval, (list, tuple)) else [user_feval])
    callbacks = list(engine_kwargs.pop("callbacks", None) or [])
    keep_training = bool(engine_kwargs.pop("keep_training_booster", False))

    y, w = _label_weight(data, fam, "data")
    off = None if offset is None else _checks.check_raw(offset, y, f"{fam.name} offset")
    if valid_offsets is not None:
        valid_offsets = list(valid_offsets)
        if len(valid_offsets) != len(valid_sets):
            raise ValueError(f"valid_offsets has {len(valid_offsets)} entries for {len(valid_sets)} valid_sets")
    else:
        valid_offsets = [None] * len(valid_sets)

    baseline = fam.baseline(y, w, offset=off)
    start = np.full(y.shape, baseline) if off is None else baseline + off
    if prefit_params and fam.params:
        fam = fam.fit_nuisance(y, start, w)

    # starting scores: baseline + offset on every set, restored afterwards
    _check_no_user_init_score(data, "data")
    starts = {}
    for k, (vs, vo) in enumerate(zip(valid_sets, valid_offsets)):
        if vs is data:
            if vo is not None:
                raise ValueError(f"valid_sets[{k}] is the training set: its offset is offset=, not valid_offsets")
            continue
        if not isinstance(vs, lgb.Dataset):
            raise ValueError(f"valid_sets[{k}] must be a lightgbm.Dataset, got {type(vs).__name__}")
        _check_no_user_init_score(vs, f"valid_sets[{k}]")
        vy = _field(vs, "label")
        if vy is None:
            raise ValueError(f"valid_sets[{k}]: the Dataset has no label")
        nv = len(vy)
        vstart = np.full(nv, baseline)
        if vo is not None:
            vstart = vstart + _checks.check_raw(np.asarray(vo, dtype=np.float64).ravel(), vstart, f"valid_offsets[{k}]")
        starts[k] = vstart

    q = _refit_level(fam) if leaf_refit else None
    refit = None
    if q is not None:
        if "metric" in params and str(params["metric"]).lower() not in ("none", "na", "null", "custom", ""):
            raise ValueError("leaf refit keeps its own scores; LightGBM's built-in metrics would see the unedited "
                             "ones: drop params['metric'] or pass leaf_refit=False")
        refit = _LeafRefit(fam, q, _learning_rate(params), y, w, _feature_data(data, "data"), start)
        for k in _THREAD_NAMES:
            if k in params:
                refit.predict_kw = {"num_threads": int(params[k])}
                break
        for k, vs in enumerate(valid_sets):
            if k in starts:
                refit.track(vs, _feature_data(vs, f"valid_sets[{k}]"), starts[k])
            # the training set itself is tracked as set 0

    own_metric = _Metric(fam, metric_kind)
    fevals = [own_metric] + user_feval
    if refit is not None:
        def wrap(fn):
            def feval(preds, eval_data):
                refit.catch_up()
                raw = refit.raw[0] if eval_data is data else refit.raw_for(eval_data)
                return fn(preds if raw is None else raw, eval_data)
            return feval
        fevals = [wrap(fn) for fn in fevals]

        def fobj(preds, train_data):
            return refit.grow_gradients()

        def before_round(env):
            refit.catch_up(env.model)
        before_round.before_iteration = True
        before_round.order = -1000
        callbacks.append(before_round)
        params["objective"] = fobj
    else:
        native = _native_params(fam, step) if builtin_if_exact else None
        if native is not None:
            clash = sorted(k for k in native if k != "objective" and k in params and params[k] != native[k])
            if clash:
                raise ValueError(f"params {clash} would change LightGBM's built-in objective away from the "
                                 f"{fam.name} loss; drop them or pass builtin_if_exact=False")
            params.update(native)
        else:
            params["objective"] = _Objective(fam, step)
    params.setdefault("metric", "None")

    touched = [data] + [valid_sets[k] for k in starts]
    try:
        data.set_init_score(start)
        for k, s in starts.items():
            valid_sets[k].set_init_score(s)
        booster = lgb.train(
            params, data, num_boost_round=num_boost_round,
            valid_sets=valid_sets or None, feval=fevals if valid_sets else None,
            callbacks=callbacks, keep_training_booster=True, **engine_kwargs,
        )
        if refit is not None:
            refit.catch_up(booster)
        best = booster.best_iteration
        cut = 0 < best < booster.current_iteration()
        while 0 < best < booster.current_iteration():
            booster.rollback_one_iter()
        if refit is not None:
            train_raw = refit.raw[0] if not cut else _raw_from_trees(booster, refit.X[0], start)
        else:
            captured = {}

            def grab(preds, _data):
                captured["raw"] = np.array(preds, dtype=np.float64)
                return "raw", 0.0, False
            booster.eval_train(feval=grab)
            train_raw = captured["raw"]
        if not keep_training:
            booster = lgb.Booster(model_str=booster.model_to_string())
    finally:
        for ds in touched:
            _clear_start(ds)
    fitted = fam.fit_nuisance(y, train_raw, w) if fam.params else fam
    return TrainedModel(booster, fam, baseline, fitted)


def _raw_from_trees(booster, X, start):
    """Raw training scores from the booster's trees plus the starting scores."""
    return np.asarray(booster.predict(X, raw_score=True), dtype=np.float64) + start
