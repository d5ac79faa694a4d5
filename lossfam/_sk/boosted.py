"""Gradient-boosted trees trained on a family's nll: scikit-learn wrappers around the engines' ``train``.

``BoostedLikelihoodRegressor(estimator, family)`` takes an (unfitted)
``LGBMRegressor`` or ``XGBRegressor`` for its settings only.  ``fit`` turns
them into the engine's training parameters (``n_estimators`` rounds, the
rest as given) and calls ``lossfam.lightgbm.train`` / ``lossfam.xgboost.train``,
so the wrapper trains exactly what ``train`` trains: the same baseline,
nuisance pre-fit, native twin, guard, leaf refit and metric.  The trained
:class:`lossfam.BoostedFit` is ``model_`` (``model_.save(path)``,
``lossfam.load(path)``); ``family_`` holds the nuisance parameters fitted on
the training data, ``baseline_`` the starting raw score and
``evals_result_`` the metric log of ``eval_set``.

``fit(X, y, sample_weight=None, offset=None, eval_set=None, **fit_params)``:
``offset`` is a per-row raw-scale term; ``eval_set`` a list of ``(X, y)`` or
``(X, y, offset)`` (with a training offset every evaluation set needs its
own).  ``y`` (in ``fit``, ``eval_set`` and ``score``) may be a
:class:`lossfam.censoring.IntervalTarget` (censored and interval rows), as for
``LikelihoodRegressor``: the engines then train on the censored likelihood
(``lossfam.lightgbm.censored_dataset``, ``lossfam.xgboost.censored_dmatrix``),
the eval-set metric is the censored nll, and ``score`` (D^2, built on the unit
deviance) refuses censored rows: score them with ``lossfam.sklearn.scorer(family, "nll")``.  Engine keywords: LightGBM ``callbacks`` (e.g.
``lightgbm.early_stopping(k)``), XGBoost ``verbose``; XGBoost's
``early_stopping_rounds`` is read from the estimator.  ``X`` may be a numpy
array, a pandas DataFrame or a scipy sparse matrix.

A family with several raw scores per row (``lossfam.SeveralScoreFamily``, e.g. gaussian_spread)
trains the same way (``model_`` is then a :class:`lossfam.SeveralScoreFit`, ``baseline_`` a
k-vector): ``predict`` gives the location, ``predict_raw`` all k raw scores (n, k),
``predict_distribution`` the per-row law and ``score`` minus the mean nll; ``offset`` goes to the
location's raw score.

``BoostedLikelihoodClassifier(estimator)`` is the bernoulli family as a binary
classifier (``classes_``, ``predict_proba``, ``decision_function``); it
accepts a LightGBM or XGBoost regressor or classifier.

All parameters, including the nested estimator's (``estimator__n_estimators``),
go through ``get_params`` / ``set_params``, and ``sklearn.base.clone`` works;
the given estimator is never modified.
"""
from __future__ import annotations

import numpy as np
from sklearn.base import BaseEstimator, ClassifierMixin, RegressorMixin, is_classifier
from sklearn.metrics import accuracy_score
from sklearn.utils.multiclass import check_classification_targets, type_of_target
from sklearn.utils.validation import check_is_fitted, column_or_1d, validate_data

from .. import _checks
from .._boost.several import SeveralScorer, is_several
from ..censoring import IntervalTarget
from ..registry import family as make_family
from .linear import _check_offset, _check_sample_weight, _RawScoreRegressorMethods, _warn_missing_offset

#: estimator parameters that are not training parameters of the engine
_NOT_ENGINE = {
    "lightgbm": ("n_estimators", "objective", "class_weight", "importance_type", "metric"),
    "xgboost": ("objective", "base_score", "eval_metric"),
}


def _engine_of(estimator, owner):
    mod = type(estimator).__module__.split(".")[0]
    if mod in ("lightgbm", "xgboost"):
        return mod
    raise ValueError(
        f"{owner}: estimator must be a LightGBM or XGBoost scikit-learn estimator "
        f"(e.g. lightgbm.LGBMRegressor() or xgboost.XGBRegressor()), got {type(estimator).__name__}"
    )


def _default_estimator():
    try:
        import lightgbm
    except ImportError:  # pragma: no cover - lightgbm is a declared extra
        raise ImportError(
            'the default estimator is lightgbm.LGBMRegressor; install it with pip install "lossfam[lightgbm]" '
            "or pass estimator=xgboost.XGBRegressor()"
        ) from None
    return lightgbm.LGBMRegressor(verbose=-1)


def _is_frame(X):
    return hasattr(X, "columns") and hasattr(X, "iloc")


def _check_labels_finite(y, owner):
    """Refuse NaN / infinite labels naming the rows (numeric y only; class labels may be strings)."""
    arr = np.asarray(y)
    if arr.dtype.kind == "f" or arr.dtype.kind == "c":
        _checks.REAL.check(arr.astype(np.float64, copy=False).reshape(-1), "y", owner)


def _engine_settings(base, engine):
    """(training parameters, rounds, early_stopping_rounds) from the estimator's settings."""
    if engine == "lightgbm":
        params = base.get_params(deep=False)
        rounds = int(params["n_estimators"])
        early = None
    else:
        params = base.get_xgb_params()
        rounds = 100 if base.n_estimators is None else int(base.n_estimators)
        early = base.early_stopping_rounds
    params = {k: v for k, v in params.items() if v is not None and k not in _NOT_ENGINE[engine]}
    return params, rounds, early


class _BoostBase(BaseEstimator):
    """Shared fitting and prediction of the two wrappers."""

    def _validate_X(self, X, reset):
        if _is_frame(X):  # pass data frames through (categorical columns stay categorical)
            validate_data(self, X, reset=reset, skip_check_array=True)
            return X
        return validate_data(self, X, reset=reset, dtype=np.float64, ensure_all_finite="allow-nan",
                             accept_sparse=("csr", "csc"))

    def _validate_Xy(self, X, y):
        """X as in _validate_X; y one-dimensional (a column is flattened with a warning), finite."""
        owner = type(self).__name__
        if y is None:
            raise ValueError(f"{owner} requires y to be passed, but the target y is None")
        X = self._validate_X(X, reset=True)
        if isinstance(y, IntervalTarget):  # censored rows: the bounds are checked by the family
            if y.size != X.shape[0]:
                raise ValueError(f"{owner}: X has {X.shape[0]} rows but the target has {y.size}")
            return X, y
        y = column_or_1d(y, warn=True)
        _check_labels_finite(y, owner)
        if y.shape[0] != X.shape[0]:
            raise ValueError(f"{owner}: X has {X.shape[0]} rows but y has {y.shape[0]}")
        return X, y

    def _fit_engine(self, fam, X, y, w, offset, eval_set, fit_params):
        owner = type(self).__name__
        base = self.estimator if self.estimator is not None else _default_estimator()
        engine = _engine_of(base, owner)
        unit_w = None if np.all(w == 1.0) else w
        evals = []
        for k, item in enumerate(eval_set or []):
            if len(item) not in (2, 3):
                raise ValueError(f"{owner}: eval_set[{k}] must be (X, y) or (X, y, offset)")
            Xe = self._validate_X(item[0], reset=False)
            ye = item[1]
            if not isinstance(ye, IntervalTarget):
                ye = np.asarray(ye, dtype=float).reshape(-1)
                _check_labels_finite(ye, f"{owner} eval_set[{k}]")
            ye = fam.check_target(ye, for_nll=True)
            if ye.shape[0] != Xe.shape[0]:
                raise ValueError(f"{owner}: eval_set[{k}] has {Xe.shape[0]} rows in X but {ye.shape[0]} targets")
            oe = _check_offset(item[2] if len(item) == 3 else None, ye.shape[0], owner)
            if offset is not None and oe is None:
                raise ValueError(f"{owner}: fit used an offset but eval_set[{k}] has none; pass (X, y, offset) "
                                 "(zeros where there truly is none), or its metric would be wrong")
            evals.append((Xe, ye, oe))
        params, rounds, early = _engine_settings(base, engine)
        kwargs = dict(fit_params)
        history = {}
        if engine == "lightgbm":
            import lightgbm as lgb

            from .. import lightgbm as adapter

            known = {"callbacks", "categorical_feature", "feature_name"}
            unknown = sorted(set(kwargs) - known)
            if unknown:
                raise ValueError(f"{owner}: unknown fit keyword(s) {unknown} for LightGBM; accepted: {sorted(known)}")
            ds_kw = {k: kwargs.pop(k) for k in ("categorical_feature", "feature_name") if k in kwargs}
            def dataset(Xd, yd, **kw):  # censored rows: the bounds travel with the Dataset
                if isinstance(yd, IntervalTarget):
                    return adapter.censored_dataset(Xd, yd, free_raw_data=False, **kw)
                return lgb.Dataset(Xd, yd, free_raw_data=False, **kw)

            dtrain = dataset(X, y, weight=unit_w, **ds_kw)
            valid = [dataset(Xe, ye, reference=dtrain) for Xe, ye, _ in evals]
            callbacks = list(kwargs.pop("callbacks", None) or [])
            if valid:
                callbacks.append(lgb.record_evaluation(history))
            model = adapter.train(fam, params, dtrain, rounds, valid_sets=valid or None,
                                  valid_names=[f"validation_{k}" for k in range(len(valid))] or None,
                                  valid_offsets=[oe for _, _, oe in evals] if valid else None, offset=offset,
                                  callbacks=callbacks)
        else:
            import xgboost as xgb

            from .. import xgboost as adapter

            known = {"verbose"}
            unknown = sorted(set(kwargs) - known)
            if unknown:
                raise ValueError(f"{owner}: unknown fit keyword(s) {unknown} for XGBoost; accepted: {sorted(known)}")
            dm_kw = dict(missing=base.missing, enable_categorical=base.enable_categorical,
                         feature_types=base.feature_types)
            def dmatrix(Xd, yd, **kw):  # censored rows: XGBoost's label_lower_bound / label_upper_bound
                if isinstance(yd, IntervalTarget):
                    return adapter.censored_dmatrix(Xd, yd, **kw, **dm_kw)
                return xgb.DMatrix(Xd, label=yd, **kw, **dm_kw)

            dtrain = dmatrix(X, y, weight=unit_w, base_margin=offset)
            valid = [(dmatrix(Xe, ye, base_margin=oe), f"validation_{k}") for k, (Xe, ye, oe) in enumerate(evals)]
            model = adapter.train(fam, params, dtrain, rounds, evals=valid, early_stopping_rounds=early if valid else None,
                                  evals_result=history, verbose_eval=bool(kwargs.get("verbose", False)))
        self.model_ = model
        self.fitted_with_offset_ = offset is not None and bool(np.any(offset != 0))
        self.engine_ = engine
        self.baseline_ = model.baseline
        self.family_ = model.fitted_family
        self.evals_result_ = history
        return self

    def _raw_score(self, X, offset):
        check_is_fitted(self)
        X = self._validate_X(X, reset=False)
        offset = _check_offset(offset, X.shape[0], type(self).__name__)
        return self.model_.predict_raw(X, offset)


class BoostedLikelihoodRegressor(_RawScoreRegressorMethods, RegressorMixin, _BoostBase):
    """A LightGBM or XGBoost regressor trained on the nll of a lossfam family.

    Parameters
    ----------
    estimator : LGBMRegressor or XGBRegressor instance, default=None
        The engine and its settings (None: ``lightgbm.LGBMRegressor(verbose=-1)``).
        Its ``objective`` (and metric) are replaced by the family's.
    family : str or lossfam.Family, default="gaussian"
    family_params : dict or None
        Nuisance parameters of the family, used during training (e.g. huber's
        delta and scale, asymmetric_laplace's quantile).

    Attributes
    ----------
    model_ (the trained :class:`lossfam.BoostedFit`: ``save``, ``booster``),
    engine_ ("lightgbm" or "xgboost"), baseline_ (the starting raw score),
    family_ (nuisance parameters fitted by maximum likelihood on the training
    data), evals_result_ (metric log of ``eval_set``), n_features_in_,
    feature_names_in_.
    """

    def __init__(self, estimator=None, family="gaussian", family_params=None):
        self.estimator = estimator
        self.family = family
        self.family_params = family_params

    def __sklearn_tags__(self):
        tags = super().__sklearn_tags__()
        tags.input_tags.allow_nan = True
        tags.input_tags.sparse = True
        try:
            fam = make_family(self.family, **(self.family_params or {}))
        except Exception:
            return tags
        tags.target_tags.positive_only = not bool(fam.target_domain.inside(np.array([-1.0]))[0])
        return tags

    def fit(self, X, y, sample_weight=None, offset=None, eval_set=None, **fit_params):
        """Train the trees; ``offset`` is a per-row raw-scale offset, ``eval_set`` a list of
        ``(X, y)`` or ``(X, y, offset)``; other keyword arguments go to the engine's ``fit``."""
        owner = type(self).__name__
        if self.estimator is not None and is_classifier(self.estimator):
            raise ValueError(f"{owner}: got a classifier; use BoostedLikelihoodClassifier for class labels")
        fam = make_family(self.family, **(self.family_params or {}))
        X, y = self._validate_Xy(X, y)
        y = fam.check_target(y, for_nll=False)
        w = _check_sample_weight(sample_weight, y.lower if isinstance(y, IntervalTarget) else y, owner)
        offset = _check_offset(offset, y.shape[0], owner)
        return self._fit_engine(fam, X, y, w, offset, eval_set, fit_params)

    def predict(self, X, offset=None):
        """The prediction on the response scale: the inverse link of the raw score (mean, median or
        quantile); for a family with several raw scores per row, its location (``family.location``)."""
        raw = self._raw_score(X, offset)
        if is_several(self.family_):
            return self.family_.location(raw)
        return self.family_.inverse_link(raw)

    def score(self, X, y, sample_weight=None, offset=None):
        """D^2 (fraction of deviance explained; see ``_RawScoreRegressorMethods.score``); for a
        family with several raw scores per row, which has no deviance, minus the weighted mean nll
        (higher is better, as scikit-learn's model selection expects)."""
        check_is_fitted(self)
        if not is_several(self.family_):
            return super().score(X, y, sample_weight=sample_weight, offset=offset)
        _warn_missing_offset(self, offset)
        fam = self.family_
        y = fam.check_target(np.asarray(y, dtype=np.float64).reshape(-1))
        w = None if sample_weight is None else _check_sample_weight(sample_weight, y, type(self).__name__)
        return -SeveralScorer(fam).value(y, self._raw_score(X, offset), w)



class BoostedLikelihoodClassifier(ClassifierMixin, _BoostBase):
    """A LightGBM or XGBoost model trained on the Bernoulli nll (log loss) as a binary classifier.

    ``estimator`` may be a regressor or a classifier of either engine (None:
    ``lightgbm.LGBMRegressor(verbose=-1)``); it only supplies the trees.
    The positive class is ``classes_[1]``.
    """

    def __init__(self, estimator=None):
        self.estimator = estimator

    def __sklearn_tags__(self):
        tags = super().__sklearn_tags__()
        tags.input_tags.allow_nan = True
        tags.input_tags.sparse = True
        tags.classifier_tags.multi_class = False
        return tags

    def fit(self, X, y, sample_weight=None, offset=None, eval_set=None, **fit_params):
        owner = type(self).__name__
        X, y = self._validate_Xy(X, y)
        check_classification_targets(y)
        kind = type_of_target(y, input_name="y")
        if kind != "binary":
            raise ValueError(f"Only binary classification is supported. The type of the target is {kind}.")
        self.classes_ = np.unique(y)
        if self.classes_.size < 2:
            raise ValueError(f"{owner} needs two classes to fit; only one class ({self.classes_[0]!r}) is present")
        y01 = (y == self.classes_[1]).astype(np.float64)
        w = _check_sample_weight(sample_weight, y01, owner)
        if np.unique(y01[w > 0]).size < 2:
            raise ValueError(f"{owner} needs two classes with positive sample weight; only one class has it")
        evals = None
        if eval_set:
            evals = [(item[0], (np.asarray(item[1]) == self.classes_[1]).astype(float), *item[2:])
                     for item in eval_set]
        offset = _check_offset(offset, y01.shape[0], owner)
        return self._fit_engine(make_family("bernoulli"), X, y01, w, offset, evals, fit_params)

    def score(self, X, y, sample_weight=None, offset=None):
        """Accuracy of ``predict(X, offset)`` (offset routed as in the regressors' ``score``)."""
        _warn_missing_offset(self, offset)
        return accuracy_score(y, self.predict(X, offset=offset), sample_weight=sample_weight)

    def decision_function(self, X, offset=None):
        """Raw score (log odds of ``classes_[1]``)."""
        return self._raw_score(X, offset)

    def predict_proba(self, X, offset=None):
        raw = self._raw_score(X, offset)
        p = self.family_.inverse_link(raw)
        return np.column_stack([1.0 - p, p])

    def predict(self, X, offset=None):
        raw = self._raw_score(X, offset)
        return self.classes_[(raw > 0).astype(int)]

    def predict_distribution(self, X, offset=None):
        raw = self._raw_score(X, offset)
        return self.family_.distribution(raw)
