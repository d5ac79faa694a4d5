"""Gradient-boosted trees trained on a family's nll: wrappers around LightGBM and XGBoost estimators.

``BoostedLikelihoodRegressor(estimator, family)`` takes an (unfitted) ``LGBMRegressor``
or ``XGBRegressor`` and, at fit time, trains a clone of it with

* objective   -- ``lossfam.lightgbm.objective(family)`` / ``lossfam.xgboost.objective(family)``;
* start score -- ``b = family.baseline(y, w, offset=o)``: passed as ``init_score``
  (LightGBM) or ``base_margin`` (XGBoost) equal to ``b + o``, for the training
  set and every evaluation set (the engines estimate no intercept under a
  custom objective, and ``base_margin`` replaces XGBoost's ``base_score``);
* metric      -- ``lossfam.<engine>.metric(family)`` (mean nll, named
  ``"<family>_nll"``) in place of the engine's default metric, so early
  stopping watches the likelihood;
* prediction  -- raw score = trees + b + offset (``predict(raw_score=True)`` /
  ``predict(output_margin=True, base_margin=b + o)``), mean = inverse link.

After fit, ``family_`` holds the nuisance parameters at their maximum-likelihood
values given the training raw scores (``family.fit_nuisance``).  For laplace and
asymmetric_laplace the scale is first fitted at the baseline (their location
minimiser does not depend on it; it sets the surrogate Hessian's floor in the
units of y).  These wrappers use the engines' scikit-learn ``fit``: the leaf
refit to exact medians / quantiles that ``lossfam.lightgbm.train`` and
``lossfam.xgboost.train`` perform for laplace and asymmetric_laplace is not
done here, so those families train on the surrogate (IRLS) Hessian alone.

``BoostedLikelihoodClassifier(estimator)`` is the bernoulli family as a binary
classifier (``classes_``, ``predict_proba``, ``decision_function``); it
accepts a LightGBM or XGBoost regressor or classifier.

All parameters, including the nested estimator's (``estimator__n_estimators``),
go through ``get_params`` / ``set_params``, and ``sklearn.base.clone`` works;
the given estimator is never modified (a clone is fitted, ``estimator_``).
"""
from __future__ import annotations

import numpy as np
from sklearn.base import BaseEstimator, ClassifierMixin, RegressorMixin, clone, is_classifier
from sklearn.utils.multiclass import check_classification_targets, type_of_target
from sklearn.utils.validation import check_is_fitted, column_or_1d, validate_data

from ..families import AsymmetricLaplace, Laplace
from ..registry import family as make_family
from .linear import _check_offset, _check_sample_weight, _RawScoreRegressorMethods


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


class _BoostBase(BaseEstimator):
    """Shared fitting and prediction of the two wrappers."""

    def _validate_Xy(self, X, y):
        """Validate training data: X as in _validate_X, y one-dimensional (a column is flattened with a warning)."""
        if y is None:
            raise ValueError(f"{type(self).__name__} requires y to be passed, but the target y is None")
        if _is_frame(X):
            validate_data(self, X, reset=True, skip_check_array=True)
            return X, column_or_1d(y, warn=True)
        return validate_data(self, X, y, dtype=np.float64, ensure_all_finite="allow-nan")

    def _validate_X(self, X, reset):
        if _is_frame(X):  # pass data frames through (categorical columns stay categorical)
            validate_data(self, X, reset=reset, skip_check_array=True)
            return X
        return validate_data(self, X, reset=reset, dtype=np.float64, ensure_all_finite="allow-nan")

    def _fit_engine(self, fam, X, y, w, offset, eval_set, fit_params):
        owner = type(self).__name__
        base = self.estimator if self.estimator is not None else _default_estimator()
        engine = _engine_of(base, owner)
        if engine == "lightgbm":
            from .. import lightgbm as adapter
        else:
            from .. import xgboost as adapter
        unit_w = None if np.all(w == 1.0) else w
        baseline = fam.baseline(y, unit_w, offset=offset)
        if isinstance(fam, (Laplace, AsymmetricLaplace)):
            start = np.full_like(y, baseline) if offset is None else baseline + offset
            try:
                fam = fam.fit_nuisance(y, start, unit_w)
            except ValueError:
                pass  # every residual is zero at the baseline: keep the given scale
        est = clone(base)
        start = np.full(y.shape, baseline) if offset is None else baseline + offset
        evals = []
        for k, item in enumerate(eval_set or []):
            if len(item) not in (2, 3):
                raise ValueError(f"{owner}: eval_set[{k}] must be (X, y) or (X, y, offset)")
            Xe = self._validate_X(item[0], reset=False)
            ye = fam.check_target(np.asarray(item[1], dtype=float).reshape(-1), for_nll=True)
            if ye.shape[0] != Xe.shape[0]:
                raise ValueError(f"{owner}: eval_set[{k}] has {Xe.shape[0]} rows in X but {ye.shape[0]} targets")
            oe = _check_offset(item[2] if len(item) == 3 else None, ye.shape[0], owner)
            evals.append((Xe, ye, baseline + (0.0 if oe is None else oe) + np.zeros(ye.shape)))
        kwargs = dict(fit_params)
        if engine == "lightgbm":
            est.set_params(objective=adapter.objective(fam), metric="None")
            if evals:
                kwargs.update(eval_X=tuple(e[0] for e in evals), eval_y=tuple(e[1] for e in evals),
                              eval_init_score=[e[2] for e in evals], eval_metric=adapter.metric(fam))
            est.fit(X, y, sample_weight=unit_w, init_score=start, **kwargs)
        else:
            est.set_params(objective=adapter.objective(fam), eval_metric=adapter.metric(fam),
                           disable_default_eval_metric=True)
            if evals:
                kwargs.update(eval_set=[(e[0], e[1]) for e in evals],
                              base_margin_eval_set=[e[2] for e in evals])
                kwargs.setdefault("verbose", False)
            est.fit(X, y, sample_weight=unit_w, base_margin=start, **kwargs)
        self.estimator_ = est
        self.engine_ = engine
        self.baseline_ = float(baseline)
        raw = self._raw(X, offset)
        try:
            self.family_ = fam.fit_nuisance(y, raw, unit_w)
        except ValueError:
            self.family_ = fam  # zero residuals: the nuisance parameters keep their values
        return self

    def _raw(self, X, offset):
        n = X.shape[0]
        start = np.full(n, self.baseline_)
        if offset is not None:
            start = start + offset
        if self.engine_ == "lightgbm":
            return np.asarray(self.estimator_.predict(X, raw_score=True), dtype=float).reshape(-1) + start
        return np.asarray(self.estimator_.predict(X, output_margin=True, base_margin=start), dtype=float).reshape(-1)

    def _raw_score(self, X, offset):
        check_is_fitted(self)
        X = self._validate_X(X, reset=False)
        offset = _check_offset(offset, X.shape[0], type(self).__name__)
        return self._raw(X, offset)


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
    estimator_ (the fitted clone), engine_ ("lightgbm" or "xgboost"), baseline_
    (the starting raw score), family_ (nuisance parameters fitted by maximum
    likelihood on the training data), n_features_in_, feature_names_in_.
    """

    def __init__(self, estimator=None, family="gaussian", family_params=None):
        self.estimator = estimator
        self.family = family
        self.family_params = family_params

    def __sklearn_tags__(self):
        tags = super().__sklearn_tags__()
        tags.input_tags.allow_nan = True
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
        if y.shape[0] != X.shape[0]:
            raise ValueError(f"{owner}: X has {X.shape[0]} rows but y has {y.shape[0]}")
        w = _check_sample_weight(sample_weight, y, owner)
        offset = _check_offset(offset, y.shape[0], owner)
        return self._fit_engine(fam, X, y, w, offset, eval_set, fit_params)



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
        tags.classifier_tags.multi_class = False
        return tags

    def fit(self, X, y, sample_weight=None, offset=None, eval_set=None, **fit_params):
        owner = type(self).__name__
        X, y = self._validate_Xy(X, y)
        if y.shape[0] != X.shape[0]:
            raise ValueError(f"{owner}: X has {X.shape[0]} rows but y has {y.shape[0]}")
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
