r"""LightGBM adapter: a lossfam family as LightGBM objective, metric and trained model.

``objective(family, step_limit="auto")``
    One callable usable as ``params["objective"]`` in ``lightgbm.train``
    (called as ``f(preds, train_data)``) and as ``objective=`` of
    ``LGBMRegressor`` / ``DaskLGBMRegressor`` (``f(y_true, y_pred, weight,
    group)``): the family's gradient and Hessian in the raw score, in its
    dispersion units, guarded, weighted and checked (``lossfam._boost.gradients``).
    On its first call it warns when every raw score is one constant far from
    the family's baseline (no ``init_score``): pass the baseline there.
``metric(family, kind="nll")``
    The weighted mean nll (or unit deviance) for ``feval=`` in
    ``lightgbm.train`` and ``eval_metric=`` in the scikit-learn estimators,
    named ``"<family>_nll"`` / ``"<family>_deviance"``; lower is better.
``train(family, params, data, num_boost_round=100, ...)``
    Plans the start (baseline given offset and weights, starting scores,
    nuisance pre-fit), trains (on the family's native twin where LightGBM's
    built-in objective is exactly the family's loss, else on the Python
    objective, refitting leaves where the family's leaf rule asks), fits the
    nuisance parameters at the final raw scores and returns a
    :class:`lossfam.BoostedFit`; ``load`` (= ``lossfam.load``) restores it.

lightgbm is imported on first use; ``import lossfam`` never imports it.

On a Dask cluster (``train`` given a ``lossfam.ClusterData``): the trees are
grown by ``lightgbm.dask.DaskLGBMRegressor`` with the starting scores as its
``init_score``; lossfam's own steps run on the workers
(``lossfam._boost.cluster``).  Native twins, the Python objective, and the
refit path for median / quantile leaves (``lossfam._lightgbm_refit``: per round,
the exact residual quantile of each leaf over the rows of all workers, summed
over ``distributed.Variable``; line-search leaves are refused); ``valid_sets``
are scored after training, and one
``lightgbm.early_stopping`` callback is honoured by scoring every round on all
valid rows afterwards and cutting the model at the best one.  The check of the
trained scores and the nuisance fit read the trained scores LightGBM leaves on
each worker (``lossfam._lightgbm_keep``; on the refit path the worker's own
scores with the renewed leaves) instead of predicting every training row,
unless the model was cut or a worker lacks them.

Native twins (``native=True``, the default).  Families declare the built-in
objective whose gradients, Hessian and leaf rule equal theirs (gaussian
``regression``, laplace ``regression_l1``, asymmetric_laplace ``quantile`` at
``alpha`` = tau, bernoulli ``binary``, poisson ``poisson`` with its Hessian
damping e^0.7 = lossfam's default guard, gamma ``gamma``).  LightGBM then
computes them in C++ (and renews median/quantile leaves there); lossfam's
``init_score`` (baseline + offset) replaces LightGBM's boost-from-average, so
the baseline, metric, nuisance fit and file are lossfam's.  Under a built-in
objective LightGBM hands a Python metric the transformed prediction (a
probability, a mean): the metric maps it back through the link
(``lossfam._boost.scoring.raw_from_output``).  ``native=False`` forces the
Python objective.  huber has no twin: LightGBM's ``huber`` has the same loss
at ``alpha = delta * scale`` but a unit Hessian, so its trees differ.

Refit path (families with a ``leaf_value`` rule other than ``"newton"``, on
the Python objective).  Each tree is grown on the rule's gradient (the pinball
subgradient with a unit Hessian for median/quantile; the family's own for a
line search), then its leaves are set from ``lossfam._boost.leaves`` via
``Booster.set_leaf_output`` (a median / quantile leaf by LightGBM's own
definition, Hyndman and Fan's 7, interpolated as LightGBM does it, on unweighted
rows: the same leaf values as the native twin's, so ``native=False`` gives the
native path's model; on
weighted rows, which LightGBM renews by a rule of its own, the midpoint of the
leaf's minimisers).  LightGBM's score caches never see edited leaves,
so ``train`` keeps the raw scores of the training and validation sets itself
(each new tree's leaf indices, ``predict(pred_leaf=True)`` on the in-memory
features); the objective and metrics read those.  This path needs the feature
data in memory and refuses LightGBM's built-in metrics.  With
``bagging_fraction`` < 1 and ``bagging_freq`` > 0 lossfam draws the bag itself
(out-of-bag rows get zero gradient and Hessian) and refits leaves on in-bag
rows only.

Offsets.  ``offset=`` (training) and ``valid_offsets=[...]`` (one per
validation set) are per-row raw-scale terms (log exposure); the baseline is
fitted given the offset and each Dataset's ``init_score`` is baseline +
offset during training.  When training has an offset, every validation set
must have one too (``None`` is refused: its metric would be wrong); pass zeros
for rows that truly have none.  Datasets that already carry an
``init_score`` are refused.
"""
from __future__ import annotations

import functools

import numpy as np

from . import _checks
from ._boost import cluster, facts
from ._boost.gradients import STEP_LIMIT_DEFAULT, Gradients, TargetCache, growth_gradients, resolve_guard
from ._boost.gradients import warn_if_far_from_baseline
from ._boost.leaves import RowBag, leaf_table
from ._boost.model import BoostedFit, SeveralScoreFit
from ._boost.model import load as _load
from ._boost.plan import censored_passes, checked_training_raw, fit_info, fit_nuisance_or_keep, start_plan
from ._boost.plan import train_in_passes, training_path
from ._boost.scoring import Scorer, raw_from_output
from ._boost import several as _several
from .censoring import IntervalTarget
from .registry import family as make_family

__all__ = ["objective", "metric", "train", "load", "BoostedFit", "censored_dataset"]

#: the attribute of a lightgbm.Dataset that carries its censoring bounds (see censored_dataset)
BOUNDS_ATTRIBUTE = "lossfam_bounds"


def censored_dataset(data, target, **kwargs):
    """A ``lightgbm.Dataset`` whose rows are censored or interval targets (lossfam's convention).

    LightGBM has no field for a second label, so the bounds of ``target`` (a
    :class:`lossfam.censoring.IntervalTarget`) travel with the Dataset object itself, as its
    attribute ``lossfam_bounds``; the LightGBM label is set to a finite stand-in per row
    (``target.midpoint()``: y for exact rows, the finite bound of one-sided rows) that LightGBM
    requires and lossfam never reads.  Every lossfam objective, metric and ``train`` reads the
    bounds from that attribute when it is present.  ``kwargs`` go to ``lightgbm.Dataset``
    (weight, reference, params...; not ``label``).  A Dataset built by LightGBM itself (a
    ``subset``, a file) does not carry the attribute: build each with this function.
    """
    if not isinstance(target, IntervalTarget):
        raise TypeError(f"censored_dataset expects a lossfam.censoring.IntervalTarget, got {type(target).__name__}")
    if "label" in kwargs:
        raise ValueError("censored_dataset sets the label itself (a stand-in); the bounds are the target")
    ds = _lgb().Dataset(data, label=target.midpoint(), **kwargs)
    setattr(ds, BOUNDS_ATTRIBUTE, target)
    return ds


def _target_of(data):
    """The Dataset's censoring bounds (censored_dataset) or else its label."""
    bounds = getattr(data, BOUNDS_ATTRIBUTE, None)
    return bounds if bounds is not None else data.get_label()

_INSTALL = 'lossfam.lightgbm needs lightgbm: install it with pip install "lossfam[lightgbm]"'
_ENGINE = "lightgbm"
_LR_NAMES = ("learning_rate", "shrinkage_rate", "eta")
_THREAD_NAMES = ("num_threads", "num_thread", "nthread", "nthreads", "n_jobs")
_OBJECTIVE_NAMES = ("objective", "objective_type", "app", "application", "loss")
_LEAVES_NAMES = ("num_leaves", "num_leaf", "max_leaves", "max_leaf", "max_leaf_nodes")


def _lgb():
    """Import lightgbm on first use, with an install hint when it is missing."""
    try:
        import lightgbm
    except ImportError as exc:
        raise ImportError(_INSTALL) from exc
    return lightgbm


def _is_dataset(obj) -> bool:
    return isinstance(obj, _lgb().Dataset)


def _call_style(a, b, c):
    """(raw, y, w, keys) for both call styles: lgb.train's (preds, Dataset), sklearn's (y, preds, w)."""
    if _is_dataset(b):
        return a, None, None, b
    return b, a, c, None


class _Objective:
    """The family's gradient and Hessian as a LightGBM custom objective (see ``objective``).

    ``workers``: threads that assemble the gradients of a large call (``Gradients``; 1 in
    ``train``: more were not measured faster on a shared machine)."""

    def __init__(self, fam, guard, check_start=True, engine_buffers=False, workers=1):
        self.family = fam
        self.grads = Gradients(fam, guard, engine_buffers=engine_buffers, workers=workers)
        self.check_start = check_start
        self._cache = TargetCache()
        self._dataset_type = _lgb().Dataset

    def __call__(self, a, b, c=None, d=None):
        if isinstance(b, self._dataset_type):  # lgb.train: (preds, Dataset)
            raw, data = a, b
            y64, w64 = self._cache.get(self.family, (data,), lambda: (_target_of(data), data.get_weight()),
                                       for_nll=False, narrow=self.grads.engine_buffers)
        else:  # scikit-learn classes: (y_true, y_pred, weight, group)
            raw = b
            y64, w64 = self._cache.get(self.family, (a, c), lambda: (a, c), for_nll=False,
                                       narrow=self.grads.engine_buffers)
        if not (type(raw) is np.ndarray and raw.dtype == np.float64):
            raw = np.asarray(raw, dtype=np.float64)
        if raw.shape != y64.shape:
            raise ValueError(
                f"{self.family.name} objective: got {raw.size} raw scores for {y64.size} targets "
                "(multiclass or multi-output models are not supported)"
            )
        if self.check_start:
            self.check_start = False
            warn_if_far_from_baseline(self.family, y64, w64, raw, _ENGINE)
        return self.grads(y64, raw, w64)

    def __repr__(self):
        return f"lossfam.lightgbm.objective({self.family!r}, guard={self.grads.guard!r})"


def objective(family, *, step_limit=STEP_LIMIT_DEFAULT):
    """The family's negative log-likelihood as a LightGBM custom objective.

    Parameters
    ----------
    family : str or Family
    step_limit : "auto", None or a positive number
        The step guard (``lossfam._boost.gradients``): "auto" is the family's
        declared Hessian damping (poisson: e^0.7, as the built-in), else off;
        a number caps each row's Newton step on the raw scale.

    Returns
    -------
    callable
        ``f(preds, train_data)`` and ``f(y_true, y_pred, weight, group)``
        returning the weighted ``(grad, hess)``.  LightGBM starts from raw
        score 0 unless the Dataset has an ``init_score``: pass
        ``family.baseline(y, w)`` there (``train`` does).
    """
    _lgb()
    fam = make_family(family)
    return _Objective(fam, resolve_guard(fam, step_limit))


class _Metric:
    """Weighted mean nll or unit deviance as a LightGBM metric (see ``metric``)."""

    def __init__(self, fam, kind, from_output=False):
        self.family = fam
        self.scorer = Scorer(fam, kind)
        self.name = self.scorer.name
        self.from_output = from_output  # preds are the built-in objective's transformed output
        self._cache = TargetCache()

    def __call__(self, a, b, c=None):
        raw, y, w, data = _call_style(a, b, c)
        nll = self.scorer.kind == "nll"
        if data is not None:
            y64, w64 = self._cache.get(self.family, (data,), lambda: (_target_of(data), data.get_weight()),
                                       for_nll=nll)
        else:
            y64, w64 = self._cache.get(self.family, (y, w), lambda: (y, w), for_nll=nll)
        raw = raw_from_output(self.family, raw) if self.from_output else np.asarray(raw, dtype=np.float64)
        if raw.shape != y64.shape:
            raise ValueError(f"{self.name}: got {raw.size} raw scores for {y64.size} targets")
        return self.name, self.scorer.value(y64, raw, w64), False

    def __repr__(self):
        return f"lossfam.lightgbm.metric({self.family!r}, kind={self.scorer.kind!r})"


def metric(family, kind="nll"):
    """The family's weighted mean nll (``kind="nll"``) or unit deviance as a LightGBM metric.

    ``feval=`` in ``lightgbm.train`` (``f(preds, eval_data)``) and
    ``eval_metric=`` in the scikit-learn estimators (``f(y_true, y_pred,
    weight)``); returns ``(name, value, False)``.  ``preds`` must be raw scores
    including the starting score, as LightGBM supplies under a custom
    objective.  The nll uses the family's nuisance parameters as given.
    """
    _lgb()
    return _Metric(make_family(family), kind)


# --------------------------------------------------------------------------- BoostedFit plumbing
def _rounds(booster):
    return booster.current_iteration()


def _margin(fit, X, offset):
    if _is_dataset(X):
        raise TypeError("LightGBM predicts from arrays, DataFrames or sparse matrices, not from a Dataset "
                        "(pass the Dataset's data)")
    raw = np.asarray(fit.booster.predict(X, raw_score=True), dtype=np.float64).reshape(-1)
    raw += fit.baseline
    if offset is not None:
        raw += _checks.check_raw(np.asarray(offset, dtype=np.float64).reshape(-1), raw, f"{fit.family.name} offset")
    return raw


def _model_text(booster):
    text = booster.model_to_string()
    return text, {"num_trees": int(booster.num_trees())}


def _booster_from_text(text, extra, path, fam, baseline, info):
    lgb = _lgb()
    # the file's checksum and the text's structure were checked by lossfam._modelfile before this point
    try:
        booster = lgb.Booster(model_str=text)
    except lgb.basic.LightGBMError as exc:
        raise ValueError(f"{path}: the LightGBM model text is corrupted ({exc})") from None
    want = extra.get("num_trees")
    if want is not None and booster.num_trees() != want:
        raise ValueError(f"{path}: the LightGBM model has {booster.num_trees()} trees, the file says {want}; "
                         "was it truncated or edited?")
    return booster


def load(path, key=None) -> BoostedFit:
    """Restore a LightGBM model written by :meth:`BoostedFit.save` (``lossfam.load`` reads both engines)."""
    _lgb()
    return _load(path, key, engine=_ENGINE)


# --------------------------------------------------------------------------- train
def _field(data, name):
    """A Dataset field without forcing construction (None when absent)."""
    if data._handle is None:
        return getattr(data, name)
    return getattr(data, f"get_{name}")()


def _label_weight(data, fam, what):
    bounds = getattr(data, BOUNDS_ATTRIBUTE, None)
    y = _field(data, "label") if bounds is None else bounds
    if y is None and (isinstance(data.data, (str, bytes)) or hasattr(data.data, "__fspath__")):
        data.construct()  # a Dataset file: its label is inside; construction reads it
        y = data.get_label()
    if y is None:
        raise ValueError(f"{what}: the Dataset has no label; build it with lightgbm.Dataset(X, label=y)")
    if bounds is not None:
        y = fam.check_target(bounds)
    else:
        y = fam.check_target(np.asarray(y, dtype=np.float64).ravel(), for_nll=False)
    _checks.check_nonempty(y, fam.name)
    w = _field(data, "weight")
    w = None if w is None else _checks.check_weight(np.asarray(w, dtype=np.float64).ravel(), y, fam.name,
                                                   need_positive_sum=True)
    if w is not None and np.all(w == 1.0):
        w = None  # LightGBM drops weights that are all ones: the data are unweighted for it too
    return y, w


def _label_is_a_copy(data, y):
    """True when ``y`` was converted from the constructed Dataset's own (float32) label: reading it
    again gives the same values, and nobody else holds the float64 copy."""
    if data._handle is None:
        return False
    label = data.get_label()
    return label is not None and np.asarray(label).dtype == np.float32 and not np.shares_memory(label, y)


def _check_no_user_init_score(data, what):
    if _field(data, "init_score") is not None:
        raise ValueError(
            f"{what} already has an init_score; lossfam.lightgbm.train sets the starting score "
            "itself (baseline + offset): pass a per-row raw-scale term as offset=/valid_offsets= instead"
        )


def _set_start(data, start):
    """Set the starting scores as the Dataset's init_score.

    On a constructed Dataset through ``set_field``, which copies them into LightGBM once
    (``set_init_score`` would also read a second copy back into Python)."""
    if data._handle is None:
        data.set_init_score(start)
    else:
        data.set_field("init_score", start)
        data.init_score = start


def _clear_start(data):
    """Remove the starting scores lossfam set (also on the constructed C-side Dataset)."""
    if data._handle is not None:
        data.set_field("init_score", None)
    data.init_score = None


def _param(params, names, default):
    for k in names:
        if k in params:
            return params[k]
    return default


def _feature_data(data, what):
    X = data.data
    if X is None or isinstance(X, (str, bytes)) or hasattr(X, "__fspath__"):
        raise ValueError(
            f"{what}: this needs the feature data in memory (a Dataset built from an array or DataFrame, not a "
            "file, and not yet freed)"
        )
    return X


class _Refit:
    """The refit path's bookkeeping: its own raw scores per tracked set, leaf tables per tree.

    ``raw[k]`` are the current raw scores of tracked set k (0 = training set),
    ``X[k]`` its in-memory features.  ``catch_up(booster)`` refits every tree
    not refitted yet and adds its (edited) output to every tracked score.
    """

    def __init__(self, fam, guard, lr, y, w, X_train, start, bag, predict_kw):
        self.family = fam
        self.rule = facts.leaf_rule(fam)
        self.level = facts.leaf_level(fam)
        # LightGBM's own renewal definition, so that the custom path grows the native twin's model
        self.definition = facts.renewal_definition(_ENGINE, weighted=w is not None)
        self.grads = Gradients(fam, guard, engine_buffers=True)
        self.lr = lr
        self.y, self.w = y, w
        self.X, self.raw, self.datasets = [X_train], [start.copy()], []
        self.bag = bag
        self.tree_w = []
        self.booster = None
        self.done = 0
        self.predict_kw = predict_kw

    def track(self, data, X, start):
        self.datasets.append(data)
        self.X.append(X)
        self.raw.append(start.copy())

    def raw_for(self, data):
        for k, d in enumerate(self.datasets):
            if d is data:
                return self.raw[k + 1]
        return None

    def grow(self, preds, train_data):
        """The objective LightGBM calls: the rule's gradients at lossfam's own training scores."""
        w = self.w if self.bag is None else self.bag.weights(len(self.tree_w), self.w)
        self.tree_w.append(w)
        if self.level is not None:
            return growth_gradients(self.rule, self.level, self.y, self.raw[0], w)
        return self.grads(self.y, self.raw[0], w)

    def catch_up(self, booster=None):
        if booster is not None:
            self.booster = booster
        b = self.booster
        if b is None:
            return
        while self.done < b.num_trees():
            t = self.done
            leaves = [np.asarray(b.predict(X, pred_leaf=True, start_iteration=t, num_iteration=1,
                                           **self.predict_kw)).astype(np.intp).reshape(-1) for X in self.X]
            n_leaves = 1 + max(int(lv.max()) for lv in leaves if lv.size)
            values, has = leaf_table(self.rule, self.level, self.family, leaves[0], self.y, self.raw[0],
                                     self.tree_w[t], n_leaves, self.lr, self.definition)
            table = np.array([b.get_leaf_output(t, j) for j in range(n_leaves)])
            table[has] = values[has]
            for j in np.flatnonzero(has):
                b.set_leaf_output(t, int(j), float(table[j]))
            for k, lv in enumerate(leaves):
                self.raw[k] += table[lv]
            self.done += 1


def _constant_booster(lgb, params, data):
    """A booster whose raw output is 0 everywhere (so the model is its baseline), on data's features."""
    plain = {k: v for k, v in params.items() if k not in _OBJECTIVE_NAMES and not callable(v)}
    plain.update(objective="regression", metric="None", verbosity=-1, boost_from_average=False)
    zeros = np.zeros((data.num_data(), data.num_feature()))
    return lgb.train(plain, lgb.Dataset(zeros, np.zeros(data.num_data()), feature_name=data.get_feature_name()),
                     num_boost_round=1)


def train(family, params, data, num_boost_round=100, *, valid_sets=None, valid_names=None, offset=None,
          valid_offsets=None, step_limit=STEP_LIMIT_DEFAULT, native=True, nuisance_set=None, metric_kind="nll",
          callbacks=None, prefit=True, client=None, curvature=None, **engine_kwargs) -> BoostedFit:
    """Train a LightGBM model with the family's nll as the loss; returns a :class:`lossfam.BoostedFit`.

    Parameters
    ----------
    family : str or Family
    params : dict
        LightGBM parameters; must not set the objective.  "metric" defaults
        to "None" (lossfam's metric is evaluated on ``valid_sets``).
    data : lightgbm.Dataset or lossfam.ClusterData
        Training data with its label (and weights); no init_score.  A
        ``ClusterData`` (Dask collections) trains on a Dask cluster with
        ``lightgbm.dask`` (``lossfam._boost.cluster``; ``valid_sets`` are then
        ClusterData too and their offsets live in them).
    num_boost_round : int
    valid_sets, valid_names : as in ``lightgbm.train``
    offset : array of shape (n,), optional
        Per-row raw-scale offset of the training rows (e.g. log exposure).
    valid_offsets : list, optional
        One offset array per entry of ``valid_sets`` (required when ``offset`` is given).
    step_limit : "auto", None or a positive number
        The step guard (see :func:`objective`).
    native : bool
        Train on the family's native twin when LightGBM's built-in objective
        is exactly its loss under this guard (module docstring); False forces
        the Python objective.  Same trees, baseline, metric and file.
    nuisance_set : int, optional
        Index into ``valid_sets`` whose rows fit the final nuisance parameters
        instead of the training rows.
    metric_kind : "nll" or "deviance"
    callbacks : list, optional
        LightGBM callbacks (``lightgbm.early_stopping(k)`` rolls the model
        back to its best round).
    prefit : bool
        Fit the nuisance parameters at the baseline first when the family's
        location depends on them (``Family.location_needs_nuisance``); False
        trains with the parameters as given.
    curvature : "newton", "fisher" or "natural"
        Families with several raw scores per row only (``lossfam.SeveralScoreFamily``): the
        diagonal curvature of ``family.grad_hess`` (see ``train_several``); None: the family's
        ``default_curvature``.  One-score families take none.
    **engine_kwargs
        Passed to ``lightgbm.train`` (``feval``, evaluated after lossfam's
        metric; ``keep_training_booster``).

    A family with several raw scores per row trains through :func:`train_several` and returns a
    :class:`lossfam.SeveralScoreFit`.
    """
    lgb = _lgb()
    fam = make_family(family)
    if _several.is_several(fam):
        if nuisance_set is not None or metric_kind != "nll" or prefit is not True or client is not None \
                or step_limit != STEP_LIMIT_DEFAULT:
            raise ValueError(f"{fam.name} has several raw scores per row: nuisance_set, metric_kind, prefit, "
                             "step_limit and client do not apply (every parameter has its own raw score)")
        return train_several(fam, params, data, num_boost_round, valid_sets=valid_sets, valid_names=valid_names,
                             offset=offset, valid_offsets=valid_offsets, curvature=curvature, native=native,
                             callbacks=callbacks, **engine_kwargs)
    if curvature is not None:
        raise ValueError(f"curvature={curvature!r} applies to families with several raw scores per row; "
                         f"{fam.name} has one (its Hessian is the family's own)")
    if isinstance(data, cluster.ClusterData):
        stopping = _cluster_stopping(lgb, callbacks)
        if offset is not None or valid_offsets is not None or engine_kwargs:
            raise ValueError("on a Dask cluster the offsets live in ClusterData(offset=...); other "
                             f"lightgbm.train arguments are not supported there (got {sorted(engine_kwargs)})")
        return _train_cluster(fam, params, data, num_boost_round, valid_sets, valid_names, step_limit, native,
                              nuisance_set, metric_kind, prefit, client, stopping)
    call = _Call(lgb, params, data, valid_sets, valid_names, valid_offsets, nuisance_set, callbacks, engine_kwargs)

    # the start: targets, baseline given offset and weights, nuisance pre-fit, starting scores
    y, w = _label_weight(data, fam, "data")
    if censored_passes(fam, y, prefit):
        return train_in_passes(train, fam, params=params, data=data, num_boost_round=num_boost_round,
                               valid_sets=valid_sets, valid_names=valid_names, offset=offset,
                               valid_offsets=None if offset is None else valid_offsets, step_limit=step_limit,
                               native=native, nuisance_set=nuisance_set, metric_kind=metric_kind,
                               callbacks=callbacks, **engine_kwargs)
    plan = start_plan(fam, y, w, offset, prefit=prefit, engine=_ENGINE)
    fam = plan.family
    valid = _ValidStarts(lgb, call, plan, fam)

    # the engine's objective: the native twin, the Python objective, or the Python objective with leaf refit
    censored = isinstance(y, IntervalTarget)
    guard, twin, rule = training_path(fam, _ENGINE, "LightGBM", step_limit, native, call.params, censored)
    refit = _plumb(call, fam, guard, metric_kind, twin, rule, y, w, plan, valid)
    if refit is None and not censored and _label_is_a_copy(data, y):
        y = w = None  # a float64 copy of LightGBM's float32 label: read again after training, not held during it

    run = _run(lgb, call, num_boost_round, plan, valid, refit, twin)
    if y is None:
        y, w = _label_weight(data, fam, "data")

    # the trained model: its training scores checked, its nuisance parameters fitted
    fitted = _finish(call, fam, y, w, run, valid)
    best = run.best - 1 if run.best > 0 else None
    return BoostedFit(_ENGINE, run.booster, fam, plan.baseline, fitted, best, fit_info(run.twin, rule, guard))


class _Call:
    """The arguments of one ``train`` call, checked, with lossfam's own keywords taken out."""

    def __init__(self, lgb, params, data, valid_sets, valid_names, valid_offsets, nuisance_set, callbacks,
                 engine_kwargs):
        if not isinstance(data, lgb.Dataset):
            raise ValueError(f"data must be a lightgbm.Dataset, got {type(data).__name__}")
        params = dict(params or {})
        if any(k in params for k in _OBJECTIVE_NAMES):
            raise ValueError("params must not set the objective: the family is the objective")
        if "init_model" in engine_kwargs:
            raise ValueError("init_model is not supported by lossfam.lightgbm.train (the baseline would be added twice)")
        if isinstance(valid_sets, lgb.Dataset):
            valid_sets = [valid_sets]
        valid_sets = list(valid_sets or [])
        engine_kwargs = dict(engine_kwargs)
        feval = engine_kwargs.pop("feval", None)
        self.user_feval = [] if feval is None else (list(feval) if isinstance(feval, (list, tuple)) else [feval])
        self.keep_training = bool(engine_kwargs.pop("keep_training_booster", False))
        if valid_offsets is not None:
            valid_offsets = list(valid_offsets)
            if len(valid_offsets) != len(valid_sets):
                raise ValueError(f"valid_offsets has {len(valid_offsets)} entries for {len(valid_sets)} valid_sets")
        else:
            valid_offsets = [None] * len(valid_sets)
        if nuisance_set is not None and not (0 <= int(nuisance_set) < len(valid_sets)):
            raise ValueError(f"nuisance_set={nuisance_set!r} is not an index into the {len(valid_sets)} valid_sets")
        self.params, self.data, self.valid_sets, self.valid_offsets = params, data, valid_sets, valid_offsets
        self.valid_names = valid_names
        self.nuisance_set = None if nuisance_set is None else int(nuisance_set)
        self.callbacks = list(callbacks or [])
        self.fevals = []
        self.engine_kwargs = engine_kwargs


class _ValidStarts:
    """Targets and starting scores of the validation sets other than the training set (by index)."""

    def __init__(self, lgb, call, plan, fam):
        _check_no_user_init_score(call.data, "data")
        self.starts, self.targets = {}, {}
        for k, (vs, vo) in enumerate(zip(call.valid_sets, call.valid_offsets)):
            if vs is call.data:
                if vo is not None:
                    raise ValueError(f"valid_sets[{k}] is the training set: its offset is offset=, not valid_offsets")
                continue
            if not isinstance(vs, lgb.Dataset):
                raise ValueError(f"valid_sets[{k}] must be a lightgbm.Dataset, got {type(vs).__name__}")
            _check_no_user_init_score(vs, f"valid_sets[{k}]")
            if plan.offset is not None and vo is None:
                raise ValueError(
                    f"training used an offset but valid_sets[{k}] has none: its metric would score the rows without "
                    "their offset (and mislead early stopping); pass valid_offsets (zeros where there truly is none)"
                )
            self.targets[k] = _label_weight(vs, fam, f"valid_sets[{k}]")
            self.starts[k] = plan.start_for(self.targets[k][0].size, vo, f"valid_offsets[{k}]")


def _plumb(call, fam, guard, metric_kind, twin, rule, y, w, plan, valid):
    """Set the engine objective, metrics and callbacks of the chosen path; the refit state (or None)."""
    params = call.params
    refit = None
    if twin is None and rule != "newton":
        refit = _refit_state(call, fam, guard, y, w, plan, valid)
    own_metric = _Metric(fam, metric_kind, from_output=twin is not None)
    call.fevals = [own_metric] + call.user_feval
    if refit is not None:
        def wrap(fn):
            def feval(preds, eval_data):
                refit.catch_up()
                raw = refit.raw[0] if eval_data is call.data else refit.raw_for(eval_data)
                return fn(preds if raw is None else raw, eval_data)
            return feval
        call.fevals = [wrap(fn) for fn in call.fevals]

        def before_round(env):
            refit.catch_up(env.model)
        before_round.before_iteration = True
        before_round.order = -1000
        call.callbacks.append(before_round)

        def grow(preds, train_data):  # a plain function: lightgbm deep-copies params, and would copy a bound method's object
            return refit.grow(preds, train_data)
        params["objective"] = grow
    elif twin is not None:
        params.update(twin)
    else:
        params["objective"] = _Objective(fam, guard, check_start=False, engine_buffers=True)
    params.setdefault("metric", "None")
    return refit


def _refit_state(call, fam, guard, y, w, plan, valid):
    params = call.params
    if str(params.get("metric", "None")).lower() not in ("none", "na", "null", "custom", ""):
        raise ValueError(f"{fam.name} refits leaves and keeps its own scores; LightGBM's built-in metrics "
                         "would see the unedited ones: drop params['metric']")
    bag = None
    fraction = float(_param(params, ("bagging_fraction", "sub_row", "subsample", "bagging"), 1.0))
    freq = int(_param(params, ("bagging_freq", "subsample_freq"), 0))
    if fraction < 1.0 and freq > 0:
        bag = RowBag(y.size, fraction, freq, int(_param(params, ("bagging_seed", "seed"), 3)))
        for k in ("bagging_fraction", "sub_row", "subsample", "bagging", "bagging_freq", "subsample_freq"):
            params.pop(k, None)
    threads = _param(params, _THREAD_NAMES, None)
    refit = _Refit(fam, guard, float(_param(params, _LR_NAMES, 0.1)), y, w, _feature_data(call.data, "data"),
                   plan.start, bag, {} if threads is None else {"num_threads": int(threads)})
    for k, vs in enumerate(call.valid_sets):
        if k in valid.starts:
            refit.track(vs, _feature_data(vs, f"valid_sets[{k}]"), valid.starts[k])
    return refit


class _Run:
    """What training produced: the booster (cut to its best round), the best round (0: none), the
    path actually taken, and the training rows' raw scores or (native twin) predictions."""

    booster = None
    best = 0
    twin = None
    train_raw = None
    train_pred = None


def _run(lgb, call, num_boost_round, plan, valid, refit, twin):
    """Train with the starting scores set as init scores (removed again afterwards, also on failure)."""
    data, valid_sets = call.data, call.valid_sets
    touched = [data] + [valid_sets[k] for k in valid.starts]
    run = _Run()
    run.twin = twin
    try:
        _set_start(data, plan.start)
        for k, s in valid.starts.items():
            _set_start(valid_sets[k], s)
        try:
            booster = lgb.train(call.params, data, num_boost_round=num_boost_round, valid_sets=valid_sets or None,
                                valid_names=call.valid_names,
                                feval=call.fevals if valid_sets else None, callbacks=call.callbacks,
                                keep_training_booster=True, **call.engine_kwargs)
        except lgb.basic.LightGBMError as exc:
            if "num_features()) > (0)" not in str(exc):
                raise
            # no feature can split (too few rows for min_data_in_leaf): a custom objective makes
            # LightGBM fail where its built-ins return a constant model; return that constant
            run.booster = _constant_booster(lgb, call.params, data)
            run.twin = None
            run.train_raw = plan.start.copy()
            return _release(call, run, touched)
        if refit is not None:
            refit.catch_up(booster)
        run.best = booster.best_iteration
        cut = 0 < run.best < booster.current_iteration()
        while 0 < run.best < booster.current_iteration():
            booster.rollback_one_iter()
        if refit is not None and not cut:
            run.train_raw = refit.raw[0]
        elif refit is not None:
            run.train_raw = np.asarray(booster.predict(refit.X[0], raw_score=True), dtype=np.float64) + plan.start
        else:
            _clear_start(data)  # the booster's score cache holds the start now
            plan.start = None  # nor is lossfam's array needed any more: free it before the output's buffer
            out = _training_output(booster, copy=call.keep_training)
            if twin is not None:
                run.train_pred = out
            else:
                run.train_raw = out
        run.booster = booster
        return _release(call, run, touched)
    finally:
        for ds in touched:
            _clear_start(ds)


def _release(call, run, touched):
    """Drop the training booster (and its training memory) unless the caller keeps it."""
    if not call.keep_training:
        run.booster = _lgb().Booster(model_str=run.booster.model_to_string())
    for ds in touched:
        _clear_start(ds)
    return run


def _training_output(booster, copy):
    """The booster's output on its training rows (raw scores, or the twin's transformed predictions).

    LightGBM computes it into a buffer of the booster's; without ``copy`` that buffer is taken as
    is (the booster must not evaluate its training rows again while the result is in use).
    """
    captured = {}

    def grab(preds, _data):
        captured["out"] = np.array(preds, dtype=np.float64) if copy else preds
        return "out", 0.0, False
    booster.eval_train(feval=grab)
    out = captured["out"]
    return out if out.dtype == np.float64 else out.astype(np.float64)


def _finish(call, fam, y, w, run, valid):
    """Check the trained scores of the training rows; the family with its nuisance parameters fitted."""
    run.train_raw = checked_training_raw(fam, run.train_raw, run.train_pred)
    run.train_pred = None
    if not fam.params:
        return fam
    k = call.nuisance_set
    if k is None or k not in valid.starts:
        return fit_nuisance_or_keep(fam, y, run.train_raw, w)
    run.train_raw = None
    vraw = np.asarray(run.booster.predict(_feature_data(call.valid_sets[k], f"valid_sets[{k}]"), raw_score=True),
                      dtype=np.float64) + valid.starts[k]
    vy, vw = valid.targets[k]
    return fit_nuisance_or_keep(fam, vy, vraw, vw)


def _cluster_stopping(lgb, callbacks):
    """(stopping_rounds, min_delta) of the one ``lightgbm.early_stopping`` callback a cluster training
    accepts, or None without callbacks."""
    callbacks = list(callbacks or [])
    if not callbacks:
        return None
    kind = getattr(getattr(lgb, "callback", None), "_EarlyStoppingCallback", None)
    if len(callbacks) != 1 or kind is None or not isinstance(callbacks[0], kind):
        raise ValueError("on a Dask cluster the only callback accepted is one lightgbm.early_stopping(...)")
    cb = callbacks[0]
    if cb.first_metric_only is not False and cb.first_metric_only is not True:
        raise ValueError("early_stopping: first_metric_only must be a bool")
    delta = cb.min_delta
    if isinstance(delta, (list, tuple)):
        if len(set(delta)) != 1:
            raise ValueError("on a Dask cluster early_stopping takes one min_delta (lossfam's metric is the only one)")
        delta = delta[0]
    return int(cb.stopping_rounds), float(delta)


def _pred_leaves(booster, X):
    return booster.predict(X, pred_leaf=True)


def _leaf_tables(booster):
    """Per tree, its leaf values indexed by LightGBM's leaf index."""
    tables = []
    for tree in booster.dump_model().get("tree_info") or []:
        values, stack = {}, [tree["tree_structure"]]
        while stack:
            node = stack.pop()
            if "leaf_value" in node:
                values[int(node.get("leaf_index", 0))] = float(node["leaf_value"])
            else:
                stack += [node["left_child"], node["right_child"]]
        table = np.zeros(max(values) + 1)
        table[list(values)] = list(values.values())
        tables.append(table)
    return tables


def _train_cluster(fam, params, data, num_boost_round, valid_sets, valid_names, step_limit, native, nuisance_set,
                   metric_kind, prefit, client, stopping=None):
    """``train`` on ClusterData: lossfam's steps on the workers (``lossfam._boost.cluster``), the trees by
    ``lightgbm.dask``, one model trained on all partitions."""
    import lightgbm.dask as ldask

    client = cluster.get_client(client)
    params = dict(params or {})
    if any(k in params for k in _OBJECTIVE_NAMES):
        raise ValueError("params must not set the objective: the family is the objective")
    valid_sets = [valid_sets] if isinstance(valid_sets, cluster.ClusterData) else list(valid_sets or [])
    if not all(isinstance(v, cluster.ClusterData) for v in valid_sets):
        raise ValueError("on a Dask cluster valid_sets must be ClusterData")
    names = list(valid_names or [f"valid_{k}" for k in range(len(valid_sets))])
    if nuisance_set is not None and not (0 <= int(nuisance_set) < len(valid_sets)):
        raise ValueError(f"nuisance_set={nuisance_set!r} is not an index into the {len(valid_sets)} valid_sets")
    if stopping is not None and not valid_sets:
        raise ValueError("early stopping needs at least one valid set (valid_sets=[ClusterData(...)])")
    plan = cluster.cluster_plan(client, fam, data, facts.leaf_level(fam), prefit=prefit, engine=_ENGINE,
                                drop_unit_weights=True)
    fam = plan.family
    guard, twin = cluster.cluster_path(fam, _ENGINE, "LightGBM", step_limit, native, params,
                                       refits=("median", "quantile"))
    rule = facts.leaf_rule(fam)
    valids = [plan.start_for(v, f"valid_sets[{k}]") for k, v in enumerate(valid_sets)]
    refit = None
    if twin is not None:
        params.update(twin)
    elif rule in ("median", "quantile"):
        refit = _cluster_refit(ldask, fam, params, plan)
        params["objective"] = refit.objective
    else:
        params["objective"] = _Objective(fam, guard, check_start=False)
    params.setdefault("metric", "None")
    params.setdefault("verbosity", -1)
    est = ldask.DaskLGBMRegressor(client=client, n_estimators=int(num_boost_round), **params)
    targets = bool(fam.params) and nuisance_set is None
    if refit is None:
        kept, factory, keep = _keeping(ldask, client, plan, params["objective"], targets)
    else:  # the workers keep their own raw scores with the refit leaves (LightGBM's buffer lacks the edits)
        kept = cluster.KeptRows(client, refit.spec.token, plan.y.chunks[0][0])
        factory, keep = refit.module.RefitRegressor, (targets,)
    try:
        with cluster.timed(plan.stats, "trees"):
            if refit is not None:
                # the leaf refit on the workers (lossfam._lightgbm_refit): leaves renewed to the residual
                # quantile of the rows of every worker before each round, reductions by distributed Variables
                try:
                    est._lgb_dask_fit(model_factory=factory, X=plan.X, y=plan.y, sample_weight=plan.weight,
                                      init_score=plan.start, refit=refit.spec, keep=(kept.token, *keep))
                except BaseException:
                    refit.module.stop(client, refit.spec.token)
                    raise
            elif kept is None:
                est.fit(plan.X, plan.y, sample_weight=plan.weight, init_score=plan.start)
            else:  # the same training, by a model factory that keeps each worker's trained scores
                est._lgb_dask_fit(model_factory=factory, X=plan.X, y=plan.y, sample_weight=plan.weight,
                                  init_score=plan.start, keep=(kept.token, *keep))
        if refit is not None:  # the refit ran inside the engine's call: its seconds are lossfam's
            secs, reductions, detail = refit.module.finish(client, refit.spec.token, est)
            plan.stats["seconds"]["refit"] = secs
            plan.stats["seconds"]["trees"] -= secs
            plan.stats["refit_passes"] = reductions
            if detail:
                plan.stats["refit_detail"] = detail
        with cluster.timed(plan.stats, "model"):
            booster = _lgb().Booster(model_str=est.booster_.model_to_string())
        best = None
        if stopping is not None:
            # lightgbm.dask scores a valid set on each worker's part only, so the workers could not agree on
            # when to stop: all rounds are trained, then lossfam's metric on all valid rows after every round
            # (one pass per valid set) replays LightGBM's early-stopping rule and the model keeps the rounds
            # up to the best one (the trees of those rounds do not depend on later ones)
            with cluster.timed(plan.stats, "best_round"):
                tables = _leaf_tables(booster)
                curves = [cluster.round_curves(client, fam, metric_kind, v, functools.partial(_pred_leaves, booster),
                                               tables) for v in valids]
                if tables:
                    best = cluster.best_round(curves, *stopping)
                    plan.stats["valid_metrics"] = {name: float(c[best]) for name, c in zip(names, curves)}
                    plan.stats["valid_curves"] = {name: [float(x) for x in c] for name, c in zip(names, curves)}
                    plan.stats["rounds_trained"] = len(tables)
                    if best + 1 < len(tables):
                        booster = _lgb().Booster(model_str=booster.model_to_string(num_iteration=best + 1))
                        if kept is not None:
                            kept.unusable = "early stopping cut the model"
        if kept is not None:
            kept.rounds = int(booster.current_iteration())
        fit = BoostedFit(_ENGINE, booster, fam, plan.baseline, fam, best, fit_info(twin, rule, guard))
        with cluster.timed(plan.stats, "tree_range"):
            tree_range = _tree_range(booster)
        return cluster.finish(plan, fit, valids, names, nuisance_set, metric_kind, tree_range, kept)
    finally:
        if kept is not None:
            kept.drop()


class _ClusterRefit:
    """The client's side of a leaf refit on the cluster: the workers' ``Spec``, their objective, the module."""

    def __init__(self, module, spec):
        self.module, self.spec = module, spec
        self.objective = module.Growth(spec.token)


def _cluster_refit(ldask, fam, params, plan):
    """Check that a median / quantile refit can run on the cluster with these parameters; its ``_ClusterRefit``.

    As on one machine, LightGBM's built-in metrics would see the unedited scores (refused).  One tree
    per round on all rows, split by rows over the workers: no bagging, ``tree_learner`` data or voting
    (feature-parallel workers each hold all rows, which the sums would count once per worker).  The
    refit needs ``lightgbm.dask``'s private ``model_factory`` argument."""
    if str(params.get("metric", "None")).lower() not in ("none", "na", "null", "custom", ""):
        raise ValueError(f"{fam.name} refits leaves and keeps its own scores; LightGBM's built-in metrics "
                         "would see the unedited ones: drop params['metric']")
    fraction = float(_param(params, ("bagging_fraction", "sub_row", "subsample", "bagging"), 1.0))
    freq = int(_param(params, ("bagging_freq", "subsample_freq"), 0))
    learner = str(_param(params, ("tree_learner", "tree", "tree_type", "tree_learner_type"), "data")).lower()
    if (fraction < 1.0 and freq > 0) or learner in ("feature", "feature_parallel"):
        raise ValueError(f"{fam.name} refits leaves on the cluster: one tree per round on all rows, split by rows "
                         "(no bagging; tree_learner 'data' or 'voting')")
    if not _takes_model_factory(ldask):
        raise ValueError(f"{fam.name} refits leaves on the cluster through lightgbm.dask's model_factory, which this "
                         "lightgbm version does not take: train with native=True and the default step_limit")
    from . import _lightgbm_refit

    definition = facts.renewal_definition(_ENGINE, weighted=plan.weight is not None)
    level = facts.leaf_level(fam)
    # LightGBM's unit-weight renewal takes its quantile level as a float (as local training's refit does,
    # ``lossfam._boost.leaves.engine_leaf_table``); its weighted rule is lossfam's midpoint at the level itself
    leaf_level = float(np.float32(level)) if definition == "linear" else level
    spec = _lightgbm_refit.Spec(facts.leaf_rule(fam), level, float(_param(params, _LR_NAMES, 0.1)), definition,
                                int(_param(params, _LEAVES_NAMES, 31)), leaf_level=leaf_level)
    return _ClusterRefit(_lightgbm_refit, spec)


def _takes_model_factory(ldask):
    """Whether ``lightgbm.dask``'s private ``_lgb_dask_fit`` takes a ``model_factory`` (lightgbm 4.x)."""
    import inspect

    fit_parts = getattr(ldask.DaskLGBMRegressor, "_lgb_dask_fit", None)
    try:
        return fit_parts is not None and "model_factory" in inspect.signature(fit_parts).parameters
    except (TypeError, ValueError):
        return False


def _keeping(ldask, client, plan, objective, targets):
    """(``cluster.KeptRows``, the model factory, its ``keep`` arguments after the token) when this
    training can keep LightGBM's own trained scores on the workers (``lossfam._lightgbm_keep``),
    else (None, None, None) with the reason in
    ``plan.stats["kept"]``: ``lightgbm.dask``'s private ``_lgb_dask_fit`` takes no
    ``model_factory`` (its internals changed), or the objective's output cannot be turned back
    into raw scores to rounding."""
    import uuid

    if not _takes_model_factory(ldask):
        plan.stats["kept"] = "lightgbm.dask takes no model_factory"
        return None, None, None
    from . import _lightgbm_keep

    inverse = _lightgbm_keep.inverse_for(objective)
    if inverse is None:
        plan.stats["kept"] = f"LightGBM's {objective} output is not kept"
        return None, None, None
    kept = cluster.KeptRows(client, uuid.uuid4().hex, plan.y.chunks[0][0])
    return kept, _lightgbm_keep.KeepingRegressor, (inverse, targets)


def _tree_range(booster):
    """None when the model has no trees to read (then every row is checked); else
    (sum over trees of the smallest leaf value, sum of the largest): every raw output lies between."""
    lo = hi = 0.0
    trees = booster.dump_model().get("tree_info") or []
    if not trees:
        return None
    for tree in trees:
        values, stack = [], [tree["tree_structure"]]
        while stack:
            node = stack.pop()
            if "leaf_value" in node:
                values.append(float(node["leaf_value"]))
            else:
                stack += [node["left_child"], node["right_child"]]
        lo, hi = lo + min(values), hi + max(values)
    return lo, hi


# --------------------------------------------------------------------------- several raw scores per row
def _scores_per_round(booster):
    return int(booster.num_model_per_iteration())


def _margin_several(fit, X, offset):
    if _is_dataset(X):
        raise TypeError("LightGBM predicts from arrays, DataFrames or sparse matrices, not from a Dataset "
                        "(pass the Dataset's data)")
    k = fit.family.n_scores
    raw = np.asarray(fit.booster.predict(X, raw_score=True), dtype=np.float64).reshape(-1, k)
    raw = raw + fit.baseline
    o = _several.offset_matrix(fit.family, offset, raw.shape[0], f"{fit.family.name} offset")
    return raw if o is None else raw + o


def _several_objective(fam, curvature, y, w):
    """The custom objective of a several-score family: a plain function (lightgbm deep-copies params)."""
    grads = _several.SeveralGradients(fam, curvature, order="F")

    def several_objective(preds, train_data):
        return grads(y, preds, w)
    return several_objective


def train_several(family, params, data, num_boost_round=100, *, valid_sets=None, valid_names=None, offset=None,
                  valid_offsets=None, curvature=None, native=True, callbacks=None, **engine_kwargs):
    """Train a family with k raw scores per row; returns a :class:`lossfam.SeveralScoreFit`.

    LightGBM grows one tree per raw score and round (``num_class = k``) from lossfam's objective:
    the family's gradient and diagonal curvature (``curvature``: "newton", "fisher" or
    "natural", ``lossfam.families._several``) at the (n, k) raw scores.  The starting scores are
    the family's k-vector baseline (given weights and offset) plus the offset, set as each
    Dataset's (n, k) ``init_score``; ``offset`` / ``valid_offsets`` entries are (n,) (location
    column) or (n, k).  ``valid_sets`` report the weighted mean nll ("<family>_nll");
    ``lightgbm.early_stopping`` rolls the model back to its best round.  A family that declares a
    LightGBM native twin (``native_twins``) trains on it with ``native=True``: LightGBM computes
    the gradients, lossfam supplies the start, the metric and the file.
    """
    lgb = _lgb()
    fam = make_family(family)
    call = _Call(lgb, params, data, valid_sets, valid_names, valid_offsets, None, callbacks, engine_kwargs)
    k = fam.n_scores
    params = call.params
    if int(_param(params, ("num_class", "num_classes"), k)) != k:
        raise ValueError(f"{fam.name} has {k} raw scores per row: num_class is set by lossfam ({k})")
    for name in ("num_class", "num_classes"):
        params.pop(name, None)
    curvature = _several.check_curvature(fam, curvature)
    _check_no_user_init_score(data, "data")
    y, w = _several.targets(fam, _field(data, "label"), _field(data, "weight"), "data")
    plan = _several.several_plan(fam, y, w, offset)
    starts, sets = {}, {}
    for j, (vs, vo) in enumerate(zip(call.valid_sets, call.valid_offsets)):
        if vs is data:
            if vo is not None:
                raise ValueError(f"valid_sets[{j}] is the training set: its offset is offset=, not valid_offsets")
            sets[id(vs)] = (y, w)
            continue
        if not isinstance(vs, lgb.Dataset):
            raise ValueError(f"valid_sets[{j}] must be a lightgbm.Dataset, got {type(vs).__name__}")
        _check_no_user_init_score(vs, f"valid_sets[{j}]")
        if plan.offset is not None and vo is None:
            raise ValueError(f"training used an offset but valid_sets[{j}] has none: its metric would score the rows "
                             "without their offset; pass valid_offsets (zeros where there truly is none)")
        vy, vw = _several.targets(fam, _field(vs, "label"), _field(vs, "weight"), f"valid_sets[{j}]")
        sets[id(vs)] = (vy, vw)
        starts[j] = plan.start_for(vy.size, vo, f"valid_offsets[{j}]")
    twin = facts.chosen_twin(fam, _ENGINE, "LightGBM", native=native, guard_is_default=curvature == fam.default_curvature,
                             params=params)
    scorer = _several.SeveralScorer(fam)

    def several_metric(preds, eval_data):
        vy, vw = sets[id(eval_data)]
        raw = np.asarray(preds, dtype=np.float64).reshape(-1, k)
        if twin is not None:  # the built-in hands a metric its transformed output (class probabilities)
            raw = _several.raw_from_output(fam, raw)
        return scorer.name, scorer.value(vy, raw, vw), False
    if twin is not None:
        params.update(twin)
    else:
        params["objective"] = _several_objective(fam, curvature, y, w)
    params["num_class"] = k
    params.setdefault("metric", "None")
    touched = [data] + [call.valid_sets[j] for j in starts]
    try:
        _set_start(data, plan.start)
        for j, st in starts.items():
            _set_start(call.valid_sets[j], st)
        booster = lgb.train(params, data, num_boost_round=num_boost_round, valid_sets=call.valid_sets or None,
                            valid_names=call.valid_names,
                            feval=[several_metric] + call.user_feval if call.valid_sets else None,
                            callbacks=call.callbacks, keep_training_booster=True, **call.engine_kwargs)
        best = booster.best_iteration
        while 0 < best < booster.current_iteration():
            booster.rollback_one_iter()
        out = _training_output(booster, copy=True).reshape(-1, k)
    finally:
        for ds in touched:
            _clear_start(ds)
    if twin is not None:
        out = _several.raw_from_output(fam, out)
    _several.check_trained_several(fam, out)
    if not call.keep_training:
        booster = lgb.Booster(model_str=booster.model_to_string())
    info = {"objective": twin["objective"] if twin else "custom", "curvature": curvature,
            "trees_per_round": k}
    return SeveralScoreFit(_ENGINE, booster, fam, plan.baseline, best - 1 if best > 0 else None, info)
