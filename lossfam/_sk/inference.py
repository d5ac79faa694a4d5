r"""Large-sample inference for a fitted linear likelihood model: standard errors, Wald tests, fit statistics.

For the unpenalised fit of ``raw_i = x_i . beta + offset_i`` (x_i with a
leading 1 when there is an intercept) by maximum likelihood with row weights
w_i (each row's log-likelihood counted w_i times), the quantities are

    log-likelihood  l     = -sum_i w_i nll(y_i, raw_i)            (full density, constants included)
    AIC                   = 2 k - 2 l,    BIC = k log(n) - 2 l     (k = coefficients + fitted nuisance
                                                                     parameters, n = rows with w > 0)
    deviance        D     = sum_i w_i dev(y_i, raw_i);  null deviance D0 at the best constant;  D^2 = 1 - D / D0

and the standard errors come from one of three covariance estimates:

``"information"`` (smooth families; the default)
    The inverse observed information  cov = H^-1,  H = sum_i w_i h_i x_i x_i^T,
    h_i the second derivative of nll in raw at the fit (for huber the
    generalised second derivative: 1/s^2 inside the core, 0 outside).  The
    nuisance parameters are held at their fitted values; for gaussian and
    gamma the information matrix of (beta, nuisance) is block diagonal at
    the maximum-likelihood estimate (the cross derivative is
    sum w (dnll/draw) x = 0 there), so this is the beta block of the joint
    inverse.  Reference: any GLM text, e.g. McCullagh and Nelder,
    Generalized Linear Models, 2nd ed. (1989), section 2.5 and 9.2.
``"sandwich"`` (smooth families)
    The heteroskedasticity-robust estimate cov = H^-1 M H^-1 with
    M = sum_i w_i g_i^2 x_i x_i^T, g_i the first derivative of nll in raw
    (White, 1980, Econometrica 48, 817-838; Huber, 1967): valid when the
    family's variance is misspecified but the mean model is right.
``"kernel-sandwich"`` (laplace, asymmetric_laplace; the only choice)
    The check loss has no second derivative, so the information is replaced by
    a kernel estimate of the density of the errors at 0 (Powell, 1991,
    "Estimation of monotonic regression models under quantile restrictions",
    in Nonparametric and Semiparametric Methods in Econometrics; the "Powell
    sandwich" of Koenker, Quantile Regression, Cambridge University Press,
    2005, section 3.4.2):

        cov = tau (1 - tau) H^-1 J H^-1,   J = sum_i w_i x_i x_i^T,
        H   = sum_i w_i phi(r_i / h) / h x_i x_i^T       (phi the standard normal density)

    with r the residuals and the bandwidth of Hall and Sheather (1988, J. R.
    Statist. Soc. B 50, 381-391) turned into residual units as Koenker does:
    h0 = n^(-1/3) z_(0.975)^(2/3) (1.5 phi(z_tau)^2 / (2 z_tau^2 + 1))^(1/3),
    h = (Phi^-1(tau + h0) - Phi^-1(tau - h0)) min(sd(r), IQR(r) / 1.34).
    Valid for independent rows whose error densities may differ.

z = coef / se, two-sided normal p-values and normal confidence intervals
(Wald), as is usual for likelihood models in large samples.  With a ridge
penalty (alpha > 0) these are not the sampling errors of the penalised
estimate, so :func:`inference_table` refuses such fits.
"""
from __future__ import annotations

import dataclasses

import numpy as np
from scipy import linalg, sparse, stats

from ..families import AsymmetricLaplace, Huber, Laplace
from . import _solvers

METHODS = ("information", "sandwich", "kernel-sandwich")


@dataclasses.dataclass
class InferenceTable:
    """Coefficients with standard errors, Wald tests and fit statistics (see the module docstring).

    Print it for a readable table; ``as_dict()`` gives plain data and
    ``as_frame()`` a pandas DataFrame of the coefficient rows.
    """

    names: list
    coef: np.ndarray
    se: np.ndarray
    z: np.ndarray
    p_value: np.ndarray
    ci_low: np.ndarray
    ci_high: np.ndarray
    level: float
    method: str
    family: object
    n_rows: int
    n_params: int
    log_likelihood: float
    aic: float
    bic: float
    deviance: float
    null_deviance: float
    d2: float
    n_iter: int
    covariance: np.ndarray

    _COLUMNS = ("coef", "se", "z", "p_value", "ci_low", "ci_high")

    def as_dict(self) -> dict:
        """Plain data: one entry per coefficient (by name) and the fit statistics."""
        rows = {str(nm): {c: float(getattr(self, c)[i]) for c in self._COLUMNS}
                for i, nm in enumerate(self.names)}
        return {
            "family": self.family.name,
            "family_params": dict(self.family.params),
            "method": self.method,
            "level": self.level,
            "coefficients": rows,
            "n_rows": self.n_rows,
            "n_params": self.n_params,
            "log_likelihood": self.log_likelihood,
            "aic": self.aic,
            "bic": self.bic,
            "deviance": self.deviance,
            "null_deviance": self.null_deviance,
            "d2": self.d2,
            "n_iter": self.n_iter,
        }

    def as_frame(self):
        """The coefficient rows as a pandas DataFrame indexed by name (needs pandas)."""
        import pandas as pd

        return pd.DataFrame({c: getattr(self, c) for c in self._COLUMNS},
                            index=pd.Index([str(n) for n in self.names], name="term"))

    def __str__(self):
        pct = f"{100 * self.level:g}%"
        params = ", ".join(f"{k}={v:.6g}" for k, v in self.family.params.items())
        head = [
            f"family: {self.family.name}" + (f" ({params})" if params else ""),
            f"rows: {self.n_rows}    parameters: {self.n_params}    iterations: {self.n_iter}",
            f"log-likelihood: {self.log_likelihood:.6g}    AIC: {self.aic:.6g}    BIC: {self.bic:.6g}",
            f"deviance: {self.deviance:.6g}    null deviance: {self.null_deviance:.6g}    D^2: {self.d2:.4f}",
            f"standard errors: {_METHOD_TEXT[self.method]}",
        ]
        width = max(9, max(len(str(n)) for n in self.names) if self.names else 9)
        cols = ["coef", "std err", "z", "p>|z|", f"{pct} low", f"{pct} high"]
        lines = [f"{'':{width}s}" + "".join(f"{c:>13s}" for c in cols)]
        for i, nm in enumerate(self.names):
            vals = [self.coef[i], self.se[i], self.z[i], self.p_value[i], self.ci_low[i], self.ci_high[i]]
            lines.append(f"{str(nm):{width}s}" + "".join(
                f"{v:13.4f}" if k == 3 else f"{v:13.6g}" for k, v in enumerate(vals)))
        rule = "-" * len(lines[0])
        return "\n".join(head + [rule] + lines + [rule])

    def __repr__(self):
        return str(self)


_METHOD_TEXT = {
    "information": "inverse observed information",
    "sandwich": "sandwich H^-1 M H^-1 (White 1980), robust to a misspecified variance",
    "kernel-sandwich": "Powell kernel sandwich (Koenker 2005, sec. 3.4.2), Hall-Sheather bandwidth",
}


def _design_gram(X, weights, fit_intercept):
    """[X 1]^T diag(weights) [X 1] (intercept last), dense or sparse X."""
    G, xh = _solvers.weighted_gram(X, weights)
    if not fit_intercept:
        return G
    p = G.shape[0]
    out = np.empty((p + 1, p + 1))
    out[:p, :p] = G
    out[:p, p] = out[p, :p] = xh
    out[p, p] = weights.sum()
    return out


def _inverse(H, what):
    """Inverse of a symmetric positive definite H, equilibrated; a clear error when it is singular."""
    d = np.sqrt(np.abs(np.diag(H)))
    d[~(d > 0)] = 1.0
    try:
        fac = linalg.cho_factor(H / d[:, None] / d[None, :], check_finite=False)
    except linalg.LinAlgError:
        raise ValueError(f"inference: the {what} is singular (collinear columns, or a family "
                         "whose curvature vanishes on too many rows); standard errors do not exist") from None
    inv = linalg.cho_solve(fac, np.eye(H.shape[0]), check_finite=False)
    return inv / d[:, None] / d[None, :]


def _inverse_gram(X, weights, fit_intercept, what):
    """([X 1]^T diag(weights) [X 1])^-1.

    Dense X with weights >= 0: from the QR factorisation of the equilibrated
    diag(sqrt(weights)) [X 1] (R^-1 R^-T), whose error grows with the
    condition number of the design rather than its square (Golub and Van
    Loan, Matrix Computations, 4th ed., section 5.3); otherwise from the Gram matrix.
    """
    if sparse.issparse(X) or np.min(weights, initial=0.0) < 0:
        return _inverse(_design_gram(X, weights, fit_intercept), what)
    A = X * np.sqrt(weights)[:, None]
    if fit_intercept:
        A = np.column_stack([A, np.sqrt(weights)])
    d = np.sqrt(np.einsum("ij,ij->j", A, A))
    d[~(d > 0)] = 1.0
    R = linalg.qr(A / d, mode="r", check_finite=False)[0][: A.shape[1]]
    piv = np.abs(np.diag(R))
    if piv.size and not np.min(piv) > 1e-12 * np.max(piv):
        raise ValueError(f"inference: the {what} is singular (collinear columns, or a family "
                         "whose curvature vanishes on too many rows); standard errors do not exist")
    Rinv = linalg.solve_triangular(R, np.eye(R.shape[0]), check_finite=False)
    return (Rinv @ Rinv.T) / d[:, None] / d[None, :]


def _hall_sheather(n, tau, alpha=0.05):
    z = stats.norm.ppf(tau)
    return n ** (-1.0 / 3.0) * stats.norm.ppf(1.0 - alpha / 2.0) ** (2.0 / 3.0) * (
        1.5 * stats.norm.pdf(z) ** 2 / (2.0 * z * z + 1.0)) ** (1.0 / 3.0)


def _kernel_sandwich(X, r, w, tau, fit_intercept):
    pos = w > 0
    n = int(pos.sum())
    h0 = _hall_sheather(n, tau)
    lo, hi = stats.norm.ppf(max(tau - h0, 1e-12)), stats.norm.ppf(min(tau + h0, 1.0 - 1e-12))
    rp = r[pos]
    iqr = float(np.subtract(*np.quantile(rp, [0.75, 0.25])))
    spread = min(float(np.std(rp, ddof=1)) if n > 1 else 0.0, iqr / 1.34)
    if not spread > 0:
        spread = float(np.std(rp, ddof=1)) if n > 1 else 0.0
    if not spread > 0:
        raise ValueError("inference: every residual is zero, so the density of the errors at 0 "
                         "cannot be estimated; standard errors do not exist")
    h = (hi - lo) * spread
    f = stats.norm.pdf(r / h) / h
    Hinv = _inverse_gram(X, w * f, fit_intercept, "kernel density-weighted Gram matrix")
    J = _design_gram(X, w, fit_intercept)
    return tau * (1.0 - tau) * Hinv @ J @ Hinv


def inference_table(est, X, y, sample_weight=None, offset=None, *, method=None, level=0.95):
    """Build the :class:`InferenceTable` of a fitted linear lossfam estimator on its training data.

    ``X, y, sample_weight, offset`` must be the data the model was fitted on
    (they are not stored on the estimator).  ``method``: "information"
    (default for smooth families), "sandwich", or "kernel-sandwich" (the only
    one for laplace / asymmetric_laplace).  ``level``: confidence level of the
    intervals.  The nuisance parameters are those of ``est.family_`` (pass a
    copy of the estimator with another ``family_`` to use other values).
    """
    from .linear import _check_offset, _check_sample_weight, _linear_raw_score

    owner = f"{type(est).__name__}.inference"
    if not (isinstance(level, float) or isinstance(level, int)) or not 0.0 < float(level) < 1.0:
        raise ValueError(f"{owner}: level must be a number strictly between 0 and 1, got {level!r}")
    if float(est.alpha) > 0:
        raise ValueError(f"{owner}: the fit is ridge-penalised (alpha={est.alpha}); Wald standard errors "
                         "describe the unpenalised maximum-likelihood estimate only")
    fam = est.family_
    quantile_family = isinstance(fam, (Laplace, AsymmetricLaplace))
    if method is None:
        method = "kernel-sandwich" if quantile_family else "information"
    if method not in METHODS:
        raise ValueError(f"{owner}: method must be one of {', '.join(METHODS)}, got {method!r}")
    if quantile_family != (method == "kernel-sandwich"):
        raise ValueError(f"{owner}: {method!r} standard errors are not available for {fam.name}; use "
                         + ("'kernel-sandwich'" if quantile_family else "'information' or 'sandwich'"))
    if not quantile_family and not isinstance(fam, Huber) and not fam.exact_hessian:
        raise ValueError(f"{owner}: {fam.name} declares a surrogate Hessian (exact_hessian=False), "
                         "so its observed information is not available")
    raw = _linear_raw_score(est, X, offset)
    Xv, yv = _validate_X_y_for_inference(est, X, y, owner)
    if hasattr(est, "classes_"):
        yv = (yv == est.classes_[1]).astype(np.float64)
    yv = fam.check_target(yv, for_nll=True)
    w = _check_sample_weight(sample_weight, yv, owner)
    if offset is not None:
        _check_offset(offset, Xv.shape[0], owner)
    fi = bool(est.fit_intercept)
    if quantile_family:
        tau = fam.quantile if isinstance(fam, AsymmetricLaplace) else 0.5
        cov = _kernel_sandwich(Xv, yv - raw, w, tau, fi)
    else:
        g, h = fam._grad_hess(yv, raw)
        if isinstance(fam, Huber):
            h = _solvers.huber_curvature(fam, yv, raw, h)
        Hinv = _inverse_gram(Xv, w * h, fi, "observed information")
        if method == "information":
            cov = Hinv
        else:
            cov = Hinv @ _design_gram(Xv, w * g * g, fi) @ Hinv
    # intercept first, as in the printed table
    order = np.r_[Xv.shape[1], np.arange(Xv.shape[1])] if fi else np.arange(Xv.shape[1])
    cov = cov[np.ix_(order, order)]
    coef = np.r_[est.intercept_, est.coef_] if fi else np.asarray(est.coef_, dtype=float)
    names = getattr(est, "feature_names_in_", None)
    names = [str(n) for n in names] if names is not None else [f"x{j}" for j in range(Xv.shape[1])]
    names = (["intercept"] if fi else []) + names
    se = np.sqrt(np.maximum(np.diag(cov), 0.0))
    with np.errstate(divide="ignore", invalid="ignore"):
        z = coef / se
    p_value = 2.0 * stats.norm.sf(np.abs(z))
    q = stats.norm.ppf(0.5 + float(level) / 2.0)
    pos = w > 0
    n_rows = int(pos.sum())
    ll = -float(np.dot(w, fam.nll(yv, raw)))
    try:
        k_nuis = len(fam._fit_nuisance(yv, raw, w))
    except ValueError:
        k_nuis = len(fam.params)
    k = coef.size + k_nuis
    dev = float(np.dot(w, fam.deviance(yv, raw)))
    base = fam.baseline(yv, w, offset=offset)
    null_raw = np.full_like(yv, base) if offset is None else base + np.asarray(offset, dtype=float)
    null = float(np.dot(w, fam.deviance(yv, null_raw)))
    return InferenceTable(
        names=names, coef=coef, se=se, z=z, p_value=p_value, ci_low=coef - q * se, ci_high=coef + q * se,
        level=float(level), method=method, family=fam, n_rows=n_rows, n_params=k, log_likelihood=ll,
        aic=2.0 * k - 2.0 * ll, bic=k * np.log(n_rows) - 2.0 * ll, deviance=dev, null_deviance=null,
        d2=1.0 - dev / null if null > 0 else float("nan"), n_iter=int(est.n_iter_), covariance=cov,
    )


def _validate_X_y_for_inference(est, X, y, owner):
    from sklearn.utils.validation import validate_data

    from .linear import _check_finite_rows, _check_numeric_columns

    _check_numeric_columns(X, owner)
    X, y = validate_data(est, X, y, reset=False, dtype=np.float64, order="C",
                         accept_sparse=("csr", "csc"), ensure_all_finite=False)
    if sparse.issparse(X):
        X = X.tocsr()
    _check_finite_rows(X, owner)
    return X, y
