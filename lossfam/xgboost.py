r"""XGBoost adapter: a lossfam family as XGBoost objective, metric and trained model.

Nothing here imports xgboost until it is used; without it, the first call
raises ImportError naming the extra to install (``pip install "lossfam[xgboost]"``).

``objective(family, step_limit="auto")``
    One callable for both call styles: ``f(preds, dtrain)`` in
    ``xgb.train(params, dtrain, obj=f)`` (and ``xgboost.dask.train``) and
    ``f(y_true, y_pred[, sample_weight=...])`` in ``XGBRegressor(objective=f)``.
    It returns the family's gradient and Hessian in the raw score, in its
    dispersion units, guarded, weighted and checked
    (``lossfam._boost.gradients``); on its first call it warns when every raw
    score is one constant far from the family's baseline.
``metric(family, kind="nll")``
    The weighted mean nll (or unit deviance) for ``custom_metric=`` in
    ``xgb.train`` (``(name, value)``) and ``eval_metric=`` in the scikit-learn
    classes (a float, named by ``__name__``); under ``xgboost.dask`` each
    worker's sums are added across workers.
``train(family, params, dtrain, num_boost_round=100, ...)``
    Plans the start, trains (native twin, Python objective, or Python
    objective with leaf refit, as the family declares), fits the nuisance
    parameters and returns a :class:`lossfam.BoostedFit`; ``load`` (=
    ``lossfam.load``) restores it.

Starting score.  The baseline (rounded to float32, the engine's precision) is
the booster's ``base_score``: on the raw scale under the Python objective, on
the response scale (the inverse link of the baseline) under a built-in twin,
as XGBoost expects.  Either way the booster alone predicts from the baseline.
An offset is the DMatrix's ``base_margin``; XGBoost lets ``base_margin``
replace ``base_score``, so ``train`` sets it to offset + baseline during
training (the user's offset is put back afterwards, also on failure) and
``predict(X, offset=...)`` passes offset + baseline.  When training has an
offset every evaluation DMatrix must have a ``base_margin`` too.

Native twins (``native=True``): gaussian ``reg:squarederror``, laplace
``reg:absoluteerror``, asymmetric_laplace ``reg:quantileerror`` at
``quantile_alpha`` = tau, bernoulli ``binary:logistic``, poisson
``count:poisson`` (Hessian e^0.7 and leaves clipped at ``max_delta_step`` 0.7:
lossfam's default guard plus the same tree parameter), gamma ``reg:gamma``.
Built-in objectives hand a custom metric transformed predictions; the metric
maps them back through the link.

On a Dask cluster (``train`` given a ``lossfam.ClusterData``): the trees are
grown by ``xgboost.dask.train`` (base_margin = baseline + offset where there is
an offset); lossfam's own steps run on the workers (``lossfam._boost.cluster``).
Median / quantile leaves on the custom path are renewed on the workers each round
(``lossfam._xgboost_refit``: exact per-leaf quantiles over XGBoost's collective).

Refit path (families whose ``leaf_value`` rule is not ``"newton"``, on the
Python objective).  lossfam runs the rounds itself: each tree is grown with
``Booster.boost`` on the rule's gradient (the pinball subgradient with a unit
Hessian for median/quantile, as the built-ins; the family's own for a line
search), its leaves are read with ``booster[i:i+1].predict(pred_leaf=True)``
and set from ``lossfam._boost.leaves`` (a median / quantile leaf by XGBoost's
own definition: Hyndman and Fan's 6 without weights, the inverted weighted cdf
with them; without weights also in XGBoost's float32 arithmetic, from float32
scores, so ``native=False`` gives the native path's model exactly); the values are tracked by lossfam and
written into the model's JSON once, at the end.  With ``subsample`` < 1
lossfam draws the bag itself and refits on in-bag rows only.  This path
accepts ``evals``, ``early_stopping_rounds``, ``evals_result``,
``verbose_eval`` and ``custom_metric``.
"""
from __future__ import annotations

import json
import math

import numpy as np

from . import _checks
from ._boost import cluster, facts
from ._boost.gradients import STEP_LIMIT_DEFAULT, Gradients, TargetCache, growth_gradients, resolve_guard
from ._boost.gradients import warn_if_far_from_baseline
from ._boost.leaves import ENGINE_ARITHMETIC, RowBag, leaf_table
from ._boost.model import BoostedFit, SeveralScoreFit
from ._boost.model import load as _load
from ._boost.plan import censored_passes, checked_training_raw, fit_info, fit_nuisance_or_keep, start_plan
from ._boost.plan import train_in_passes, training_path
from ._boost.scoring import Scorer, raw_from_output
from ._boost import several as _several
from .censoring import IntervalTarget
from .registry import family as _as_family

__all__ = ["censored_dmatrix", "objective", "metric", "train", "load", "BoostedFit"]

_INSTALL_HINT = 'lossfam.xgboost needs the xgboost package; install it with: pip install "lossfam[xgboost]"'
_ENGINE = "xgboost"


def _xgb():
    """Import the engine on first use (absolute import: the real xgboost package)."""
    try:
        import xgboost
    except ImportError as exc:
        raise ImportError(_INSTALL_HINT) from exc
    return xgboost


def _dmatrix_targets(dm):
    w = dm.get_weight()
    return _dmatrix_y(dm), (None if w.size == 0 else w)


def _dmatrix_y(dm):
    """The labels, or an IntervalTarget when the DMatrix carries XGBoost's censoring bounds
    (``label_lower_bound`` / ``label_upper_bound``, as for ``survival:aft``)."""
    lo = dm.get_float_info("label_lower_bound")
    if lo.size == 0:
        return dm.get_label()
    hi = dm.get_float_info("label_upper_bound")
    if hi.size != lo.size:
        raise ValueError(f"the DMatrix has {lo.size} label_lower_bound values but {hi.size} label_upper_bound "
                         "values; set both, one per row")
    return IntervalTarget(lo.astype(np.float64), hi.astype(np.float64), owner="DMatrix bounds")


def censored_dmatrix(data, target, **kwargs):
    """An ``xgboost.DMatrix`` of ``data`` whose rows carry the bounds of ``target`` (a
    :class:`lossfam.censoring.IntervalTarget`) as ``label_lower_bound`` / ``label_upper_bound``,
    XGBoost's own fields for censored labels; ``kwargs`` go to the DMatrix (weight, base_margin...).
    lossfam reads the bounds back from any DMatrix that has them, however it was built."""
    if not isinstance(target, IntervalTarget):
        raise TypeError(f"censored_dmatrix expects a lossfam.censoring.IntervalTarget, got {type(target).__name__}")
    dm = _xgb().DMatrix(data, **kwargs)
    dm.set_float_info("label_lower_bound", target.lower)
    dm.set_float_info("label_upper_bound", target.upper)
    return dm


class _Objective:
    """Gradient and Hessian of a family's nll for XGBoost (see ``objective``)."""

    def __init__(self, fam, guard, check_start=True, engine_buffers=False, workers=1):
        self.family = fam
        self.guard = guard
        self.grads = Gradients(fam, guard, engine_buffers=engine_buffers, workers=workers)
        self.engine_buffers = engine_buffers
        self.check_start = check_start
        self.__name__ = f"{fam.name}_objective"
        self._dmatrix_type = _xgb().DMatrix
        self._cache = TargetCache()
        self._raw_buf = None

    def __getstate__(self):  # picklable for xgboost.dask: drop the engine class and the cache
        return {"family": self.family, "guard": self.guard, "check_start": self.check_start,
                "engine_buffers": self.engine_buffers, "workers": self.grads.workers}

    def __setstate__(self, state):
        self.__init__(state["family"], state["guard"], state["check_start"], state.get("engine_buffers", False),
                      state.get("workers", 1))

    def __call__(self, first, second, sample_weight=None):
        fam = self.family
        if isinstance(second, self._dmatrix_type):  # xgb.train: (preds, dtrain)
            y, w = self._cache.get(fam, (second,), lambda: _dmatrix_targets(second), for_nll=False,
                                   narrow=self.engine_buffers)
            raw = first
        else:  # scikit-learn classes: (y_true, y_pred[, sample_weight])
            y, w = self._cache.get(fam, (first, sample_weight), lambda: (first, sample_weight), for_nll=False,
                                   narrow=self.engine_buffers)
            raw = second
        raw = np.asarray(raw).reshape(-1)
        if raw.shape != y.shape:
            raise ValueError(f"{fam.name}: got {raw.size} predictions for {y.size} labels")
        if raw.dtype != np.float64:  # the engine hands float32 margins: widen into a reused buffer
            if self._raw_buf is None or self._raw_buf.size != raw.size:
                self._raw_buf = np.empty(raw.size)
            np.copyto(self._raw_buf, raw)
            raw = self._raw_buf
        if self.check_start:
            self.check_start = False
            warn_if_far_from_baseline(fam, y, w, raw, _ENGINE)
        return self.grads(y, raw, w)


class _Metric:
    """Weighted mean nll or unit deviance, for both engine call styles."""

    def __init__(self, fam, kind, from_output=False):
        self.family = fam
        self.scorer = Scorer(fam, kind)
        self.kind = self.scorer.kind
        self.__name__ = self.scorer.name
        self.from_output = from_output
        self._dmatrix_type = _xgb().DMatrix
        self._cache = TargetCache()

    def __getstate__(self):
        return {"family": self.family, "kind": self.kind, "from_output": self.from_output}

    def __setstate__(self, state):
        self.__init__(state["family"], state["kind"], state.get("from_output", False))

    def _raw(self, preds):
        if self.from_output:
            return raw_from_output(self.family, preds)
        return np.asarray(preds, dtype=np.float64).reshape(-1)

    def __call__(self, first, second, sample_weight=None):
        fam = self.family
        nll = self.kind == "nll"
        if isinstance(second, self._dmatrix_type):  # xgb.train: (preds, dmatrix) -> (name, value)
            y, w = self._cache.get(fam, (second,), lambda: _dmatrix_targets(second), for_nll=nll)
            raw = self._raw(first)
            if raw.shape != y.shape:
                raise ValueError(f"{fam.name}: got {raw.size} predictions for {y.size} labels")
            return self.__name__, self.value(y, raw, w)
        y = fam.check_target(first, for_nll=nll)
        w = _checks.check_weight(sample_weight, y, fam.name)
        raw = _checks.check_raw(self._raw(second), y, fam.name)
        return self.value(y, raw, w)

    def value(self, y, raw, w):
        sums = np.array(self.scorer.sums(y, raw, w))
        collective = _xgb().collective
        if collective.is_distributed():
            sums = np.asarray(collective.allreduce(sums, collective.Op.SUM), dtype=np.float64)
        return float(sums[0] / sums[1]) if sums[1] > 0 else float("nan")


def objective(family, *, step_limit=STEP_LIMIT_DEFAULT):
    """The family's nll as an XGBoost objective (both call styles; see the module docstring).

    ``step_limit``: "auto" (the family's declared Hessian damping, poisson
    e^0.7; else off), None (off) or a positive number (each row's Newton step
    capped at that length on the raw scale).  With the bare objective, pass
    the baseline as ``base_score`` (``train`` does).
    """
    fam = _as_family(family)
    return _Objective(fam, resolve_guard(fam, step_limit))


def metric(family, kind="nll"):
    """The weighted mean nll (``kind="nll"``) or unit deviance (``kind="deviance"``) as an XGBoost metric."""
    return _Metric(_as_family(family), kind)


# ---------------------------------------------------------------------------- BoostedFit plumbing
def _rounds(booster):
    return booster.num_boosted_rounds()


def _margin(fit, X, offset):
    xgb = _xgb()
    name = fit.family.name
    if isinstance(X, xgb.DMatrix):
        if offset is None:
            o, original = _offset_of(X, fit.family)
        else:
            o, original = None, X.get_base_margin()
            o = _checks.check_raw(np.asarray(offset, dtype=np.float64).reshape(-1), None, f"{name} offset")
        if o is None:
            return fit.booster.predict(X, output_margin=True)
        if o.size != X.num_row():
            raise ValueError(f"{name}: offset has {o.size} rows but the DMatrix has {X.num_row()}")
        try:
            X.set_base_margin(o + fit.baseline)
            return fit.booster.predict(X, output_margin=True)
        finally:
            X.set_base_margin(original)
    bm = None
    if offset is not None:
        o = _checks.check_raw(np.asarray(offset, dtype=np.float64).reshape(-1), None, f"{name} offset")
        n = X.shape[0]
        if o.size != n:
            raise ValueError(f"{name}: offset has {o.size} rows but X has {n}")
        bm = o + fit.baseline
    return fit.booster.inplace_predict(X, predict_type="margin", base_margin=bm)


def _model_text(booster):
    return bytes(booster.save_raw("json")).decode("utf-8"), {}


def _booster_from_text(text, extra, path, fam, baseline, info):
    xgb = _xgb()
    booster = xgb.Booster()
    try:
        booster.load_model(bytearray(text.encode("utf-8")))
    except xgb.core.XGBoostError as exc:
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else ""
        raise ValueError(f"{path}: the XGBoost model inside is corrupted or not an XGBoost model ({first})") from None
    stored = _base_score(booster)
    if _several.is_several(fam):  # the starting scores travel as base_margin, base_score is 0
        expected = np.float32(0.0)
    else:
        expected = _base_score_of(fam, baseline, info.get("objective", "custom") != "custom")
    if stored is not None and stored != expected:
        raise ValueError(
            f"{path}: the baseline {baseline!r} disagrees with the booster's base_score {float(stored)!r}; "
            "the file was edited or assembled from different models"
        )
    return booster


def load(path, key=None) -> BoostedFit:
    """Restore an XGBoost model written by :meth:`BoostedFit.save` (``lossfam.load`` reads both engines)."""
    _xgb()
    return _load(path, key, engine=_ENGINE)


def _base_score_of(fam, baseline, native):
    """The engine's base_score for this baseline: raw under a custom objective, response scale under a twin."""
    if native:
        with np.errstate(over="ignore"):
            return np.float32(fam.link_function.inverse(np.float64(baseline)))
    return np.float32(baseline)


def _base_score(booster):
    cfg = json.loads(booster.save_config())
    text = cfg["learner"]["learner_model_param"].get("base_score")
    if text is None:
        return None
    try:
        return np.float32(float(str(text).strip("[]").split(",")[0]))
    except ValueError:
        return None


# ---------------------------------------------------------------------------- training
def _offset_of(dmatrix, fam):
    """The DMatrix's base_margin as a float64 offset (or None), and the array to restore."""
    bm = dmatrix.get_base_margin()
    if bm.size == 0:
        return None, bm
    if bm.size != dmatrix.num_row():
        raise ValueError(
            f"{fam.name}: base_margin has {bm.size} values for {dmatrix.num_row()} rows; "
            "lossfam reads base_margin as one raw-scale offset per row"
        )
    o = _checks.check_raw(bm.astype(np.float64), None, f"{fam.name} offset (base_margin)")
    return o, bm


def train(family, params, dtrain, num_boost_round=100, *, evals=(), step_limit=STEP_LIMIT_DEFAULT, native=True,
          nuisance_set=None, metric_kind="nll", early_stopping_rounds=None, evals_result=None, verbose_eval=True,
          prefit=True, client=None, curvature=None, multi_strategy=None, **engine_kwargs) -> BoostedFit:
    """Train an XGBoost booster on the family's nll; returns a :class:`lossfam.BoostedFit`
    (:class:`lossfam.SeveralScoreFit` for a family with several raw scores per row, through
    :func:`train_several`, which also takes ``curvature`` and ``multi_strategy``).

    Parameters
    ----------
    family : str or lossfam.Family
    params : dict
        XGBoost parameters.  ``objective``, ``base_score`` and
        ``boost_from_average`` are set by lossfam; ``disable_default_eval_metric``
        is set to 1 unless given.
    dtrain : xgboost.DMatrix or lossfam.ClusterData
        Training data with labels, optional weights and optional offset (as
        base_margin).  A ``ClusterData`` (Dask collections, offset inside)
        trains on a Dask cluster with ``xgboost.dask`` (``lossfam._boost.cluster``);
        ``evals`` are then (ClusterData, name) pairs.
    num_boost_round : int
    evals : list of (DMatrix, name)
    step_limit : "auto", None or a positive number
        See :func:`objective`.
    native : bool
        Train on the family's native twin where XGBoost's built-in objective is
        exactly its loss under this guard; False forces the Python objective.
    nuisance_set : int, optional
        Index into ``evals`` whose rows fit the final nuisance parameters.
    metric_kind : "nll" or "deviance"
        The metric reported for ``evals`` (``custom_metric`` overrides it).
    early_stopping_rounds, evals_result, verbose_eval : as in ``xgboost.train``
        With early stopping the model is cut back to its best round.
    prefit : bool
        Fit the nuisance parameters at the baseline first when the family's
        location depends on them; False trains with them as given.
    **engine_kwargs
        Passed to ``xgboost.train`` (``callbacks``, ``custom_metric``...).
    """
    xgb = _xgb()
    fam = _as_family(family)
    if _several.is_several(fam):
        if nuisance_set is not None or metric_kind != "nll" or prefit is not True or client is not None \
                or step_limit != STEP_LIMIT_DEFAULT:
            raise ValueError(f"{fam.name} has several raw scores per row: nuisance_set, metric_kind, prefit, "
                             "step_limit and client do not apply (every parameter has its own raw score)")
        return train_several(fam, params, dtrain, num_boost_round, evals=evals, curvature=curvature, native=native,
                             multi_strategy=multi_strategy, early_stopping_rounds=early_stopping_rounds,
                             evals_result=evals_result, verbose_eval=verbose_eval, **engine_kwargs)
    if curvature is not None or multi_strategy is not None:
        raise ValueError(f"curvature= and multi_strategy= apply to families with several raw scores per row; "
                         f"{fam.name} has one")
    if isinstance(dtrain, cluster.ClusterData):
        return _train_cluster(fam, params, dtrain, num_boost_round, evals, step_limit, native, nuisance_set,
                              metric_kind, early_stopping_rounds, prefit, client,
                              dict(engine_kwargs, verbose_eval=verbose_eval, evals_result=evals_result))
    call = _Call(xgb, params, dtrain, num_boost_round, evals, nuisance_set, engine_kwargs)

    # the start: targets, baseline given offset and weights, nuisance pre-fit, starting scores
    y = fam.check_target(_dmatrix_y(dtrain), for_nll=False)
    _checks.check_nonempty(y, fam.name)
    censored = isinstance(y, IntervalTarget)
    if censored_passes(fam, y, prefit):
        return train_in_passes(train, fam, params=call.params, dtrain=dtrain, num_boost_round=call.rounds,
                               evals=call.evals, step_limit=step_limit, native=native, nuisance_set=nuisance_set,
                               metric_kind=metric_kind, early_stopping_rounds=early_stopping_rounds,
                               evals_result=evals_result, verbose_eval=verbose_eval, **engine_kwargs)
    if y.ndim != 1:
        raise ValueError(f"{fam.name}: expected one label per row, got labels of shape {y.shape}")
    w_raw = dtrain.get_weight()
    w = None if w_raw.size == 0 else _checks.check_weight(w_raw, y, fam.name, need_positive_sum=True)
    offset, _ = _offset_of(dtrain, fam)
    plan = start_plan(fam, y, w, offset, prefit=prefit, precision=np.float32, engine=_ENGINE)
    fam = plan.family
    _check_valid_offsets(call, plan)

    # the engine's objective: the native twin, the Python objective, or the Python objective with leaf refit
    guard, twin, rule = training_path(fam, _ENGINE, "XGBoost", step_limit, native, call.params, censored)
    obj, feval = _plumb(call, fam, guard, metric_kind, twin, rule, plan.baseline,
                        early_stopping_rounds, evals_result, verbose_eval)
    run = _run(xgb, call, fam, guard, twin, rule, obj, feval, y, w, plan)

    # the trained model: its training scores checked, its nuisance parameters fitted
    fitted = _finish(call, fam, y, w, run)
    return BoostedFit(_ENGINE, run.booster, fam, plan.baseline, fitted, run.best, fit_info(twin, rule, guard))


def _refuse_owned(params, engine_kwargs, extra, whose, fixes):
    """A copy of ``params``; refuses the parameters and keyword arguments lossfam sets itself."""
    params = dict(params or {})
    owned = sorted(k for k in ("objective", "base_score", "boost_from_average", "obj", *extra) if k in params)
    if owned:
        raise ValueError(f"params {owned} are set by lossfam.xgboost.train{whose} (the family fixes {fixes})")
    for key in ("obj", "maximize"):
        if key in engine_kwargs:
            raise ValueError(f"{key}= is set by lossfam.xgboost.train")
    return params


class _Call:
    """The arguments of one ``train`` call, checked, with lossfam's own keywords taken out."""

    def __init__(self, xgb, params, dtrain, num_boost_round, evals, nuisance_set, engine_kwargs):
        if not isinstance(dtrain, xgb.DMatrix):
            raise TypeError(f"train expects an xgboost.DMatrix, got {type(dtrain).__name__}")
        params = _refuse_owned(params, engine_kwargs, (), "", "the objective and the baseline")
        rounds = int(num_boost_round)
        if rounds < 0:
            raise ValueError(f"num_boost_round must be >= 0, got {num_boost_round}")
        evals = list(evals or [])
        for pair in evals:
            if not (isinstance(pair, (tuple, list)) and len(pair) == 2 and isinstance(pair[0], xgb.DMatrix)):
                raise TypeError("evals must be a list of (xgboost.DMatrix, name) pairs")
        if nuisance_set is not None and not (0 <= int(nuisance_set) < len(evals)):
            raise ValueError(f"nuisance_set={nuisance_set!r} is not an index into the {len(evals)} evals")
        self.params, self.dtrain, self.rounds, self.evals = params, dtrain, rounds, evals
        self.nuisance_set = None if nuisance_set is None else int(nuisance_set)
        self.engine_kwargs = dict(engine_kwargs)
        self.user_metric = None
        self.kw = {}


def _check_valid_offsets(call, plan):
    """The validation sets' starts are their base margins shifted by the baseline (``_run``): when
    training has an offset every other evaluation DMatrix must have one."""
    if plan.offset is None:
        return
    for k, (dm, name) in enumerate(call.evals):
        if dm is not call.dtrain and dm.get_base_margin().size == 0:
            raise ValueError(
                f"training used an offset (base_margin) but evals[{k}] ({name!r}) has none: its metric would "
                "score the rows without their offset (and mislead early stopping); give it a base_margin "
                "(zeros where there truly is none)"
            )


def _plumb(call, fam, guard, metric_kind, twin, rule, baseline, early_stopping_rounds, evals_result, verbose_eval):
    """Set the engine parameters of the chosen path (twin, base_score, leaf clipping); the Python
    objective (None under a twin) and the metric.  Collects the keywords for ``xgboost.train``."""
    params = call.params
    params.setdefault("disable_default_eval_metric", 1)
    call.user_metric = call.engine_kwargs.pop("custom_metric", None)
    call.kw = dict(call.engine_kwargs, early_stopping_rounds=early_stopping_rounds, evals_result=evals_result,
                   verbose_eval=verbose_eval)
    obj = None
    if twin is not None:
        params.update(twin)
        params["base_score"] = float(_base_score_of(fam, baseline, True))
    else:
        params["base_score"] = baseline
        if rule == "newton":
            if guard.damping is not None:  # XGBoost's damped objective also clips each leaf at the same step
                params.setdefault("max_delta_step", guard.damping)
            obj = _Objective(fam, guard, check_start=False, engine_buffers=True)
    feval = call.user_metric or _Metric(fam, metric_kind, from_output=twin is not None)
    return obj, feval


class _Run:
    """What training produced: the booster (cut to its best round), the best round (None: no early
    stop), the training rows' output (raw scores, or a twin's predictions) and the nuisance set's raw
    scores (read while its base margin was shifted)."""

    booster = None
    best = None
    train_raw = None
    train_pred = None
    nuisance_raw = None


def _run(xgb, call, fam, guard, twin, rule, obj, feval, y, w, plan):
    """Train with every offset shifted by the baseline as base_margin (put back afterwards, also on failure)."""
    dtrain, evals = call.dtrain, call.evals
    run = _Run()
    shifted = []
    try:
        for dm in [dtrain] + [d for d, _ in evals]:
            if any(dm is s[0] for s in shifted):
                continue
            o, original = _offset_of(dm, fam)
            if o is not None:
                dm.set_base_margin(o + plan.baseline)
                shifted.append((dm, original))
        if twin is not None or rule == "newton":
            booster, best, out = _train_engine(xgb, obj, call.params, dtrain, call.rounds, evals, feval, call.kw)
        else:
            booster, best, out = _train_refit(xgb, fam, guard, call.params, dtrain, y, w, plan.start, plan.baseline,
                                              call.rounds, evals, feval, call.kw)
        run.booster, run.best = booster, best
        if twin is not None:
            run.train_pred = np.asarray(out, dtype=np.float64)
        else:
            run.train_raw = np.asarray(out, dtype=np.float64)
        if call.nuisance_set is not None and fam.params:
            run.nuisance_raw = np.asarray(booster.predict(evals[call.nuisance_set][0], output_margin=True),
                                          dtype=np.float64)
    finally:
        for dm, original in shifted:
            dm.set_base_margin(original)
    return run


def _finish(call, fam, y, w, run):
    """Check the trained scores of the training rows; the family with its nuisance parameters fitted."""
    train_raw = checked_training_raw(fam, run.train_raw, run.train_pred)
    if not fam.params:
        return fam
    if run.nuisance_raw is None:
        return fit_nuisance_or_keep(fam, y, train_raw, w)
    vy, vw = _dmatrix_targets(call.evals[call.nuisance_set][0])
    vy = fam.check_target(vy, for_nll=False)
    vrows = vy.lower if isinstance(vy, IntervalTarget) else vy
    return fit_nuisance_or_keep(fam, vy, run.nuisance_raw,
                                None if vw is None else _checks.check_weight(vw, vrows, fam.name))


def _train_engine(xgb, obj, params, dtrain, num_boost_round, evals, feval, kw):
    """xgb.train; returns (booster cut to its best round, best iteration or None, training output)."""
    kw = {k: v for k, v in kw.items() if v is not None}
    if evals:
        kw.update(custom_metric=feval, maximize=False)

    class _KeepTrainingOutput(xgb.callback.TrainingCallback):  # before xgb.train drops its prediction cache
        out = None

        def after_training(self, model):
            self.out = model.predict(dtrain, output_margin=obj is not None)
            return model

    keep = _KeepTrainingOutput()
    kw["callbacks"] = list(kw.get("callbacks") or []) + [keep]
    booster = xgb.train(params, dtrain, num_boost_round, evals=evals, obj=obj, **kw)
    best = _best_iteration(booster) if kw.get("early_stopping_rounds") else None
    out = keep.out
    if best is not None and best + 1 < booster.num_boosted_rounds():
        booster = booster[: best + 1]
        out = booster.predict(dtrain, output_margin=obj is not None)
    return booster, best, out


def _best_iteration(booster):
    try:
        return int(booster.best_iteration)
    except AttributeError:
        return None


def _train_refit(xgb, fam, guard, params, dtrain, y, w, start, baseline, num_boost_round, evals, feval, kw):
    allowed = {"early_stopping_rounds", "evals_result", "verbose_eval"}
    unknown = sorted(k for k, v in kw.items() if k not in allowed and v is not None)
    if unknown:
        raise ValueError(
            f"{fam.name} refits leaves, so lossfam runs the boosting rounds itself and does not accept {unknown}; "
            f"it accepts evals, custom_metric and {sorted(allowed)}"
        )
    if int(params.get("num_parallel_tree", 1)) != 1 or params.get("booster", "gbtree") != "gbtree":
        raise ValueError(f"{fam.name} refits leaves and needs one tree per round (booster='gbtree', num_parallel_tree=1)")
    stop_rounds = kw.get("early_stopping_rounds")
    history = kw.get("evals_result")
    verbose = kw.get("verbose_eval", True)
    eta = float(params.get("learning_rate", params.get("eta", 0.3)))
    rule, level = facts.leaf_rule(fam), facts.leaf_level(fam)
    # XGBoost's own renewal definition, so that the custom path grows the native twin's model
    definition = facts.renewal_definition(_ENGINE, weighted=w is not None)
    grads = Gradients(fam, guard, engine_buffers=True)
    bag = None
    fraction = float(params.get("subsample", 1.0))
    if fraction < 1.0:
        bag = RowBag(y.size, fraction, 1, int(params.get("seed", params.get("random_state", 0)) or 0))
        params = {k: v for k, v in params.items() if k != "subsample"}

    booster = xgb.Booster(params, [dtrain] + [d for d, _ in evals])
    # median / quantile leaves renewed as XGBoost renews them: from its float32 scores (float32 sums of
    # float32 leaves), so that the custom path follows the native twin round after round
    scores = np.float32 if rule in ("median", "quantile") and definition in ENGINE_ARITHMETIC else np.float64
    raw = start.astype(scores)
    eval_state = []
    for d, name in evals:
        o = d.get_base_margin()  # already shifted by the baseline
        eval_state.append((d, name, np.full(d.num_row(), baseline, dtype=scores) if o.size == 0 else o.astype(scores)))
    log = {name: {} for _, name in evals}
    tables = []
    best_score, best_iter = math.inf, None
    for i in range(num_boost_round):
        wi = w if bag is None else bag.weights(i, w)
        g, h = growth_gradients(rule, level, y, raw, wi) if level is not None else grads(y, raw, wi)
        booster.boost(dtrain, i, grad=g, hess=h)
        del g, h
        tree = booster[i:i + 1]
        leaves = np.asarray(tree.predict(dtrain, pred_leaf=True), dtype=np.intp).reshape(-1)
        n_nodes = int(leaves.max()) + 1
        lvs = [np.asarray(tree.predict(d, pred_leaf=True), dtype=np.intp).reshape(-1) for d, _, _ in eval_state]
        n_nodes = max([n_nodes] + [int(lv.max()) + 1 for lv in lvs if lv.size])
        values, has = leaf_table(rule, level, fam, leaves, y, raw, wi, n_nodes, eta, definition)
        table32 = np.where(has, values, 0.0).astype(np.float32)
        table = table32.astype(np.float64)
        tables.append(table)
        step = table32 if scores is np.float32 else table
        raw += step[leaves]
        for (d, name, r), lv in zip(eval_state, lvs):
            r += step[lv]
        if evals:
            line = [f"[{i}]"]
            for d, name, r in eval_state:
                mname, value = feval(r, d)
                log[name].setdefault(mname, []).append(value)
                line.append(f"{name}-{mname}:{value:.5f}")
            if verbose and (verbose is True or i % int(verbose) == 0):
                print("\t".join(line))
            if stop_rounds:
                if value < best_score:
                    best_score, best_iter = value, i
                elif i - best_iter >= stop_rounds:
                    break
    if history is not None:
        history.update(log)
    booster = _write_leaf_values(xgb, booster, tables)
    best = None
    if stop_rounds and best_iter is not None:
        best = best_iter
        if best_iter + 1 < booster.num_boosted_rounds():
            booster = booster[: best_iter + 1]
    # the engine's float32 sums of the written leaves (the tracked raw differs in the last bits)
    return booster, best, booster.predict(dtrain, output_margin=True)


def _write_leaf_values(xgb, booster, tables):
    """Put the refit leaf values into the booster (one JSON edit at the end)."""
    doc = json.loads(bytes(booster.save_raw("json")))
    trees = doc["learner"]["gradient_booster"]["model"]["trees"]
    if len(trees) != len(tables):
        raise RuntimeError(f"expected {len(tables)} trees in the booster, found {len(trees)}")
    for tree, table in zip(trees, tables):
        left = np.asarray(tree["left_children"])
        cond = tree["split_conditions"]
        for node in np.flatnonzero(left == -1):
            cond[node] = float(table[node]) if node < table.size else 0.0
    out = xgb.Booster()
    out.load_model(bytearray(json.dumps(doc).encode("utf-8")))
    return out


def _train_cluster(fam, params, data, num_boost_round, evals, step_limit, native, nuisance_set, metric_kind,
                   early_stopping_rounds, prefit, client, engine_kwargs):
    """``train`` on ClusterData: lossfam's steps on the workers (``lossfam._boost.cluster``), the trees by
    ``xgboost.dask``; the metric's sums are added across workers (``_Metric.value``)."""
    xgb = _xgb()
    from xgboost import dask as dxgb

    client = cluster.get_client(client)
    params = dict(params or {})
    owned = sorted(k for k in ("objective", "base_score", "boost_from_average", "obj") if k in params)
    if owned:
        raise ValueError(f"params {owned} are set by lossfam.xgboost.train (the family fixes the objective and the baseline)")
    unknown = sorted(k for k in engine_kwargs if k not in ("verbose_eval", "evals_result"))
    if unknown:
        raise ValueError(f"on a Dask cluster lossfam.xgboost.train does not accept {unknown}")
    evals = list(evals or [])
    if not all(isinstance(p, (tuple, list)) and len(p) == 2 and isinstance(p[0], cluster.ClusterData) for p in evals):
        raise TypeError("on a Dask cluster evals must be a list of (ClusterData, name) pairs")
    if nuisance_set is not None and not (0 <= int(nuisance_set) < len(evals)):
        raise ValueError(f"nuisance_set={nuisance_set!r} is not an index into the {len(evals)} evals")
    plan = cluster.cluster_plan(client, fam, data, facts.leaf_level(fam), prefit=prefit, precision=np.float32,
                                engine=_ENGINE)
    fam, baseline = plan.family, plan.baseline
    guard, twin = cluster.cluster_path(fam, _ENGINE, "XGBoost", step_limit, native, params,
                                       refits=("median", "quantile"))
    rule = facts.leaf_rule(fam)
    valids = [plan.start_for(d, f"evals[{k}]") for k, (d, _) in enumerate(evals)]
    params.setdefault("disable_default_eval_metric", 1)
    obj, callbacks, engine_evals = None, None, True
    if twin is not None:
        params.update(twin)
        params["base_score"] = float(_base_score_of(fam, baseline, True))
    elif rule in ("median", "quantile"):
        # the refit on the workers (lossfam._xgboost_refit): leaves renewed to the residual quantile of the
        # rows of every worker before each round; XGBoost's own scores miss the renewed leaves, so its
        # metric would be wrong during training: the evals are scored by lossfam afterwards
        if early_stopping_rounds:
            raise ValueError(f"{fam.name} refits leaves on the cluster; early stopping is not supported on that path "
                             "(train with native=True, or without early_stopping_rounds)")
        if float(params.get("subsample", 1.0)) < 1.0 or int(params.get("num_parallel_tree", 1)) != 1 \
                or params.get("booster", "gbtree") != "gbtree":
            raise ValueError(f"{fam.name} refits leaves on the cluster: one tree per round on all rows "
                             "(booster='gbtree', num_parallel_tree=1, no subsample)")
        from . import _xgboost_refit

        params["base_score"] = baseline
        eta = float(params.get("learning_rate", params.get("eta", 0.3)))
        obj, refit_cb = _xgboost_refit.make(rule, facts.leaf_level(fam), eta,
                                            facts.renewal_definition(_ENGINE, weighted=plan.weight is not None),
                                            baseline)
        callbacks, engine_evals = [refit_cb], False
    else:
        params["base_score"] = baseline
        if guard.damping is not None:  # as in local training: the damped objective also clips each leaf
            params.setdefault("max_delta_step", guard.damping)
        obj = _Objective(fam, guard, check_start=False)

    def dmatrix(X, y, w, o, start):  # base_margin replaces base_score: baseline + offset where there is an offset
        return dxgb.DaskDMatrix(client, X, y, weight=w, base_margin=None if o is None else start)

    with cluster.timed(plan.stats, "trees"):  # the engine's: its data objects and its training
        dtrain = dmatrix(plan.X, plan.y, plan.weight, plan.offset, plan.start)
        dev = [(dmatrix(*v), name) for v, (_, name) in zip(valids, evals)] if engine_evals else []
        out = dxgb.train(client, params, dtrain, int(num_boost_round), evals=dev, obj=obj,
                         custom_metric=_Metric(fam, metric_kind, from_output=twin is not None) if dev else None,
                         early_stopping_rounds=early_stopping_rounds, callbacks=callbacks,
                         verbose_eval=engine_kwargs.get("verbose_eval", True))
    booster = out["booster"]
    if callbacks:  # the refit ran inside the engine's call: its seconds are lossfam's
        timing = _xgboost_refit.take_timing(booster)
        plan.stats["seconds"]["refit"] = timing["seconds"]
        plan.stats["seconds"]["trees"] -= timing["seconds"]
        plan.stats["refit_passes"] = timing["reductions"]
        plan.stats["refit_detail"] = timing
    if engine_kwargs.get("evals_result") is not None:
        engine_kwargs["evals_result"].update(out["history"])
    best = _best_iteration(booster) if early_stopping_rounds else None
    if best is not None and best + 1 < booster.num_boosted_rounds():
        booster = booster[: best + 1]
    info = fit_info(twin, rule, guard)
    fit = BoostedFit(_ENGINE, booster, fam, baseline, fam, best, info)
    with cluster.timed(plan.stats, "tree_range"):
        tree_range = _tree_range(booster)
    return cluster.finish(plan, fit, valids, [name for _, name in evals], nuisance_set, metric_kind, tree_range)


def _tree_range(booster):
    """None when the model has no trees to read (then every row is checked); else
    (sum over trees of the smallest leaf value, sum of the largest), from the model's JSON: every
    margin lies between these plus the base margin."""
    doc = json.loads(bytes(booster.save_raw("json")))
    trees = doc["learner"]["gradient_booster"].get("model", {}).get("trees")
    if not trees:
        return None
    lo = hi = 0.0
    for tree in trees:
        left = np.asarray(tree["left_children"])
        leaves = np.asarray(tree["split_conditions"], dtype=np.float64)[left == -1]
        lo, hi = lo + float(leaves.min()), hi + float(leaves.max())
    return lo, hi


# ---------------------------------------------------------------------------- several raw scores per row
#: the multi-output tree layout used when the caller names none (benchmarks/README, "Several raw scores")
MULTI_STRATEGY_DEFAULT = "one_output_per_tree"


def _scores_per_round(booster):
    cfg = json.loads(booster.save_config())["learner"]["learner_model_param"]
    return max(int(cfg.get("num_class", "0")), int(cfg.get("num_target", "1")), 1)


def _margin_several(fit, X, offset):
    xgb = _xgb()
    fam = fit.family
    if isinstance(X, xgb.DMatrix):
        n = X.num_row()
        if offset is None:
            bm = X.get_base_margin()
            offset = None if bm.size == 0 else bm.astype(np.float64)
        o = _several.offset_matrix(fam, offset, n, f"{fam.name} offset")
        start = np.tile(fit.baseline, (n, 1)) if o is None else fit.baseline + o
        original = X.get_base_margin()
        try:
            X.set_base_margin(start)
            out = fit.booster.predict(X, output_margin=True)
        finally:
            X.set_base_margin(original)
    else:
        n = X.shape[0]
        o = _several.offset_matrix(fam, offset, n, f"{fam.name} offset")
        start = np.tile(fit.baseline, (n, 1)) if o is None else fit.baseline + o
        out = fit.booster.inplace_predict(X, predict_type="margin", base_margin=start)
    return np.asarray(out, dtype=np.float64).reshape(n, fam.n_scores)


class _SeveralObjective:
    """The custom objective of a several-score family: (n, k) float32 margins in, (n, k) float32 out
    (C order: XGBoost reads them through the array interface without a copy)."""

    def __init__(self, fam, curvature, y, w):
        self.grads = _several.SeveralGradients(fam, curvature, order="C")
        self.y, self.w = y, w
        self.k = fam.n_scores

    def __call__(self, preds, dtrain):
        return self.grads(self.y, np.asarray(preds).reshape(-1, self.k), self.w)


def train_several(family, params, dtrain, num_boost_round=100, *, evals=(), curvature=None, native=True,
                  multi_strategy=None, early_stopping_rounds=None, evals_result=None, verbose_eval=True,
                  **engine_kwargs):
    """Train a family with k raw scores per row; returns a :class:`lossfam.SeveralScoreFit`.

    XGBoost boosts k outputs per row (``num_target = k``, ``tree_method="hist"``) from lossfam's
    objective: the family's gradient and diagonal curvature (``curvature``: "newton", "fisher" or
    "natural") at the (n, k) margins.  ``multi_strategy``: "one_output_per_tree" (the default,
    ``MULTI_STRATEGY_DEFAULT``: k trees per round) or "multi_output_tree" (one tree with
    k-vector leaves).  The DMatrix's ``base_margin`` is read as the offset ((n,) on the location
    column, or (n, k)); during training each DMatrix's base_margin is baseline + offset (put back
    afterwards).  ``evals`` report the weighted mean nll; with ``early_stopping_rounds`` the model
    is cut back to its best round.  A family that declares an XGBoost native twin trains on it with
    ``native=True`` (XGBoost computes the gradients; start, metric and file are lossfam's).
    """
    xgb = _xgb()
    fam = _as_family(family)
    if not isinstance(dtrain, xgb.DMatrix):
        raise TypeError(f"train expects an xgboost.DMatrix, got {type(dtrain).__name__}")
    params = _refuse_owned(params, engine_kwargs, ("num_target", "num_class", "multi_strategy"), f" for {fam.name}",
                           "the objective, the baseline and the outputs; pass multi_strategy= as an argument")
    curvature = _several.check_curvature(fam, curvature)
    strategy = MULTI_STRATEGY_DEFAULT if multi_strategy is None else multi_strategy
    if strategy not in ("one_output_per_tree", "multi_output_tree"):
        raise ValueError(f"multi_strategy must be 'one_output_per_tree' or 'multi_output_tree', got {strategy!r}")
    if params.get("tree_method", "hist") != "hist":
        raise ValueError(f"{fam.name}: several outputs per row need tree_method='hist'")
    evals = list(evals or [])
    for pair in evals:
        if not (isinstance(pair, (tuple, list)) and len(pair) == 2 and isinstance(pair[0], xgb.DMatrix)):
            raise TypeError("evals must be a list of (xgboost.DMatrix, name) pairs")
    k = fam.n_scores
    y, w = _several.targets(fam, dtrain.get_label(), dtrain.get_weight(), "dtrain")
    bm = dtrain.get_base_margin()
    plan = _several.several_plan(fam, y, w, None if bm.size == 0 else bm.astype(np.float64), precision=np.float32)
    sets = {}
    starts = []
    for j, (dm, name) in enumerate(evals):
        if dm is dtrain:
            continue
        vbm = dm.get_base_margin()
        if plan.offset is not None and vbm.size == 0:
            raise ValueError(f"training used an offset (base_margin) but evals[{j}] ({name!r}) has none: its metric "
                             "would score the rows without their offset; give it a base_margin (zeros where there "
                             "truly is none)")
        vy, vw = _several.targets(fam, dm.get_label(), dm.get_weight(), f"evals[{j}]")
        sets[id(dm)] = (vy, vw)
        if not any(dm is d for d, _ in starts):
            starts.append((dm, plan.start_for(vy.size, None if vbm.size == 0 else vbm.astype(np.float64),
                                              f"evals[{j}] base_margin")))
    sets[id(dtrain)] = (y, w)
    twin = facts.chosen_twin(fam, _ENGINE, "XGBoost", native=native, guard_is_default=curvature == fam.default_curvature,
                             params=params)
    scorer = _several.SeveralScorer(fam)

    def several_metric(preds, dm):
        vy, vw = sets[id(dm)]
        raw = np.asarray(preds, dtype=np.float64).reshape(-1, k)
        if twin is not None:
            raw = _several.raw_from_output(fam, raw)
        return scorer.name, scorer.value(vy, raw, vw)

    params.setdefault("disable_default_eval_metric", 1)
    params["tree_method"] = "hist"
    params["multi_strategy"] = strategy
    if twin is not None:
        params.update(twin)
        params["num_class"] = k
        obj = None
    else:
        params["num_target"] = k
        obj = _SeveralObjective(fam, curvature, y, w)
    params["base_score"] = 0.0  # every DMatrix carries its starting scores as base_margin
    user_metric = engine_kwargs.pop("custom_metric", None)
    kw = dict(engine_kwargs, early_stopping_rounds=early_stopping_rounds, evals_result=evals_result,
              verbose_eval=verbose_eval)
    touched = [(dtrain, bm)] + [(dm, dm.get_base_margin()) for dm, _ in starts]
    try:
        dtrain.set_base_margin(plan.start)
        for dm, st in starts:
            dm.set_base_margin(st)
        booster, best, out = _train_engine(xgb, obj, params, dtrain, num_boost_round, evals,
                                           user_metric or several_metric, kw)
        out = np.asarray(out, dtype=np.float64).reshape(-1, k)
    finally:
        for dm, original in touched:
            dm.set_base_margin(original)
    if twin is not None:
        out = _several.raw_from_output(fam, out)
    _several.check_trained_several(fam, out)
    info = {"objective": twin["objective"] if twin else "custom", "curvature": curvature,
            "multi_strategy": strategy}
    return SeveralScoreFit(_ENGINE, booster, fam, plan.baseline, best, info)
