"""Tests of the LightGBM adapter (lossfam.lightgbm).

Simulated data (seeded numpy Generator, documented in ``_simulate``) stands in
for a real problem; every held-out metric comes from scikit-learn's metric
functions or scipy.stats, outside lossfam.
"""
import json
import subprocess
import sys
import textwrap

import numpy as np
import pytest

lgb = pytest.importorskip("lightgbm")
from scipy import stats  # noqa: E402
from sklearn import metrics as skm  # noqa: E402

import lossfam  # noqa: E402
from lossfam import lightgbm as lfl  # noqa: E402

N_TRAIN, N_TEST, N_FEAT = 20_000, 10_000, 6
PARAMS = dict(learning_rate=0.1, num_leaves=15, min_data_in_leaf=20, verbosity=-1,
              num_threads=2, seed=3, deterministic=True, force_row_wise=True)
ROUNDS = 100


def _simulate(kind, seed=20261201):
    """Features x ~ N(0, I_6); a smooth nonlinear signal s(x); targets drawn per family.

    s(x) = sin(1.5 x0) + 0.8 x1 1[x2 > 0] + 0.3 x3^2 - 0.4 x4 (x5 has no effect).
    continuous: y = 10 + 3 s + noise (laplace b = 1, or Student-t_3 for huber);
    poisson: y ~ Poisson(exp(0.6 s)); gamma: y ~ Gamma(shape 3, mean exp(0.6 s));
    bernoulli: y ~ Bernoulli(expit(1.5 s - 0.3)).
    """
    rng = np.random.default_rng(seed)
    n = N_TRAIN + N_TEST
    X = rng.normal(size=(n, N_FEAT))
    s = np.sin(1.5 * X[:, 0]) + 0.8 * X[:, 1] * (X[:, 2] > 0) + 0.3 * X[:, 3] ** 2 - 0.4 * X[:, 4]
    if kind == "gaussian":
        y = 10 + 3 * s + rng.normal(scale=1.5, size=n)
    elif kind == "laplace":
        y = 10 + 3 * s + rng.laplace(scale=1.0, size=n)
    elif kind == "t3":
        y = 10 + 3 * s + rng.standard_t(3, size=n)
    elif kind == "poisson":
        y = rng.poisson(np.exp(0.6 * s)).astype(float)
    elif kind == "gamma":
        y = rng.gamma(3.0, np.exp(0.6 * s) / 3.0)
    elif kind == "bernoulli":
        y = (rng.uniform(size=n) < 1 / (1 + np.exp(-(1.5 * s - 0.3)))).astype(float)
    else:  # pragma: no cover
        raise AssertionError(kind)
    return X[:N_TRAIN], y[:N_TRAIN], X[N_TRAIN:], y[N_TRAIN:]


def _huber_loss(r, alpha):
    # Huber (1964), Ann. Math. Statist. 35, the rho function: r^2/2 inside |r| <= alpha, alpha|r| - alpha^2/2 outside
    a = np.abs(r)
    return float(np.mean(np.where(a <= alpha, 0.5 * r * r, alpha * a - 0.5 * alpha * alpha)))


# (family, family params, built-in objective params, data kind, held-out score(y, prediction))
PARITY = [
    ("gaussian", {}, {"objective": "regression"}, "gaussian", skm.mean_squared_error),
    ("laplace", {}, {"objective": "regression_l1"}, "laplace", skm.mean_absolute_error),
    ("asymmetric_laplace", {"quantile": 0.1}, {"objective": "quantile", "alpha": 0.1}, "laplace",
     lambda y, p: skm.mean_pinball_loss(y, p, alpha=0.1)),
    ("asymmetric_laplace", {"quantile": 0.5}, {"objective": "quantile", "alpha": 0.5}, "laplace",
     lambda y, p: skm.mean_pinball_loss(y, p, alpha=0.5)),
    ("asymmetric_laplace", {"quantile": 0.9}, {"objective": "quantile", "alpha": 0.9}, "laplace",
     lambda y, p: skm.mean_pinball_loss(y, p, alpha=0.9)),
    ("bernoulli", {}, {"objective": "binary"}, "bernoulli", skm.log_loss),
    ("poisson", {}, {"objective": "poisson"}, "poisson", skm.mean_poisson_deviance),
    ("gamma", {}, {"objective": "gamma"}, "gamma", skm.mean_gamma_deviance),
    ("huber", {"delta": 1.0, "scale": 1.0}, {"objective": "huber", "alpha": 1.0}, "t3",
     lambda y, p: _huber_loss(y - p, 1.0)),
]


@pytest.mark.parametrize("name, fparams, builtin, kind, score", PARITY,
                         ids=[f"{p[0]}-{p[1].get('quantile', '')}" for p in PARITY])
def test_held_out_parity_with_builtin_objective(name, fparams, builtin, kind, score):
    Xtr, ytr, Xte, yte = _simulate(kind)
    ref = lgb.train(dict(PARAMS, **builtin), lgb.Dataset(Xtr, ytr), ROUNDS)
    # huber: the family's threshold delta * scale must equal LightGBM's alpha, so keep scale = 1
    model = lfl.train(lossfam.family(name, **fparams), PARAMS, lgb.Dataset(Xtr, ytr), ROUNDS,
                      prefit_params=(name != "huber"))
    ours, theirs = score(yte, model.predict(Xte)), score(yte, ref.predict(Xte))
    print(f"{name} {fparams}: lossfam {ours:.5f}  built-in {theirs:.5f}")
    assert ours <= 1.01 * theirs, (ours, theirs)
