"""A linear model for each raw score of a several-score family, fitted by joint maximum likelihood.

See ``lossfam/_sk/_joint.py`` for the objective and the solver.
"""
from __future__ import annotations

import numbers
import warnings

import numpy as np
from sklearn.base import BaseEstimator, RegressorMixin
from sklearn.exceptions import ConvergenceWarning
from sklearn.utils.validation import check_is_fitted, validate_data

from .. import _checks
from ..families._several import SeveralScoreFamily
from ..registry import family as make_family
from . import _joint
from .linear import (_check_finite_rows, _check_hyper, _check_numeric_columns, _check_sample_weight,
                     _prevalidate_y)


def _check_offset(offset, n, k, owner):
    """None, or the (n, k) offset: a (n,) offset is added to the location column only."""
    if offset is None:
        return None
    o = _checks.as_float_array(offset, "offset", owner)
    if o.ndim == 1 and o.shape[0] == n:
        full = np.zeros((n, k))
        full[:, 0] = o
        o = full
    if o.shape != (n, k):
        raise ValueError(f"{owner}: offset has shape {o.shape} but X has {n} rows and the family {k} raw "
                         f"scores; pass ({n},) (added to the location) or ({n}, {k})")
    _checks.REAL.check(o, "offset", owner)
    return np.ascontiguousarray(o)


class JointLikelihoodRegressor(RegressorMixin, BaseEstimator):
    """Linear model for every raw score of a several-score family, by joint maximum likelihood.

    For a family with k raw scores (column 0 the location, the others its scale or shape, each on
    its own link; :class:`lossfam.SeveralScoreFamily`) the model is

        raw_ij = x_i . coef_[j] + intercept_[j] + offset_ij,

    a linear predictor for each distribution parameter, e.g. for ``gaussian_spread`` the mean is
    linear in x and log sigma is linear in x: the varying-dispersion model of Smyth (1989,
    "Generalized linear models with varying dispersion", JRSS B 51).  All k coefficient vectors
    are fitted together by maximising

        (1 / sum w) sum_i w_i log p(y_i | raw_i) - alpha / 2 sum_j ||coef_[j]||^2

    by Newton's method on the joint system with the family's exact Hessian (Fisher scoring where
    the exact matrix is not positive definite) and a line search (``lossfam._sk._joint``).

    Parameters
    ----------
    family : str or lossfam.SeveralScoreFamily, default="gaussian_spread"
    family_params : dict or None
        Fixed parameters of the family (e.g. ``{"quantile": 0.9}``).
    alpha : float >= 0, default=0.0
        Ridge penalty on every coefficient (not on the intercepts).
    fit_intercept : bool, default=True
        One intercept per raw score.
    scale_features : None, list of column indices or names, or boolean mask, default=None
        The columns of X that enter the raw scores after the location (scale, shape): None uses
        every column for every raw score; a list selects columns (names need a DataFrame); an
        empty list gives a constant scale (intercept only), the one-score family's model with its
        nuisance parameters fitted jointly.  The location always uses every column.  Columns left
        out have coefficient exactly 0 in ``coef_``.
    max_iter : int, default=100
    tol : float, default=1e-8
        Stop when max |dF/dtheta| / c <= tol, c = sqrt(mean_w x_j^2) for the coefficient of
        column j (1 for an intercept): the gradient for standardised columns.

    Attributes
    ----------
    coef_ : (k, p) array, row j the coefficients of raw score j (structural zeros for columns
        left out by ``scale_features``)
    intercept_ : (k,) array
    family_ : the SeveralScoreFamily
    scale_features_ : (p,) boolean mask of the columns used by raw scores 1..k-1
    n_iter_ : Newton (or Fisher-scoring) steps taken
    n_fisher_steps_ : steps that used the expected information
    n_features_in_, feature_names_in_ (pandas input), fitted_with_offset_

    ``predict`` gives the location (mean, median or quantile, ``family_.prediction_kind``);
    ``predict_raw`` all k raw scores; ``predict_parameters`` the distribution parameters;
    ``predict_distribution`` the per-row law; ``score`` is scikit-learn's R^2 of ``predict``
    (a regressor's default; the held-out nll of ``predict_distribution`` is the likelihood score).
    """

    def __init__(self, family="gaussian_spread", family_params=None, alpha=0.0, fit_intercept=True,
                 scale_features=None, max_iter=100, tol=1e-8):
        self.family = family
        self.family_params = family_params
        self.alpha = alpha
        self.fit_intercept = fit_intercept
        self.scale_features = scale_features
        self.max_iter = max_iter
        self.tol = tol

    def _make_family(self):
        fam = make_family(self.family, **(self.family_params or {}))
        if not isinstance(fam, SeveralScoreFamily):
            raise ValueError(f"{type(self).__name__}: {fam.name} has one raw score per row; use "
                             "LikelihoodRegressor for it, or a family with several raw scores "
                             f"({', '.join(_several_names())})")
        return fam

    def __sklearn_tags__(self):
        tags = super().__sklearn_tags__()
        try:
            fam = self._make_family()
        except Exception:  # invalid parameters are reported by fit, not here
            return tags
        tags.target_tags.positive_only = not bool(fam.target_domain.inside(np.array([-1.0]))[0])
        return tags

    def _scale_mask(self, p):
        spec = self.scale_features
        owner = type(self).__name__
        if spec is None:
            return np.ones(p, dtype=bool)
        arr = np.asarray(spec)
        if arr.dtype == bool:
            if arr.shape != (p,):
                raise ValueError(f"{owner}: scale_features as a mask needs {p} entries, got shape {arr.shape}")
            return arr.copy()
        mask = np.zeros(p, dtype=bool)
        names = getattr(self, "feature_names_in_", None)
        for item in list(spec):
            if isinstance(item, str):
                if names is None:
                    raise ValueError(f"{owner}: scale_features names a column ({item!r}) but X has no "
                                     "column names (pass a DataFrame, or column indices)")
                hit = np.flatnonzero(names == item)
                if hit.size == 0:
                    raise ValueError(f"{owner}: scale_features names {item!r}, which is not a column of X; "
                                     f"columns: {list(names)}")
                mask[hit[0]] = True
            elif isinstance(item, numbers.Integral) and not isinstance(item, bool) and -p <= item < p:
                mask[item] = True
            else:
                raise ValueError(f"{owner}: scale_features entries must be column names or indices in "
                                 f"[0, {p}), got {item!r}")
        return mask

    def fit(self, X, y, sample_weight=None, offset=None):
        """Fit every raw score's coefficients; ``offset`` (n,) is added to the location's raw score,
        (n, k) to every raw score."""
        _check_hyper(self)
        fam = self._make_family()
        owner = type(self).__name__
        _check_numeric_columns(X, owner)
        if y is not None:
            _prevalidate_y(fam, y)
        X, y = validate_data(self, X, y, dtype=np.float64, order="C", y_numeric=True, ensure_all_finite=False)
        _check_finite_rows(X, owner)
        y = fam.check_target(y, for_nll=False)
        w = _check_sample_weight(sample_weight, y, owner)
        n, p = X.shape
        k = fam.n_scores
        if np.count_nonzero(w) < 2:
            raise ValueError(f"{owner}: a location and a scale need at least two rows with positive weight; "
                             f"got n_samples={n} ({np.count_nonzero(w)} with positive weight)")
        offset = _check_offset(offset, n, k, owner)
        self.fitted_with_offset_ = offset is not None and bool(np.any(offset != 0))
        smask = self._scale_mask(p)
        masks = [np.ones(p, dtype=bool)] + [smask] * (k - 1)
        start = fam.baseline(y, w, offset=offset) if self.fit_intercept else np.zeros(k)
        v = w / w.sum()
        fit = _joint.joint_newton(fam, X, y, v, offset, masks, float(self.alpha), self.fit_intercept,
                                  self.max_iter, self.tol, start)
        coef = np.zeros((k, p))
        for j, m in enumerate(masks):
            coef[j, m] = fit.coefs[j]
        self.coef_ = coef
        self.intercept_ = fit.intercepts
        self.family_ = fam
        self.scale_features_ = smask
        self.n_iter_ = int(fit.n_iter)
        self.n_fisher_steps_ = int(fit.fisher_steps)
        if not fit.converged:
            warnings.warn(
                f"{owner} ({fam.name}): the joint Newton iteration stopped after {fit.n_iter} steps with "
                f"max |gradient| = {fit.grad_norm:.3g} > tol = {self.tol}; the likelihood may have no "
                "finite maximiser (a scale that can shrink to 0 on rows fitted exactly); raise max_iter, "
                "use fewer scale_features or add a ridge penalty (alpha > 0)",
                ConvergenceWarning, stacklevel=2)
        return self

    def predict_raw(self, X, offset=None):
        """(n, k): every raw score, offset included."""
        check_is_fitted(self)
        owner = type(self).__name__
        _check_numeric_columns(X, owner)
        X = validate_data(self, X, reset=False, dtype=np.float64, ensure_all_finite=False)
        _check_finite_rows(X, owner)
        raw = X @ self.coef_.T + self.intercept_
        o = _check_offset(offset, X.shape[0], self.coef_.shape[0], owner)
        return raw if o is None else raw + o

    def predict(self, X, offset=None):
        """The location on the response scale (``family_.location``: mean, median or quantile)."""
        raw = self.predict_raw(X, offset)
        return self.family_.location(raw)

    def predict_parameters(self, X, offset=None):
        """(n, k): each distribution parameter through its inverse link (``family_.parameters``)."""
        raw = self.predict_raw(X, offset)
        return self.family_.parameters(raw)

    def predict_distribution(self, X, offset=None):
        """The predictive law of each row, with its own scale: ``family_.distribution(raw)``."""
        raw = self.predict_raw(X, offset)
        return self.family_.distribution(raw)


def _several_names():
    from ..registry import available

    return available(scores="several")
