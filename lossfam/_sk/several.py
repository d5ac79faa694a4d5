"""A linear model for each raw score of a several-score family, fitted by joint maximum likelihood.

See ``lossfam/_sk/_joint.py`` for the objective and the solver.
"""
from __future__ import annotations

import numbers
import warnings

import numpy as np
from scipy import optimize, sparse, special
from sklearn.base import BaseEstimator, ClassifierMixin, RegressorMixin
from sklearn.exceptions import ConvergenceWarning
from sklearn.utils.multiclass import check_classification_targets
from sklearn.utils.validation import check_is_fitted, validate_data

from .. import _checks
from ..families import AsymmetricLaplace, Laplace
from ..families._several import SeveralScoreFamily
from ..registry import family as make_family
from . import _joint
from ._solvers import _lp_columns
from .linear import (UnboundedLikelihoodWarning, _check_finite_rows, _check_hyper, _check_numeric_columns, _check_sample_weight,
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


#: a scale or shape raw score this far from its constant fit (alpha = 0) draws an UnboundedLikelihoodWarning
DRIFT = 25.0


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
    the exact matrix is not positive definite) and a line search (``lossfam._sk._joint``).  For a
    location with a kink (laplace_spread, asymmetric_laplace_spread) the location (a weighted
    quantile regression, by linear programming) and the scale submodel are minimised in turn,
    each exactly, until the likelihood stops rising.

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

    With alpha = 0, a scale or shape raw score that ends more than ``DRIFT`` (25, a factor of
    about 1e10) from its constant fit on some row draws an ``UnboundedLikelihoodWarning``: the
    likelihood rises towards a boundary there (e.g. a negative binomial dispersion towards the
    Poisson limit 0).

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
        if getattr(fam, "raw_shift_invariant", False):
            raise ValueError(f"{type(self).__name__}: {fam.name}'s raw scores are identified only up to a "
                             "common shift; fit it with MultinomialLikelihoodClassifier (one class as reference)")
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
        if fam.kinked_scores:
            tau, factor = _pinball_form(fam, owner)
            fit = _joint.kinked_location_alternation(fam, X, y, v, offset, masks, float(self.alpha),
                                                     self.fit_intercept, self.max_iter, self.tol, start,
                                                     tau, factor)
        else:
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
        self._warn_if_drifting(fam, fit.raw, start, w, owner)
        if not fit.converged:
            warnings.warn(
                f"{owner} ({fam.name}): the joint Newton iteration stopped after {fit.n_iter} steps with "
                f"max |gradient| = {fit.grad_norm:.3g} > tol = {self.tol}; the likelihood may have no "
                "finite maximiser (a scale that can shrink to 0 on rows fitted exactly); raise max_iter, "
                "use fewer scale_features or add a ridge penalty (alpha > 0)",
                ConvergenceWarning, stacklevel=2)
        return self

    def _warn_if_drifting(self, fam, raw, start, w, owner):
        """UnboundedLikelihoodWarning when, with alpha = 0, a scale or shape raw score ends more than
        DRIFT (a factor e^DRIFT ~ 1e10 in the parameter) from its constant maximum-likelihood value
        on some row: the likelihood then keeps rising towards a boundary (a dispersion towards the
        Poisson limit 0, a scale towards 0 on rows fitted exactly), where the gradient fades
        without the supremum being reached."""
        if self.alpha > 0 or not self.fit_intercept or raw.shape[1] < 2:
            return
        far = np.abs(raw[:, 1:] - start[1:]) > DRIFT
        rows = np.flatnonzero(far.any(axis=1) & (w > 0))
        if rows.size:
            cols = [fam.score_names[j + 1] for j in np.flatnonzero(far[rows].any(axis=0))]
            warnings.warn(
                f"{owner} ({fam.name}): {', '.join(cols)} moved by more than {DRIFT:g} on the raw scale "
                f"(a factor e^{DRIFT:g}) from its constant fit on {rows.size} row(s), e.g. rows "
                f"{rows[:5].tolist()}: the likelihood rises towards a boundary there and has no finite "
                "maximiser; use alpha > 0 or fewer scale_features",
                UnboundedLikelihoodWarning, stacklevel=3)

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


def _pinball_form(fam, owner):
    """(tau, factor) with nll = factor rho_tau(y - mu) / b + terms free of mu, for a family whose
    location has a kink: read from its constant-scale law (laplace: |r| / b = 2 rho_0.5(r) / b;
    asymmetric laplace: rho_tau(r) / b)."""
    base = fam.constant_scale()
    if isinstance(base, AsymmetricLaplace):
        return base.quantile, 1.0
    if isinstance(base, Laplace):
        return 0.5, 2.0
    raise ValueError(f"{owner}: {fam.name} has a kink in raw scores {fam.kinked_scores}, and the linear "
                     "solver handles kinks only for the laplace and asymmetric laplace location")


def _several_names():
    from ..registry import available

    return available(scores="several")


class MultinomialLikelihoodClassifier(ClassifierMixin, BaseEstimator):
    """Multinomial logit regression: the ``multinomial`` family's linear classifier.

    K classes (``classes_``, sorted labels; class ``classes_[0]`` the reference).  The raw score of
    the reference class is fixed at 0 and each other class j has raw_j = x . coef_[j] +
    intercept_[j], the log-odds of class j against the reference (the identifiability choice of the
    multinomial family for linear models); P(class j | x) = softmax(raw)_j.  The coefficients
    maximise the penalised likelihood

        (1 / sum w) sum_i w_i log p_{y_i}(x_i) - alpha / 2 sum_{j >= 1} ||coef_[j]||^2

    by Newton's method on the joint (K - 1)(p + 1) system (``lossfam._sk._joint``; the multinomial
    Hessian is free of y, so its Newton and Fisher-scoring steps coincide).  With alpha = 0 this is
    the maximum-likelihood multinomial logit; on classes that a linear score separates it has no
    finite maximiser (ConvergenceWarning); alpha > 0 keeps it finite.  The penalty acts on the
    log-odds against the reference class, so with alpha > 0 the fit depends on which class is the
    reference.

    Parameters
    ----------
    alpha : float >= 0, default=1e-4
    fit_intercept : bool, default=True
    max_iter : int, default=100
    tol : float, default=1e-8

    Attributes
    ----------
    classes_, coef_ ((K, p), row 0 zero), intercept_ ((K,), entry 0 zero), family_
    (``multinomial`` with n_classes = K), n_iter_, n_features_in_, feature_names_in_.
    """

    def __init__(self, alpha=1e-4, fit_intercept=True, max_iter=100, tol=1e-8):
        self.alpha = alpha
        self.fit_intercept = fit_intercept
        self.max_iter = max_iter
        self.tol = tol

    def fit(self, X, y, sample_weight=None):
        _check_hyper(self)
        owner = type(self).__name__
        _check_numeric_columns(X, owner)
        X, y = validate_data(self, X, y, dtype=np.float64, order="C", ensure_all_finite=False)
        _check_finite_rows(X, owner)
        check_classification_targets(y)
        self.classes_, codes = np.unique(y, return_inverse=True)
        K = self.classes_.size
        if K < 2:
            raise ValueError(f"{owner} needs at least two classes to fit; only one class "
                             f"({self.classes_[0]!r}) is present")
        codes = codes.astype(np.float64)
        w = _check_sample_weight(sample_weight, codes, owner)
        present = np.unique(codes[w > 0]).astype(int)
        if present.size < K:
            missing = sorted(set(range(K)) - set(present.tolist()))
            raise ValueError(f"{owner}: class(es) {[self.classes_[i] for i in missing]} have no row with "
                             "positive sample weight")
        fam = make_family("multinomial", n_classes=K)
        n, p = X.shape
        if self.fit_intercept:
            c = fam.baseline(codes, w)
            start = c[1:] - c[0]
        else:
            start = np.zeros(K - 1)
        masks = [np.ones(p, dtype=bool)] * (K - 1)
        # the reference class's raw score fixed at 0: the K - 1 free raw scores are log-odds against it
        fit = _joint.joint_newton(_joint.FirstScoreFixed(fam, np.zeros(X.shape[0])), X, codes, w / w.sum(), None, masks,
                                  float(self.alpha), self.fit_intercept, self.max_iter, self.tol, start)
        self.coef_ = np.vstack([np.zeros(p)] + [c for c in fit.coefs])
        self.intercept_ = np.concatenate([[0.0], fit.intercepts])
        self.family_ = fam
        self.n_iter_ = int(fit.n_iter)
        if self.alpha == 0 and fit.raw.size:
            full = np.column_stack([np.zeros(n), fit.raw])
            logp = full[np.arange(n), codes.astype(np.intp)] - special.logsumexp(full, axis=1)
            # a fitted probability within 1e-6 of its label: check for separation
            if np.any((logp > -1e-6) & (w > 0)) and separation_margin(X, codes.astype(np.intp), w, K,
                                                                         self.fit_intercept) > 1e-9:
                warnings.warn(
                    f"{owner}: the classes are (quasi-)separated by linear scores, so the unpenalised "
                    "maximum-likelihood estimate does not exist: coefficients diverge and fitted "
                    "probabilities reach 0 or 1. The returned coefficients are where Newton's method "
                    "stopped; use alpha > 0 for a finite estimate.",
                    UnboundedLikelihoodWarning, stacklevel=2)
                return self
        if not fit.converged:
            warnings.warn(
                f"{owner}: Newton's method stopped after {fit.n_iter} steps with max |gradient| = "
                f"{fit.grad_norm:.3g} > tol = {self.tol}; with alpha = 0 the classes may be separated by "
                "a linear score (no finite maximum-likelihood estimate): use alpha > 0",
                ConvergenceWarning, stacklevel=2)
        return self

    def predict_raw(self, X):
        """(n, K): the raw scores (log-odds of each class against ``classes_[0]``; column 0 zero)."""
        check_is_fitted(self)
        owner = type(self).__name__
        _check_numeric_columns(X, owner)
        X = validate_data(self, X, reset=False, dtype=np.float64, ensure_all_finite=False)
        _check_finite_rows(X, owner)
        return X @ self.coef_.T + self.intercept_

    def decision_function(self, X):
        """scikit-learn's convention: (n, K) raw scores, or for two classes the (n,) log-odds of
        ``classes_[1]`` (then ``predict_raw``'s column 1)."""
        raw = self.predict_raw(X)
        return raw[:, 1] if raw.shape[1] == 2 else raw

    def predict_proba(self, X):
        raw = self.predict_raw(X)
        return self.family_.parameters(raw)

    def predict_log_proba(self, X):
        from scipy.special import log_softmax

        return log_softmax(self.predict_raw(X), axis=1)

    def predict(self, X):
        raw = self.predict_raw(X)
        return self.classes_[np.argmax(raw, axis=1)]

    def predict_distribution(self, X):
        """The predictive law of each row: a one-trial scipy.stats multinomial over the class codes."""
        raw = self.predict_raw(X)
        return self.family_.distribution(raw)


def separation_margin(X, codes, w, K, fit_intercept) -> float:
    """Detect (quasi-)separated classes for multinomial logit by linear programming.

    With z_i = [x_i, 1] and a direction D = (d_1, ..., d_{K-1}) of the coefficients (d_0 = 0 for
    the reference class), row i's nll falls along D, towards a finite limit, when its own class's
    raw score gains on every other: m_il = (d_{y_i} - d_l) . z_i >= 0 for all l != y_i.  The
    maximum-likelihood estimate is infinite exactly when some D has every m_il >= 0 and one > 0
    (the multi-class form of the detection programme for binary separation; the same construction
    as ``_solvers.unbounded_margin``).  The linear programme

        maximise sum_il m_il   subject to  m_il >= 0,  -1 <= D <= 1

    has optimum 0 when the estimate is finite.  Returns that optimum over the sum of the absolute
    entries of the constraint matrix (0: finite).
    """
    keep = w > 0
    Xk, yk = X[keep], codes[keep]
    if Xk.shape[1]:
        Xk, _, _ = _lp_columns(Xk, w[keep], False)
    Z = np.column_stack([Xk, np.ones(Xk.shape[0])]) if fit_intercept else Xk
    n, q = Z.shape
    if q == 0:
        return 0.0
    blocks, rows = [], []
    for l in range(K):
        idx = np.flatnonzero(yk != l)
        # m_il = d_{y_i} . z_i - d_l . z_i over the free classes 1..K-1
        A = sparse.lil_matrix((idx.size, (K - 1) * q))
        for c in range(1, K):
            sel = idx[yk[idx] == c]
            if sel.size:
                pos = np.searchsorted(idx, sel)
                A[pos, (c - 1) * q:c * q] = Z[sel]
        if l >= 1:
            A[:, (l - 1) * q:l * q] = A[:, (l - 1) * q:l * q] - Z[idx]
        blocks.append(A.tocsr())
    M = sparse.vstack(blocks, format="csr")
    total = np.asarray(M.sum(axis=0)).ravel()
    res = optimize.linprog(-total, A_ub=-M, b_ub=np.zeros(M.shape[0]), bounds=[(-1.0, 1.0)] * M.shape[1],
                           method="highs")
    if res.status != 0:
        return 0.0
    return max(0.0, -float(res.fun)) / max(float(abs(M).sum()), 1e-300)
