r"""XGBoost adapter: a lossfam family as XGBoost's objective, metric, starting score and model.

Nothing here imports xgboost until it is used; without it, the first call
raises ImportError naming the extra to install (``pip install "lossfam[xgboost]"``).

Pieces
------
``objective(family)``
    One callable for both call styles of the engine: ``f(preds, dtrain)`` in
    ``xgb.train(params, dtrain, obj=f)`` (and ``xgboost.dask.train``) and
    ``f(y_true, y_pred[, sample_weight=...])`` in ``XGBRegressor(objective=f)``.
    The styles are told apart by whether the second argument is an
    ``xgb.DMatrix``.  The predictions it receives are raw scores (margins).
``metric(family, kind="nll")``
    The weighted mean nll (or, with ``kind="deviance"``, the weighted mean unit
    deviance) for ``custom_metric=`` in ``xgb.train`` (returns ``(name, value)``)
    and ``eval_metric=`` in the scikit-learn classes (returns a float; the
    engine names it by ``__name__``).  The name is ``"<family>_nll"`` or
    ``"<family>_deviance"``; smaller is better (``maximize=False``).  Under
    ``xgboost.dask`` each worker's sums are added across workers.
``train(family, params, dtrain, num_boost_round=100, **engine_kwargs)``
    Sets the baseline, guards, metric and leaf refit described below and
    returns a :class:`BoostedLossModel` (``predict``, ``predict_raw``,
    ``distribution``, ``save``); ``load(path)`` restores one.

Starting score
--------------
With a custom objective XGBoost estimates no intercept.  ``train`` computes
the baseline ``b = family.baseline(y, w, offset=o)`` (rounded to float32, the
engine's precision) and stores it as the booster's ``base_score``, which the
engine uses as a raw score when the objective is custom.  It is therefore part
of the engine's own model: validation sets, ``booster.predict`` and the saved
model all start from ``b`` with nothing to pass at predict time.

Offset
------
A per-row offset on the raw scale (log exposure for counts, say) is passed the
engine's usual way, as the DMatrix ``base_margin`` of the training and of each
validation set, and to ``predict(X, offset=...)``.  The engine lets a
``base_margin`` *replace* ``base_score``, so during training ``train`` sets the
``base_margin`` of each such DMatrix to ``offset + b`` and puts the user's
offset back afterwards (also when training fails); at predict time it passes
``base_margin = offset + b``.  The baseline is fitted given the offset.

Guards for the Newton step
--------------------------
XGBoost takes the leaf value ``-sum g / (sum h + lambda)`` at face value.
Where the Hessian is tiny next to the gradient (log link: a Poisson mean near 0
with y > 0, a gamma mean far above y) that step is huge and training blows up;
a zero Hessian makes the engine ignore the row; a NaN spreads silently.

* ``step_cap`` (a raw-scale length; default 2.0 for log-link families, off
  otherwise): each row's Hessian is raised to at least ``|g| / step_cap``.
  A leaf's Newton step is a Hessian-weighted average of its rows' own steps
  ``-g_i / h_i`` (shrunk further by ``lambda``), so no leaf moves by more than
  ``step_cap`` (times the learning rate) in one round.  Rows whose own step is
  already shorter keep their exact Hessian.
* ``step_cap="damped"`` instead uses XGBoost's own Poisson guard: every
  Hessian is multiplied by e^0.7, a uniform halving of all Newton steps, and
  ``train`` sets the tree parameter ``max_delta_step=0.7``, which clips every
  leaf value to +-0.7 before the learning rate (count:poisson does both).  For
  poisson ``train`` then lets count:poisson compute these very gradients
  (``builtin_if_exact``).
* A row with zero Hessian and non-zero gradient (which the engine would
  ignore) gets ``h = |g|`` (a unit step) when ``step_cap`` is off.
* A NaN or infinite gradient or Hessian raises ValueError naming the rows.

Laplace, asymmetric Laplace and Huber: leaf refit
-------------------------------------------------
Their nll has no useful second derivative (zero almost everywhere, or zero in
the tails), so the family supplies a majorising (IRLS) surrogate Hessian.  On
its own a Newton step with it is one reweighting step toward the leaf's
median, so trees built on it converge slowly and stop short of the
median/quantile.  ``train`` therefore follows each tree with an exact line
search per leaf: the new tree's leaf of every training row is read with
``booster[i:i + 1].predict(dtrain, pred_leaf=True)`` and each leaf value is
replaced by ``learning_rate * family.baseline(y_leaf, w_leaf, offset=raw_leaf)``,
the constant that minimises the weighted nll of the rows in that leaf given
their current raw score: the weighted median of the residuals for laplace,
their tau-quantile for asymmetric_laplace, their Huber M-estimate for huber.
The trees' shapes come from the surrogate gradients; their values are the
exact minimisers, which is what the engine's built-in L1 and quantile
objectives do too.  The refit values are tracked by ``train`` (the engine's
own score caches never see them) and written into the model's JSON once, at
the end, so the per-round cost is one leaf lookup and one grouped quantile.

For laplace and asymmetric_laplace ``train`` first fits the scale at the
baseline (``family.fit_nuisance``): their location minimiser does not depend on
the scale, which only sets the surrogate's floor.  Huber's scale is part of
its loss (the threshold between the quadratic core and the linear tails is
``delta * scale`` in units of y), so ``train`` uses it as given.  For all three
``objective`` multiplies the gradient and Hessian by ``scale**2`` (a constant
factor does not move the minimiser): the Hessian is then dimensionless and of
order one per row, so ``min_child_weight`` and ``lambda`` keep their usual
meaning of "about one row" whatever the units of y.

Saved model
-----------
``lossfam._modelfile``: the engine's model JSON plus the family and the
baseline; ``extra`` holds the nuisance parameters fitted on the training data
(used by ``distribution``), the training guard settings and, after early
stopping, the best iteration.  No pickle.
"""
from __future__ import annotations

import math
import weakref

import numpy as np

from . import _checks
from ._modelfile import read_model_file, write_model_file
from ._scoring import check_metric_kind, per_row_loss
from .links import LOG
from .registry import family as _as_family

__all__ = ["objective", "metric", "train", "load", "BoostedLossModel"]

_INSTALL_HINT = 'lossfam.xgboost needs the xgboost package; install it with: pip install "lossfam[xgboost]"'
_ENGINE = "xgboost"

#: default step_cap for log-link families (raw-scale units: at most a factor e^2 in the mean per round, times eta)
LOG_LINK_STEP_CAP = 2.0

#: families whose location minimiser does not depend on their scale: train fits the scale
#: at the baseline before training (it only sets the surrogate's floor and Hessian units)
_SCALE_FREE_LOCATION = frozenset({"laplace", "asymmetric_laplace"})

#: rows per block for the step guard's scratch array
_BLOCK = 1 << 16


def _xgb():
    """Import the engine on first use (absolute import: the real xgboost package)."""
    try:
        import xgboost
    except ImportError as exc:
        raise ImportError(_INSTALL_HINT) from exc
    return xgboost


def _default_step_cap(fam):
    return LOG_LINK_STEP_CAP if fam.link_function is LOG else None


def _rows_message(bad, values):
    idx = np.flatnonzero(bad)
    shown = idx[:5]
    vals = ", ".join(repr(float(v)) for v in values[shown])
    return f"{idx.size} rows, e.g. rows {shown.tolist()} = [{vals}]"


class _TargetCache:
    """Validated targets and weights of the last DMatrix seen (validated once per DMatrix)."""

    __slots__ = ("_ref", "y", "w")

    def __init__(self):
        self._ref = None
        self.y = self.w = None

    def get(self, dmatrix, fam, *, for_nll):
        if self._ref is not None and self._ref() is dmatrix and dmatrix.num_row() == self.y.size:
            return self.y, self.w  # labels are read once per DMatrix; a new DMatrix is re-read
        y = fam.check_target(dmatrix.get_label(), for_nll=for_nll)
        if y.ndim != 1:
            raise ValueError(f"{fam.name}: expected one label per row, got labels of shape {y.shape}")
        w = dmatrix.get_weight()
        w = None if w.size == 0 else _checks.check_weight(w, y, fam.name)
        self._ref = weakref.ref(dmatrix)
        self.y, self.w = y, w
        return y, w


class _Objective:
    """Gradient and Hessian of a family's nll for XGBoost (see the module docstring)."""

    def __init__(self, fam, step_cap, hessian_factor, damping=None):
        self.family = fam
        self.step_cap = step_cap
        self.hessian_factor = hessian_factor
        self.damping = damping  # log of the factor applied to every Hessian, or None
        self.__name__ = f"{fam.name}_objective"
        self._dmatrix_type = _xgb().DMatrix
        self._cache = _TargetCache()
        self._raw_buf = self._tmp_buf = None  # reused every round (same length)

    def _buffer(self, slot, n):
        buf = getattr(self, slot)
        if buf is None or buf.size != n:
            buf = np.empty(n)
            setattr(self, slot, buf)
        return buf

    def __getstate__(self):  # picklable for xgboost.dask: drop the engine class and the cache
        return {"family": self.family, "step_cap": self.step_cap, "hessian_factor": self.hessian_factor,
                "damping": self.damping}

    def __setstate__(self, state):
        self.__init__(state["family"], state["step_cap"], state["hessian_factor"], state.get("damping"))

    def __call__(self, first, second, sample_weight=None):
        fam = self.family
        if isinstance(second, self._dmatrix_type):  # xgb.train: (preds, dtrain)
            y, w = self._cache.get(second, fam, for_nll=False)
            raw = first
        else:  # scikit-learn classes: (y_true, y_pred[, sample_weight])
            y = fam.check_target(first, for_nll=False)
            w = _checks.check_weight(sample_weight, y, fam.name)
            raw = second
        raw = np.asarray(raw).reshape(-1)
        if raw.shape != y.shape:
            raise ValueError(f"{fam.name}: got {raw.size} predictions for {y.size} labels")
        if raw.dtype != np.float64:  # the engine hands float32 margins: widen into a reused buffer
            raw = np.copyto(self._buffer("_raw_buf", raw.size), raw) or self._raw_buf
        return self.gradients(y, raw, w)

    def gradients(self, y, raw, w):
        """(g, h) at validated y, float64 raw and weights w (or None), guarded."""
        fam = self.family
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            g, h = fam._grad_hess(y, raw)
        if self.hessian_factor != 1.0:
            g *= self.hessian_factor
            h *= self.hessian_factor
        if self.damping is not None:
            h *= math.exp(self.damping)
        if self.step_cap is not None:  # h = max(h, |g| / step_cap), in blocks to keep the scratch small
            inv_cap = 1.0 / self.step_cap
            tmp = self._buffer("_tmp_buf", min(g.size, _BLOCK))
            for i in range(0, g.size, _BLOCK):
                gb, hb = g[i : i + _BLOCK], h[i : i + _BLOCK]
                a = np.abs(gb, out=tmp[: gb.size])
                a *= inv_cap
                np.maximum(hb, a, out=hb)  # NaN in g or h propagates and is caught below
        if w is not None:
            g *= w
            h *= w
        h_min = h.min()
        if not (h_min > 0 and np.isfinite(h.max()) and np.isfinite(g.sum())):
            self._repair(g, h, raw)
        return g, h

    def _repair(self, g, h, raw):
        bad = ~(np.isfinite(g) & np.isfinite(h)) | (h < 0)
        if bad.any():
            raise ValueError(
                f"{self.family.name}: the gradient or Hessian is NaN, infinite or negative at "
                f"{_rows_message(bad, raw)} (raw scores); the raw scores have left the range "
                "where the nll is finite (try a smaller learning rate or a step_cap)"
            )
        dead = (h == 0) & (g != 0)
        if dead.any():
            h[dead] = np.abs(g[dead])


class _Metric:
    """Weighted mean nll or unit deviance, for both engine call styles."""

    def __init__(self, fam, kind):
        self.family = fam
        self.kind = check_metric_kind(kind)
        self.__name__ = f"{fam.name}_{kind}"
        self._dmatrix_type = _xgb().DMatrix
        self._cache = _TargetCache()

    def __getstate__(self):
        return {"family": self.family, "kind": self.kind}

    def __setstate__(self, state):
        self.__init__(state["family"], state["kind"])

    def __call__(self, first, second, sample_weight=None):
        fam = self.family
        if isinstance(second, self._dmatrix_type):  # xgb.train: (preds, dmatrix) -> (name, value)
            y, w = self._cache.get(second, fam, for_nll=self.kind == "nll")
            raw = np.asarray(first, dtype=np.float64).reshape(-1)
            if raw.shape != y.shape:
                raise ValueError(f"{fam.name}: got {raw.size} predictions for {y.size} labels")
            return self.__name__, self.value(y, raw, w, allreduce=True)
        y = fam.check_target(first, for_nll=self.kind == "nll")
        w = _checks.check_weight(sample_weight, y, fam.name)
        raw = _checks.check_raw(np.asarray(second, dtype=np.float64).reshape(-1), y, fam.name)
        return self.value(y, raw, w, allreduce=True)

    def value(self, y, raw, w, *, allreduce=False):
        per_row = per_row_loss(self.family, self.kind, y, raw)
        if w is None:
            sums = np.array([per_row.sum(), float(y.size)])
        else:
            sums = np.array([np.dot(w, per_row), w.sum()])
        if allreduce:
            collective = _xgb().collective
            if collective.is_distributed():
                sums = np.asarray(collective.allreduce(sums, collective.Op.SUM), dtype=np.float64)
        return float(sums[0] / sums[1]) if sums[1] > 0 else float("nan")


def objective(family, *, step_cap="auto"):
    """The family's nll as an XGBoost objective (both call styles; see the module docstring).

    Parameters
    ----------
    family : str or lossfam.Family
    step_cap : float, None, "auto" or "damped"
        Largest Newton step a row may ask for, on the raw scale: each row's
        Hessian is raised to at least ``|g| / step_cap``.  ``"auto"`` means
        ``LOG_LINK_STEP_CAP`` (2.0) for log-link families and None (off) otherwise;
        ``"damped"`` multiplies every Hessian by e^0.7 instead (count:poisson's guard).
    """
    fam = _as_family(family)
    cap, damping = _resolve_guard(fam, step_cap)
    return _Objective(fam, cap, _hessian_factor(fam), damping)


def metric(family, kind="nll"):
    """The weighted mean nll (``kind="nll"``) or unit deviance (``kind="deviance"``) as an XGBoost metric."""
    return _Metric(_as_family(family), kind)


#: count:poisson's default max_delta_step: its Hessian is e^(raw + 0.7)
ENGINE_POISSON_DAMPING = 0.7


def _resolve_guard(fam, step_cap):
    """(step cap or None, Hessian damping or None) from the ``step_cap`` argument."""
    if isinstance(step_cap, str) and step_cap == "damped":
        return None, ENGINE_POISSON_DAMPING
    return _resolve_step_cap(fam, step_cap), None


def _resolve_step_cap(fam, step_cap):
    if isinstance(step_cap, str):
        if step_cap != "auto":
            raise ValueError(f"step_cap must be a positive number, None, 'auto' or 'damped', got {step_cap!r}")
        return _default_step_cap(fam)
    if step_cap is None:
        return None
    v = float(step_cap)
    if not (v > 0 and math.isfinite(v)):
        raise ValueError(f"step_cap must be a positive finite number, None or 'auto', got {step_cap!r}")
    return v


def _hessian_factor(fam):
    """scale**2 for surrogate-Hessian families and gaussian (dimensionless Hessian), else 1.

    For gaussian this makes the gradient and Hessian exactly those of
    reg:squarederror (raw - y and 1) whatever the scale, so the regulariser
    ``lambda`` and ``min_child_weight`` mean what they mean for the built-in.
    """
    if (not fam.exact_hessian or fam.name == "gaussian") and "scale" in fam.params:
        return float(fam.params["scale"]) ** 2
    return 1.0


def _native_twin(fam, obj, leaf_refit, params):
    """The built-in objective that computes exactly this objective's gradients, or None.

    gaussian: with the Hessian factor scale**2 its gradient and Hessian are
    raw - y and 1, which is what reg:squarederror computes (in C++, without a
    Python round trip per round).  poisson with ``step_cap="damped"``: gradient
    e^raw - y and Hessian e^(raw + 0.7) with leaves clipped by the tree
    parameter max_delta_step = 0.7, which is what count:poisson does.
    """
    if leaf_refit or obj.step_cap is not None:
        return None
    if fam.name == "gaussian" and obj.damping is None:
        return "reg:squarederror"
    if (fam.name == "poisson" and obj.damping == ENGINE_POISSON_DAMPING
            and float(params.get("max_delta_step", 0.0)) == ENGINE_POISSON_DAMPING):
        return "count:poisson"
    return None


class _MeanScaleMetric:
    """Adapts a raw-score metric to a built-in log-link objective, whose custom metric sees means."""

    def __init__(self, inner):
        self.inner = inner

    def __call__(self, preds, dmatrix):
        with np.errstate(divide="ignore"):
            return self.inner(np.log(np.asarray(preds, dtype=np.float64)), dmatrix)


# ---------------------------------------------------------------------------- model


class BoostedLossModel:
    """A trained XGBoost booster together with its family and starting score.

    Attributes
    ----------
    family : lossfam.Family
        The noise model the trees were fitted with.
    fitted_family : lossfam.Family
        ``family`` with its nuisance parameters fitted by maximum likelihood on
        the training targets against the training raw scores (used by ``distribution``).
    baseline : float
        The starting raw score (the booster's ``base_score``).
    booster : xgboost.Booster
    best_iteration : int or None
        Set after early stopping; the booster then keeps trees 0..best_iteration only.
    """

    def __init__(self, booster, family, baseline, fitted_family=None, extra=None):
        self.booster = booster
        self.family = family
        self.baseline = float(baseline)
        self.fitted_family = fitted_family if fitted_family is not None else family
        self.extra = dict(extra or {})
        self.best_iteration = self.extra.get("best_iteration")

    def __repr__(self):
        return (
            f"BoostedLossModel(family={self.family.name!r}, trees={self.booster.num_boosted_rounds()}, "
            f"baseline={self.baseline:.6g})"
        )

    def predict_raw(self, X, offset=None):
        """Raw scores (the link scale) for rows X (numpy array or pandas DataFrame), float64."""
        bm = None
        if offset is not None:
            o = _checks.check_raw(np.asarray(offset, dtype=np.float64).reshape(-1), None, f"{self.family.name} offset")
            n = X.shape[0]
            if o.size != n:
                raise ValueError(f"{self.family.name}: offset has {o.size} rows but X has {n}")
            bm = o + self.baseline
        raw = self.booster.inplace_predict(X, predict_type="margin", base_margin=bm)
        return np.asarray(raw, dtype=np.float64).reshape(-1)

    def predict(self, X, offset=None):
        """Predictions on the response scale: the mean (or median/quantile/location, see family.prediction_kind)."""
        return self.family.link_function.inverse(self.predict_raw(X, offset))

    def distribution(self, X, offset=None):
        """The predictive law per row, with nuisance parameters fitted on the training data."""
        return self.fitted_family.distribution(self.predict_raw(X, offset))

    def save(self, path, key=None):
        """Write the model to ``path`` (JSON: the engine's model, the family and the baseline).

        The file is sealed with a checksum, or signed with HMAC-SHA-256 when ``key`` is given
        (see ``lossfam._modelfile``); the save is atomic.
        """
        extra = dict(self.extra)
        extra["fitted_params"] = self.fitted_family.params
        write_model_file(
            path,
            engine=_ENGINE,
            family=self.family,
            baseline=self.baseline,
            model=bytes(self.booster.save_raw("json")).decode("utf-8"),
            extra=extra,
            key=key,
        )


def load(path, key=None):
    """Restore a model written by :meth:`BoostedLossModel.save` (``key``: the key it was signed with).

    Load only files from sources you trust.
    """
    xgb = _xgb()
    doc = read_model_file(path, engine=_ENGINE, key=key)
    fam = doc["family"]
    extra = doc["extra"] if isinstance(doc["extra"], dict) else {}
    try:
        fitted = fam.with_params(**extra.get("fitted_params", {}))
    except (TypeError, ValueError) as exc:
        raise ValueError(f"{path}: the fitted parameters are malformed ({exc})") from None
    booster = xgb.Booster()
    try:
        booster.load_model(bytearray(doc["model"].encode("utf-8")))
    except xgb.core.XGBoostError as exc:
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else ""
        raise ValueError(f"{path}: the XGBoost model inside is corrupted or not an XGBoost model ({first})") from None
    baseline = doc["baseline"]
    if not isinstance(baseline, (int, float)) or not math.isfinite(baseline):
        raise ValueError(f"{path}: the baseline {baseline!r} is not a finite number")
    stored = _base_score(booster)
    if stored is not None and stored != np.float32(baseline):
        raise ValueError(
            f"{path}: the baseline {baseline!r} disagrees with the booster's base_score {float(stored)!r}; "
            "the file was edited or assembled from different models"
        )
    return BoostedLossModel(booster, fam, baseline, fitted, extra)


def _base_score(booster):
    import json

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
    """The DMatrix's base_margin as a float64 offset, or None."""
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


def train(
    family,
    params,
    dtrain,
    num_boost_round=100,
    *,
    step_cap="auto",
    leaf_refit=None,
    metric_kind="nll",
    builtin_if_exact=True,
    **engine_kwargs,
):
    """Train an XGBoost booster on the family's nll; returns a :class:`BoostedLossModel`.

    Parameters
    ----------
    family : str or lossfam.Family
    params : dict
        XGBoost parameters.  ``objective``, ``base_score`` and
        ``boost_from_average`` are set by lossfam and may not be given;
        ``disable_default_eval_metric`` is set to 1 unless given.
    dtrain : xgboost.DMatrix
        Training data with labels, optional weights and optional offset (as base_margin).
    num_boost_round : int
    step_cap : float, None, "auto" or "damped"
        See :func:`objective`.
    leaf_refit : bool or None
        Refit each new tree's leaves to the exact per-leaf minimiser (see the
        module docstring).  None: on for families without an exact Hessian.
    metric_kind : "nll" or "deviance"
        The metric reported for ``evals`` (``custom_metric`` overrides it).
    builtin_if_exact : bool
        When the engine has a built-in objective whose gradients are exactly
        the family's (gaussian: reg:squarederror), let the engine compute them:
        the same trees, predictions, metric, baseline and saved model, without
        the per-round Python round trip.  False forces the custom objective.
    **engine_kwargs
        Passed to ``xgboost.train`` (``evals``, ``early_stopping_rounds``,
        ``evals_result``, ``verbose_eval``, ``callbacks``, ``custom_metric``...).
        With ``leaf_refit`` lossfam runs the rounds itself and accepts
        ``evals``, ``early_stopping_rounds``, ``evals_result``, ``verbose_eval``
        and ``custom_metric`` only.
    """
    xgb = _xgb()
    fam = _as_family(family)
    if not isinstance(dtrain, xgb.DMatrix):
        raise TypeError(f"train expects an xgboost.DMatrix, got {type(dtrain).__name__}")
    params = dict(params or {})
    owned = sorted(k for k in ("objective", "base_score", "boost_from_average", "obj") if k in params)
    if owned:
        raise ValueError(f"params {owned} are set by lossfam.xgboost.train (the family fixes the objective and the baseline)")
    for key in ("obj", "maximize"):
        if key in engine_kwargs:
            raise ValueError(f"{key}= is set by lossfam.xgboost.train")
    num_boost_round = int(num_boost_round)
    if num_boost_round < 0:
        raise ValueError(f"num_boost_round must be >= 0, got {num_boost_round}")
    evals = list(engine_kwargs.pop("evals", None) or [])
    for pair in evals:
        if not (isinstance(pair, (tuple, list)) and len(pair) == 2 and isinstance(pair[0], xgb.DMatrix)):
            raise TypeError("evals must be a list of (xgboost.DMatrix, name) pairs")

    y = fam.check_target(dtrain.get_label(), for_nll=False)
    _checks.check_nonempty(y, fam.name)
    if y.ndim != 1:
        raise ValueError(f"{fam.name}: expected one label per row, got labels of shape {y.shape}")
    w_raw = dtrain.get_weight()
    w = None if w_raw.size == 0 else _checks.check_weight(w_raw, y, fam.name, need_positive_sum=True)
    offset, _ = _offset_of(dtrain, fam)
    baseline = float(np.float32(fam.baseline(y, w, offset=offset)))

    if leaf_refit is None:
        leaf_refit = not fam.exact_hessian
    train_fam = fam
    if fam.name in _SCALE_FREE_LOCATION and "scale" in fam.params:
        start = np.full_like(y, baseline) if offset is None else offset + baseline
        train_fam = fam.fit_nuisance(y, start, w)
    cap, damping = _resolve_guard(fam, step_cap)
    obj = _Objective(train_fam, cap, _hessian_factor(train_fam), damping)
    if damping is not None:  # the engine's guard also clips every leaf at the same step
        params.setdefault("max_delta_step", damping)
    obj._cache.y, obj._cache.w, obj._cache._ref = y, w, weakref.ref(dtrain)

    params["base_score"] = baseline
    params.setdefault("disable_default_eval_metric", 1)
    feval = engine_kwargs.pop("custom_metric", None) or _Metric(fam, metric_kind)

    # base_margin replaces base_score: shift every offset by the baseline while training
    shifted = []
    try:
        for dm in [dtrain] + [d for d, _ in evals]:
            if any(dm is s[0] for s in shifted):
                continue
            o, original = _offset_of(dm, fam)
            if o is not None:
                dm.set_base_margin(o + baseline)
                shifted.append((dm, original))
        # both paths also return the training raw scores of the final model when the
        # family has nuisance parameters to fit (dtrain still carries offset + baseline)
        if leaf_refit:
            booster, extra, train_raw = _train_refit(xgb, obj, fam, params, dtrain, y, w, offset, baseline,
                                                     num_boost_round, evals, feval, engine_kwargs)
        else:
            twin = _native_twin(fam, obj, leaf_refit, params) if builtin_if_exact else None
            if twin is not None:
                params["objective"] = twin
            if twin == "count:poisson":  # its base_score is a mean; its metric inputs are means
                params["base_score"] = math.exp(baseline)
                feval = _MeanScaleMetric(feval)
            booster, extra, train_raw = _train_engine(xgb, None if twin else obj, params, dtrain, num_boost_round,
                                                      evals, feval, engine_kwargs, bool(fam.params))
            extra["engine_objective"] = twin or "custom"
    finally:
        for dm, original in shifted:
            dm.set_base_margin(original)

    extra.update(step_cap=obj.step_cap, hessian_damping=obj.damping, leaf_refit=bool(leaf_refit),
                 training_params=train_fam.params)
    fitted = fam.fit_nuisance(y, np.asarray(train_raw, dtype=np.float64), w) if fam.params else fam
    return BoostedLossModel(booster, fam, baseline, fitted, extra)


def _train_engine(xgb, obj, params, dtrain, num_boost_round, evals, feval, kw, want_raw):
    if evals:
        kw = dict(kw, custom_metric=feval, maximize=False)
    keep = None
    if want_raw:
        # read the training raw scores before xgb.train drops its prediction cache
        class _KeepTrainingRaw(xgb.callback.TrainingCallback):
            raw = None

            def after_training(self, model):
                self.raw = model.predict(dtrain, output_margin=True)
                return model

        keep = _KeepTrainingRaw()
        kw = dict(kw, callbacks=list(kw.get("callbacks") or []) + [keep])
    booster = xgb.train(params, dtrain, num_boost_round, evals=evals, obj=obj, **kw)
    extra = {}
    best = _best_iteration(booster) if kw.get("early_stopping_rounds") else None
    raw = None if keep is None else keep.raw
    if best is not None and best + 1 < booster.num_boosted_rounds():
        booster = booster[: best + 1]
        raw = None if keep is None else booster.predict(dtrain, output_margin=True)
    if best is not None:
        extra["best_iteration"] = best
    return booster, extra, raw


def _best_iteration(booster):
    try:
        return int(booster.best_iteration)
    except AttributeError:
        return None


def _train_refit(xgb, obj, fam, params, dtrain, y, w, offset, baseline, num_boost_round, evals, feval, kw):
    allowed = {"early_stopping_rounds", "evals_result", "verbose_eval"}
    unknown = sorted(set(kw) - allowed)
    if unknown:
        raise ValueError(
            f"with leaf_refit lossfam runs the boosting rounds itself and does not accept {unknown}; "
            f"it accepts evals, custom_metric and {sorted(allowed)}"
        )
    if int(params.get("num_parallel_tree", 1)) != 1 or params.get("booster", "gbtree") != "gbtree":
        raise ValueError("leaf_refit needs one tree per round (booster='gbtree', num_parallel_tree=1)")
    stop_rounds = kw.get("early_stopping_rounds")
    history = kw.get("evals_result")
    verbose = kw.get("verbose_eval", True)  # the engine's default
    eta = float(params.get("learning_rate", params.get("eta", 0.3)))

    booster = xgb.Booster(params, [dtrain] + [d for d, _ in evals])
    raw = np.full(y.shape, baseline) if offset is None else offset + baseline
    eval_state = []
    for d, name in evals:
        o, _ = _offset_of(d, fam)  # already shifted by the baseline
        start = np.full(d.num_row(), baseline) if o is None else o.copy()
        eval_state.append((d, name, start))
    log = {name: {} for _, name in evals}
    tables = []
    best_score, best_iter = math.inf, None
    for i in range(num_boost_round):
        g, h = obj.gradients(y, raw, w)
        booster.boost(dtrain, i, grad=g, hess=h)
        del g, h
        tree = booster[i : i + 1]
        leaves = np.asarray(tree.predict(dtrain, pred_leaf=True), dtype=np.intp).reshape(-1)
        table = _refit_table(obj.family, y, w, raw, leaves, eta)
        tables.append(table)
        raw += table[leaves]
        for d, name, r in eval_state:
            lv = np.asarray(tree.predict(d, pred_leaf=True), dtype=np.intp).reshape(-1)
            r += table[lv]
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
    extra = {}
    if stop_rounds and best_iter is not None:
        extra["best_iteration"] = best_iter
        if best_iter + 1 < booster.num_boosted_rounds():
            booster = booster[: best_iter + 1]
    # the engine's float32 sums of the written leaves (the tracked raw differs in the last bits)
    train_raw = booster.predict(dtrain, output_margin=True) if fam.params else None
    return booster, extra, train_raw


def _refit_table(fam, y, w, raw, leaves, eta):
    """Leaf-node id -> eta * (the family's baseline of the leaf's rows given their raw score), float32-exact."""
    order = np.argsort(leaves, kind="stable")
    sorted_leaves = leaves[order]
    cuts = np.flatnonzero(np.diff(sorted_leaves)) + 1
    starts = np.concatenate(([0], cuts))
    ends = np.concatenate((cuts, [leaves.size]))
    table = np.zeros(int(sorted_leaves[-1]) + 1, dtype=np.float64)
    for s, e in zip(starts, ends):
        rows = order[s:e]
        wl = np.ones(e - s) if w is None else w[rows]
        if not wl.sum() > 0:
            continue  # no weighted row: the leaf keeps no mass, value 0
        c = fam._baseline(y[rows], wl, raw[rows])
        table[sorted_leaves[s]] = np.float32(eta * c)
    return table


def _write_leaf_values(xgb, booster, tables):
    """Put the refit leaf values into the booster (one JSON edit at the end)."""
    import json

    doc = json.loads(bytes(booster.save_raw("json")))
    trees = doc["learner"]["gradient_booster"]["model"]["trees"]
    if len(trees) != len(tables):
        raise RuntimeError(f"expected {len(tables)} trees in the booster, found {len(trees)}")
    for tree, table in zip(trees, tables):
        left = tree["left_children"]
        cond = tree["split_conditions"]
        for node in range(len(left)):
            if left[node] == -1:
                cond[node] = float(table[node]) if node < table.size else 0.0
    out = xgb.Booster()
    out.load_model(bytearray(json.dumps(doc).encode("utf-8")))
    return out
