"""Linear models fitted by penalised maximum likelihood under any lossfam family.

See ``lossfam/_sk/_solvers.py`` for the objective and the solvers.
"""
from __future__ import annotations

import numbers
import warnings

import numpy as np
from scipy import sparse
from sklearn.base import BaseEstimator, ClassifierMixin, RegressorMixin
from sklearn.exceptions import ConvergenceWarning
from sklearn.metrics import accuracy_score
from sklearn.utils.multiclass import check_classification_targets, type_of_target
from sklearn.utils.validation import check_is_fitted, validate_data

from .. import _checks
from ..families import AsymmetricLaplace, Bernoulli, Gamma, Gaussian, Huber, Laplace, Poisson
from ..censoring import IntervalTarget
from ..families._censored import censored_grad_hess, censored_nll
from ..registry import family as make_family
from . import _solvers
from .metrics import d2_score


class UnboundedLikelihoodWarning(UserWarning):
    """The likelihood has no finite maximiser: the fitted coefficients diverge.

    Issued for an unpenalised (alpha = 0) fit when a direction of the
    coefficients raises the likelihood without bound (found by the linear
    programme of ``_solvers.unbounded_margin``): a binary fit on
    (quasi-)separated classes, where some linear score orders the two labels
    perfectly and fitted probabilities reach 0 or 1; a poisson fit where a
    linear score is negative on some zero counts and zero on all other rows
    (a category whose counts are all zero), whose fitted means reach 0.
    Gamma (log link, y > 0) has no such direction: each row's nll grows both
    ways, so with full-rank X its coefficients always have a finite estimate;
    what can be infinite there is the shape, when every residual is zero (a
    UserWarning then says the shape keeps its given value).  Use alpha > 0 for a finite, penalised estimate.
    """


def _check_hyper(est):
    a = est.alpha
    if isinstance(a, bool) or not isinstance(a, numbers.Real) or not (np.isfinite(a) and a >= 0):
        raise ValueError(f"{type(est).__name__}: alpha must be a finite number >= 0, got {a!r}")
    m = est.max_iter
    if isinstance(m, bool) or not isinstance(m, numbers.Integral) or m < 1:
        raise ValueError(f"{type(est).__name__}: max_iter must be an integer >= 1, got {m!r}")
    t = est.tol
    if isinstance(t, bool) or not isinstance(t, numbers.Real) or not (np.isfinite(t) and t >= 0):
        raise ValueError(f"{type(est).__name__}: tol must be a finite number >= 0, got {t!r}")
    if not isinstance(est.fit_intercept, (bool, np.bool_)):
        raise ValueError(f"{type(est).__name__}: fit_intercept must be True or False, got {est.fit_intercept!r}")


def _check_finite_rows(X, owner):
    """ValueError naming the rows of X that hold NaN or inf (the message contains 'NaN or inf')."""
    if sparse.issparse(X):
        if np.all(np.isfinite(X.data)):
            return
        csr = X.tocsr()
        bad = ~np.isfinite(csr.data)
        row_of = np.repeat(np.arange(csr.shape[0]), np.diff(csr.indptr))
        rows = np.unique(row_of[bad])
        shown = rows[:5]
        first = [int(np.flatnonzero(bad & (row_of == i))[0]) for i in shown]
        noun = "row" if rows.size == 1 else "rows"
        raise ValueError(
            f"{owner}: X contains NaN or inf in {rows.size} {noun}, e.g. {noun} "
            f"[{', '.join(str(int(i)) for i in shown)}] (columns [{', '.join(str(int(csr.indices[k])) for k in first)}]) "
            f"= [{', '.join(repr(float(csr.data[k])) for k in first)}]")
    total = float(np.sum(X)) if X.size else 0.0
    if np.isfinite(total):
        return
    bad_cells = ~np.isfinite(X)
    rows = np.flatnonzero(bad_cells.any(axis=1))
    if rows.size == 0:
        return  # the sum overflowed, every entry is finite
    shown = rows[:5]
    cols = [int(np.flatnonzero(bad_cells[i])[0]) for i in shown]
    vals = ", ".join(repr(float(X[i, j])) for i, j in zip(shown, cols))
    noun = "row" if rows.size == 1 else "rows"
    raise ValueError(
        f"{owner}: X contains NaN or inf in {rows.size} {noun}, e.g. {noun} "
        f"[{', '.join(str(int(i)) for i in shown)}] (columns [{', '.join(map(str, cols))}]) = [{vals}]"
    )


def _check_numeric_columns(X, owner):
    """ValueError naming the non-numeric columns of a DataFrame (before scikit-learn's float conversion)."""
    dtypes = getattr(X, "dtypes", None)
    if dtypes is None or not hasattr(X, "columns"):
        return
    bad = [(str(c), str(t)) for c, t in zip(X.columns, dtypes)
           if getattr(t, "kind", "O") not in "biuf"]
    if bad:
        listed = ", ".join(f"{c!r} ({t})" for c, t in bad[:10])
        raise ValueError(
            f"{owner}: X must hold numbers only; {len(bad)} column{'s' if len(bad) > 1 else ''} "
            f"{'are' if len(bad) > 1 else 'is'} not numeric: {listed}. Encode categories first "
            "(e.g. sklearn.preprocessing.OneHotEncoder, whose sparse output is accepted) and "
            "convert strings to numbers.")


def _validate_X_y(est, X, y, owner, **kw):
    """validate_data for fit: numeric pandas columns, dense float64 X contiguous in either order (a
    DataFrame's column-major values are not copied), or sparse CSR."""
    _check_numeric_columns(X, owner)
    X, y = validate_data(est, X, y, dtype=np.float64, accept_sparse=("csr", "csc"),
                         ensure_all_finite=False, **kw)
    if sparse.issparse(X):
        X = X.tocsr()
        X.sort_indices()
    elif not (X.flags.c_contiguous or X.flags.f_contiguous):
        X = np.ascontiguousarray(X)
    _check_finite_rows(X, owner)
    return X, y


def _prevalidate_y(fam, y):
    """Check numeric targets against the family first, so errors name the offending rows."""
    try:
        arr = np.asarray(y)
    except (TypeError, ValueError):
        return
    if arr.dtype.kind not in "biuf":
        return  # non-numeric or complex targets: scikit-learn's validation reports them
    arr = arr.astype(np.float64, copy=False)
    if arr.ndim == 2 and arr.shape[1] == 1:
        arr = arr[:, 0]
    if arr.ndim == 1:
        fam.check_target(arr, for_nll=False)


def _check_offset(offset, n, owner):
    if offset is None:
        return None
    o = _checks.as_float_array(offset, "offset", owner)
    if o.ndim != 1 or o.shape[0] != n:
        raise ValueError(f"{owner}: offset has shape {o.shape} but X has {n} rows; pass one offset per row")
    _checks.REAL.check(o, "offset", owner)
    return np.ascontiguousarray(o)


def _check_sample_weight(sample_weight, y, owner):
    if sample_weight is None:
        return np.ones_like(y)
    w = _checks.as_float_array(sample_weight, "sample_weight", owner)
    if w.ndim == 0:
        w = np.full_like(y, float(w))
    if w.shape != y.shape:
        raise ValueError(f"{owner}: sample_weight has shape {w.shape} but y has shape {y.shape}")
    _checks.NONNEGATIVE.check(w, "sample_weight", owner)
    if not w.sum() > 0:
        raise ValueError(f"{owner}: sample weights sum to zero; at least one row needs a positive weight")
    return np.ascontiguousarray(w)


def _fit_linear(est, fam, X, y, w, offset, unweighted=False):
    """Solve the penalised problem for ``fam``; return the fit.

    ``unweighted``: no sample weights were given (w is all ones); the family's
    own helpers then get none, which spares them a rescaled copy of w."""
    n, p = X.shape
    v = w / w.sum()
    alpha = float(est.alpha)
    if isinstance(fam, (Laplace, AsymmetricLaplace)):
        if isinstance(fam, AsymmetricLaplace):
            tau, factor = fam.quantile, 1.0 / fam.scale  # nll = rho_tau(r) / b + const
        else:
            tau, factor = 0.5, 2.0 / fam.scale  # nll = |r| / b + const = 2 rho_0.5(r) / b + const
        if alpha > 0:
            return _solvers.ridge_pinball(X, y, v, offset, tau, factor, alpha, est.fit_intercept,
                                          max_iter=max(est.max_iter, 100))
        return _solvers.quantile_lp(X, y, v, offset, tau, est.fit_intercept,
                                    names=getattr(est, "feature_names_in_", None))
    if est.fit_intercept:
        intercept = fam.baseline(y, None if unweighted else w, offset=offset)
    else:
        intercept = 0.0
    coef = np.zeros(p)
    args = (X, y, v, offset, alpha, est.fit_intercept, est.max_iter, est.tol, coef, intercept)
    if isinstance(fam, Huber):
        return _solvers.huber_joint(fam, X, y, w, *args[2:])
    if _joint_nuisance(fam):
        return _solvers.nuisance_joint(fam, X, y, w, *args[2:])
    # built-in families with an nll convex in raw: the cheaper gradient-norm line search
    merit = "gradient" if type(fam) in (Gaussian, Poisson, Gamma, Bernoulli) else "objective"
    return _solvers.newton(fam, *args, merit=merit)


class _CensoredView:
    """A family seen through an IntervalTarget: the hooks the solvers call on (y, raw) evaluate the
    censored likelihood (lossfam.families._censored), so the same Newton iteration (and its
    alternation with the nuisance fit) maximises it.  Not a family: used only inside a fit."""

    def __init__(self, fam):
        self.family = fam
        self.name = fam.name
        self.params = fam.params
        self.exact_hessian = fam.exact_hessian

    def _nll(self, t, raw):
        return censored_nll(self.family, t, raw)

    def _grad_hess(self, t, raw):
        return censored_grad_hess(self.family, t, raw)

    def fit_nuisance(self, t, raw, w):
        return _CensoredView(self.family.fit_nuisance(t, raw, w))


def _fit_censored(est, fam, X, target, sample_weight, offset, owner):
    """Penalised maximum likelihood of a censored target (Tobit for gaussian, accelerated failure
    time for lognormal and weibull): Newton's method on the censored nll from the censored
    baseline, alternated with the nuisance fit (``fam.censored_fit``) until the parameters settle,
    since under censoring the coefficients depend on them.  Families with a surrogate Hessian
    (laplace, student_t) are fitted by direct minimisation of the same objective
    (``_solvers.censored_direct``)."""
    w = _check_sample_weight(sample_weight, target.lower, owner)
    v = w / w.sum()
    intercept = fam.baseline(target, w, offset=offset) if est.fit_intercept else 0.0
    if not fam.exact_hessian and not target.exact.all():
        if fam.censored_fit and fam.params:  # a starting scale for the constant fit
            start = np.full(target.size, intercept) + (0.0 if offset is None else offset)
            fam = fam.fit_nuisance(target, start, w)
        return _solvers.censored_direct(fam, X, target, w, v, offset, float(est.alpha), est.fit_intercept,
                                        est.max_iter, est.tol, np.zeros(X.shape[1]), intercept)
    args = (X, target, w, v, offset, float(est.alpha), est.fit_intercept, est.max_iter, est.tol,
            np.zeros(X.shape[1]), intercept)
    view = _CensoredView(fam)
    if fam.censored_fit and fam.params:
        fit = _solvers.nuisance_joint(view, *args)
    else:
        fit = _solvers.newton(view, args[0], args[1], *args[3:])
        fit.family = view
    fit.family = fit.family.family if isinstance(fit.family, _CensoredView) else fam
    return fit


def _joint_nuisance(fam):
    """The family declares that its location fit depends on its nuisance parameters."""
    return bool(fam.location_needs_nuisance)


def _finish(est, fam, fit, y, w, unweighted=False):
    """Attributes shared by both estimators; nuisance parameters by maximum likelihood
    (``unweighted`` as in ``_fit_linear``)."""
    est.coef_ = fit.coef
    est.intercept_ = float(fit.intercept)
    est.n_iter_ = int(fit.n_iter)
    if not fit.converged:
        warnings.warn(
            f"{type(est).__name__} ({fam.name}): Newton's method stopped after {fit.n_iter} iterations "
            f"with max |gradient| = {fit.grad_norm:.3g} > tol = {est.tol}; raise max_iter or tol, or add "
            "a ridge penalty (alpha > 0) if the design is singular",
            ConvergenceWarning,
            stacklevel=3,
        )
    if fit.family is not None and isinstance(fam, Huber):
        est.family_ = fit.family  # the scale was fitted jointly with the coefficients
        if not fit.nuisance_fitted:
            warnings.warn(
                f"{type(est).__name__}: the residuals vanish as the huber scale shrinks (the model "
                "fits the data exactly), so the scale has no maximum-likelihood value; it keeps the "
                f"value {fit.family.scale:.6g}",
                UserWarning,
                stacklevel=3,
            )
        return
    if _joint_nuisance(fam):
        est.family_ = fit.family  # fitted jointly with the coefficients
        if not fit.nuisance_fitted:
            warnings.warn(
                f"{type(est).__name__}: the nuisance parameters of {fam.name} have no maximum-likelihood "
                f"value here, so they keep the values {fit.family.params}",
                UserWarning,
                stacklevel=3,
            )
        return
    try:
        est.family_ = fam.fit_nuisance(y, fit.raw, None if unweighted else w)
    except ValueError as exc:
        warnings.warn(
            f"{type(est).__name__}: the nuisance parameters of {fam.name} keep their given values "
            f"{fam.params} because they have no maximum-likelihood value here ({exc})",
            UserWarning,
            stacklevel=3,
        )
        est.family_ = fam


def _warn_if_unbounded(est, fam, X, y, w, raw):
    """With alpha = 0, warn when the maximum-likelihood estimate is infinite (UnboundedLikelihoodWarning)."""
    if est.alpha > 0:
        return
    if isinstance(fam, Bernoulli):
        if not max(float(np.max(raw, initial=0.0)), -float(np.min(raw, initial=0.0))) > 13.8:
            return  # no fitted probability within 1e-6 of 0 or 1 (two reductions, no masks)
        sign = 2.0 * y - 1.0
        near = sign * raw > 13.8  # a fitted probability within 1e-6 of its label
        what = ("the two classes are (quasi-)separated by a linear score, so the unpenalised "
                "maximum-likelihood estimate does not exist: coefficients diverge and fitted "
                "probabilities reach 0 or 1")
    elif isinstance(fam, Poisson):
        if not float(np.min(raw, initial=np.inf)) < -13.8:
            return  # no fitted mean below 1e-6 (one reduction, no masks)
        sign = np.where(y == 0, -1.0, 0.0)
        near = (y == 0) & (raw < -13.8)  # a fitted mean below 1e-6 on a zero count
        what = ("some zero counts can be fitted by a mean of exactly 0 (e.g. a category whose "
                "counts are all zero), so the unpenalised maximum-likelihood estimate does not "
                "exist: coefficients diverge and those fitted means go to 0")
    else:
        return
    if not np.any(near & (w > 0)):
        return
    if _solvers.unbounded_margin(X, sign, w, est.fit_intercept) > 1e-9:
        warnings.warn(
            f"{type(est).__name__} ({fam.name}): {what}. The returned coefficients are where "
            "Newton's method stopped; use alpha > 0 for a finite estimate.",
            UnboundedLikelihoodWarning,
            stacklevel=3,
        )


def _linear_raw_score(est, X, offset):
    """X coef + intercept (+ offset) of a fitted linear estimator, with X and offset checked."""
    check_is_fitted(est)
    _check_numeric_columns(X, type(est).__name__)
    X = validate_data(est, X, reset=False, dtype=np.float64, accept_sparse=("csr", "csc"),
                      ensure_all_finite=False)
    _check_finite_rows(X, type(est).__name__)
    raw = np.asarray(X @ est.coef_, dtype=float).ravel() + est.intercept_
    o = _check_offset(offset, X.shape[0], type(est).__name__)
    return raw if o is None else raw + o


def _warn_missing_offset(est, offset):
    if offset is None and getattr(est, "fitted_with_offset_", False):
        warnings.warn(
            f"{type(est).__name__}.score: the model was fitted with an offset but is scored without "
            "one (raw scores then lack it). Pass offset=...; through a Pipeline, GridSearchCV or "
            "cross_val_score enable metadata routing and call set_score_request(offset=True).",
            UserWarning,
            stacklevel=3,
        )


class _RawScoreRegressorMethods:
    """predict_raw / predict / predict_distribution / score for a regressor with ``_raw_score``
    (the raw score of X, offset included) and a fitted ``family_``."""

    def predict_raw(self, X, offset=None):
        """The raw score (+ offset), on the link scale."""
        return self._raw_score(X, offset)

    def predict(self, X, offset=None):
        """The prediction on the response scale: ``family_.inverse_link(raw)`` (mean, median or quantile)."""
        raw = self._raw_score(X, offset)
        return self.family_.inverse_link(raw)

    def predict_distribution(self, X, offset=None):
        """The predictive law of each row: ``family_.distribution(raw)``."""
        raw = self._raw_score(X, offset)
        return self.family_.distribution(raw)

    def score(self, X, y, sample_weight=None, offset=None):
        """D^2: the fraction of (weighted) deviance explained, relative to the weighted baseline of y.

        ``offset`` is added to the raw scores as in ``predict``.  Inside a
        Pipeline, GridSearchCV or cross_val_score it arrives only through
        scikit-learn's metadata routing (``sklearn.set_config(enable_metadata_routing=True)``
        and ``est.set_score_request(offset=True)``, as for sample_weight); a
        model fitted with an offset and scored without one warns.  An IntervalTarget is
        accepted when all its rows are exact; censored rows have no unit deviance, so they are
        refused with a pointer to ``lossfam.sklearn.scorer(family, "nll")``.
        """
        _warn_missing_offset(self, offset)
        if isinstance(y, IntervalTarget) and not y.exact.all():
            raise ValueError(
                f"{type(self).__name__}.score: D^2 rests on the unit deviance, which censored rows do not "
                f"have ({int((~y.exact).sum())} here); score censored targets by their likelihood with "
                f"lossfam.sklearn.scorer({self.family_.name!r}, 'nll') (the mean censored nll)")
        pred = self.predict(X, offset=offset)
        return d2_score(y, pred, self.family_, sample_weight=sample_weight)


class LikelihoodRegressor(_RawScoreRegressorMethods, RegressorMixin, BaseEstimator):
    """Linear model fitted by penalised maximum likelihood under a lossfam family.

    Minimises ``(1 / sum w) sum w nll(y, X coef + intercept + offset) + alpha / 2 ||coef||^2``
    (intercept unpenalised) for the family ``lossfam.family(family, **family_params)``.

    Solvers: Newton's method with a line search and Cholesky solves for smooth
    families (starting from the intercept at ``family.baseline``); for laplace
    and asymmetric_laplace linear programming (HiGHS) when alpha = 0 and, when
    alpha > 0, a smoothing continuation followed by an active-set solve of the
    optimality conditions that certifies the exact minimiser; semismooth Newton
    with the scale fitted jointly by maximum likelihood for huber.  Families that
    declare ``location_needs_nuisance`` (negative_binomial, beta, student_t)
    get their nuisance parameters fitted jointly with the coefficients (alternating
    maximisation).  For the other families the nuisance parameters keep their
    given values during the coefficient fit (they matter only when alpha > 0);
    afterwards ``family_`` holds them at their maximum-likelihood values.

    Parameters
    ----------
    family : str or lossfam.Family, default="gaussian"
    family_params : dict or None, default=None
        Nuisance parameters of the family (e.g. ``{"quantile": 0.9}``).
    alpha : float >= 0, default=0.0
        Ridge penalty on the coefficients.
    fit_intercept : bool, default=True
    max_iter : int, default=100
        Maximum Newton iterations.
    tol : float, default=1e-8
        Stop when max_j |dF/dcoef_j| / c_j <= tol, c_j = sqrt(mean_w x_j^2) (the
        gradient for standardised columns, so the rule does not depend on a
        column's units), then refine with the last factorisation while that
        still improves the fit; or when a full step changes no raw score beyond
        rounding; dense X with at most 200 coefficients also when the next Newton
        (or secant-corrected chord) correction is below tol in the same
        standardised units, which is then applied.

    Attributes
    ----------
    coef_, intercept_, family_, n_iter_ (Newton steps, chord steps that reuse the last
    factorisation included; or the iterations of the linear programme
    of the linear programme), n_features_in_, feature_names_in_ (pandas input),
    fitted_with_offset_.

    X may be a numeric array, a DataFrame of numeric columns (others are
    refused by name) or a scipy.sparse CSR/CSC matrix (never densified: the
    solvers work with sparse products and a dense (p + 1) x (p + 1) Hessian).
    """

    def __init__(self, family="gaussian", family_params=None, alpha=0.0, fit_intercept=True,
                 max_iter=100, tol=1e-8):
        self.family = family
        self.family_params = family_params
        self.alpha = alpha
        self.fit_intercept = fit_intercept
        self.max_iter = max_iter
        self.tol = tol

    def _make_family(self):
        return make_family(self.family, **(self.family_params or {}))

    def __sklearn_tags__(self):
        tags = super().__sklearn_tags__()
        try:
            fam = self._make_family()
        except Exception:  # invalid parameters are reported by fit, not here
            return tags
        tags.input_tags.sparse = True
        tags.target_tags.positive_only = not bool(fam.target_domain.inside(np.array([-1.0]))[0])
        return tags

    def fit(self, X, y, sample_weight=None, offset=None):
        """Fit the coefficients; ``offset`` is a per-row raw-scale offset (e.g. log exposure)."""
        _check_hyper(self)
        fam = self._make_family()
        owner = type(self).__name__
        if isinstance(y, IntervalTarget):
            return self._fit_censored(fam, X, y, sample_weight, offset, owner)
        if y is not None:
            _prevalidate_y(fam, y)
        X, y = _validate_X_y(self, X, y, owner, y_numeric=True)
        y = fam.check_target(y, for_nll=False)
        w = _check_sample_weight(sample_weight, y, owner)
        offset = _check_offset(offset, X.shape[0], owner)
        self.fitted_with_offset_ = offset is not None and bool(np.any(offset != 0))
        fit = _fit_linear(self, fam, X, y, w, offset, unweighted=sample_weight is None)
        _finish(self, fam, fit, y, w, unweighted=sample_weight is None)
        _warn_if_unbounded(self, fam, X, y, w, fit.raw)
        return self

    def _fit_censored(self, fam, X, target, sample_weight, offset, owner):
        """fit() for a :class:`lossfam.censoring.IntervalTarget` (censored and interval rows)."""
        _check_numeric_columns(X, owner)
        X = validate_data(self, X, dtype=np.float64, order="C", accept_sparse=("csr", "csc"),
                          ensure_all_finite=False)
        if sparse.issparse(X):
            X = X.tocsr()
            X.sort_indices()
        _check_finite_rows(X, owner)
        if X.shape[0] != target.size:
            raise ValueError(f"{owner}: X has {X.shape[0]} rows but the target has {target.size}")
        target = fam.check_target(target)
        offset = _check_offset(offset, X.shape[0], owner)
        self.fitted_with_offset_ = offset is not None and bool(np.any(offset != 0))
        fit = _fit_censored(self, fam, X, target, sample_weight, offset, owner)
        self.coef_ = fit.coef
        self.intercept_ = float(fit.intercept)
        self.n_iter_ = int(fit.n_iter)
        self.family_ = fit.family
        if not fit.converged:
            warnings.warn(f"{owner} ({fam.name}, censored): the solver stopped after {fit.n_iter} "
                          f"iterations with max |gradient| = {fit.grad_norm:.3g} > tol = {self.tol}",
                          ConvergenceWarning, stacklevel=2)
        return self

    def _raw_score(self, X, offset):
        return _linear_raw_score(self, X, offset)

    def inference(self, X, y, sample_weight=None, offset=None, *, method=None, level=0.95):
        """Standard errors, z values, p-values, confidence intervals and fit statistics.

        Pass the training data (X, y, sample_weight, offset) again.  Returns
        an ``InferenceTable`` (print it, or ``.as_dict()`` / ``.as_frame()``);
        see ``lossfam._sk.inference`` for the formulas and their sources.
        """
        from .inference import inference_table

        return inference_table(self, X, y, sample_weight, offset, method=method, level=level)



class LikelihoodClassifier(ClassifierMixin, BaseEstimator):
    """Binary logistic regression as penalised Bernoulli maximum likelihood.

    Minimises ``(1 / sum w) sum w logloss + alpha / 2 ||coef||^2`` by Newton's
    method.  The positive class is ``classes_[1]`` (the larger label).  With
    ``alpha=0`` the unpenalised maximum-likelihood estimate is returned where it
    exists; on (quasi-)separated classes an ``UnboundedLikelihoodWarning`` is
    issued (detected by a linear programme, see ``separation_margin``).

    Parameters
    ----------
    alpha : float >= 0, default=1e-4
        Ridge penalty (a small default keeps the estimate finite on separable data).
    fit_intercept : bool, default=True
    max_iter : int, default=100
    tol : float, default=1e-8
    """

    def __init__(self, alpha=1e-4, fit_intercept=True, max_iter=100, tol=1e-8):
        self.alpha = alpha
        self.fit_intercept = fit_intercept
        self.max_iter = max_iter
        self.tol = tol

    def __sklearn_tags__(self):
        tags = super().__sklearn_tags__()
        tags.classifier_tags.multi_class = False
        tags.input_tags.sparse = True
        return tags

    def fit(self, X, y, sample_weight=None, offset=None):
        _check_hyper(self)
        owner = type(self).__name__
        X, y = _validate_X_y(self, X, y, owner)
        check_classification_targets(y)
        kind = type_of_target(y, input_name="y")
        if kind != "binary":
            raise ValueError(
                f"Only binary classification is supported. The type of the target is {kind}; "
                f"{owner} models two classes."
            )
        self.classes_ = np.unique(y)
        if self.classes_.size < 2:
            raise ValueError(
                f"{owner} needs two classes to fit; only one class ({self.classes_[0]!r}) is present"
            )
        y01 = (y == self.classes_[1]).astype(np.float64)
        w = _check_sample_weight(sample_weight, y01, owner)
        present = np.unique(y01[w > 0])
        if present.size < 2:
            raise ValueError(
                f"{owner} needs two classes with positive sample weight; only class "
                f"{self.classes_[int(present[0])]!r} has positive weight"
            )
        offset = _check_offset(offset, X.shape[0], owner)
        self.fitted_with_offset_ = offset is not None and bool(np.any(offset != 0))
        fam = make_family("bernoulli")
        fit = _fit_linear(self, fam, X, y01, w, offset, unweighted=sample_weight is None)
        _finish(self, fam, fit, y01, w, unweighted=sample_weight is None)
        _warn_if_unbounded(self, fam, X, y01, w, fit.raw)
        return self

    def score(self, X, y, sample_weight=None, offset=None):
        """Accuracy of ``predict(X, offset)`` (offset routed as in the regressor's ``score``)."""
        _warn_missing_offset(self, offset)
        return accuracy_score(y, self.predict(X, offset=offset), sample_weight=sample_weight)

    def decision_function(self, X, offset=None):
        """The raw score (log odds of ``classes_[1]``)."""
        return _linear_raw_score(self, X, offset)

    def inference(self, X, y, sample_weight=None, offset=None, *, method=None, level=0.95):
        """Standard errors, z values, p-values, confidence intervals and fit statistics.

        Pass the training data (X, y, sample_weight, offset) again.  Returns
        an ``InferenceTable`` (print it, or ``.as_dict()`` / ``.as_frame()``);
        see ``lossfam._sk.inference`` for the formulas and their sources.
        """
        from .inference import inference_table

        return inference_table(self, X, y, sample_weight, offset, method=method, level=level)

    def predict_proba(self, X, offset=None):
        raw = self.decision_function(X, offset)
        p = self.family_.inverse_link(raw)
        return np.column_stack([1.0 - p, p])

    def predict_log_proba(self, X, offset=None):
        raw = self.decision_function(X, offset)
        from scipy.special import log_expit

        return np.column_stack([log_expit(-raw), log_expit(raw)])

    def predict(self, X, offset=None):
        raw = self.decision_function(X, offset)
        return self.classes_[(raw > 0).astype(int)]

    def predict_distribution(self, X, offset=None):
        """The predictive Bernoulli law of each row (of the event ``y == classes_[1]``)."""
        raw = self.decision_function(X, offset)
        return self.family_.distribution(raw)
