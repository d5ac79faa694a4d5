"""LightGBM on a Dask cluster: keep each worker's trained raw scores from LightGBM's own training.

After training, lossfam checks the training rows' raw scores and fits the
nuisance parameters on them.  LightGBM already holds those scores on every
worker: its training-score buffer (start included) is what the next round
would have boosted from.  ``lightgbm.dask`` trains each worker's part with
``model_factory(**params).fit(data, label, sample_weight, init_score, **kwargs)``;
``KeepingRegressor`` is that model factory.  Its ``fit`` adds a callback that,
after the last round, reads the buffer, recovers the raw score from the
objective's output, compares it on 64 of the worker's rows with
``Booster.predict(raw_score=True)`` plus the start, and keeps it with the
float64 targets and weights handed to ``fit`` (LightGBM's own copies are
float32) in ``lossfam._boost.cluster`` (``keep_scores``, per process, keyed by
the training's token and the worker's address).  Nothing is stored on the
model object, which ``lightgbm.dask`` pickles back to the client.

Any failure there (LightGBM's internals changed, a mismatch, not on a dask
worker) keeps nothing, and lossfam predicts the rows as before.

The buffer holds LightGBM's converted output (its ``ConvertOutput``: the mean
for poisson, gamma and tweedie, the raw score for the regression objectives and
a Python objective); ``INVERSE`` maps it back.  Measured on lightgbm 4.7 over
50,000 rows and 100 rounds (quantile with weights, quantile with an offset,
poisson with an offset, gamma with weights, regression with bagging and
missing values): the recovered raw scores are within 2.3e-15 relative
(``|a - b| / max(1, |b|)``) of ``Booster.predict(raw_score=True)`` plus the
start on every row.  Objectives not in ``INVERSE`` (binary's sigmoid loses the
raw score where the probability rounds to 1) keep nothing.

This module imports lightgbm; the workers import it by name when they unpickle
the model factory (lossfam is installed there).
"""
from __future__ import annotations

import ctypes

import numpy as np
from lightgbm import LGBMRegressor

from ._boost import cluster

#: LightGBM objective -> the inverse of its converted output (a Python objective: "identity")
INVERSE = {"regression": "identity", "regression_l1": "identity", "quantile": "identity",
           "poisson": "log", "gamma": "log", "tweedie": "log"}
#: rows per worker compared with Booster.predict before the buffer is kept
SAMPLE_ROWS = 64
#: largest |kept - predicted| / max(1, |predicted|) accepted on those rows
SAMPLE_TOL = 1e-12


def inverse_for(objective):
    """The inverse of LightGBM's output for ``params["objective"]`` (None: keep nothing)."""
    if callable(objective):
        return "identity"
    return INVERSE.get(objective)


def training_scores(booster):
    """The booster's training-score buffer (LightGBM's C API ``LGBM_BoosterGetPredict`` on data 0)."""
    from lightgbm.basic import _LIB, _safe_call

    n = ctypes.c_int64(0)
    _safe_call(_LIB.LGBM_BoosterGetNumPredict(booster._handle, ctypes.c_int(0), ctypes.byref(n)))
    out = np.empty(n.value, dtype=np.float64)
    got = ctypes.c_int64(0)
    _safe_call(_LIB.LGBM_BoosterGetPredict(booster._handle, ctypes.c_int(0), ctypes.byref(got),
                                           out.ctypes.data_as(ctypes.POINTER(ctypes.c_double))))
    if got.value != out.size:
        raise ValueError(f"LightGBM returned {got.value} training scores, announced {out.size}")
    return out


class KeepScores:
    """LightGBM callback: after the last round, keep the worker's trained raw scores (module docstring)."""

    order = 1000  # after LightGBM's own callbacks
    before_iteration = False

    def __init__(self, token, inverse, targets, X, y, w, init_score):
        self.token, self.inverse, self.targets = token, inverse, targets
        self.X, self.y, self.w, self.init_score = X, y, w, init_score

    def __call__(self, env):
        if env.iteration + 1 != env.end_iteration:
            return
        try:
            self._keep(env.model)
        except Exception:  # an optional shortcut must never fail the training: nothing kept, rows predicted
            return

    def _keep(self, booster):
        out = training_scores(booster)
        y = np.asarray(self.y, dtype=np.float64).reshape(-1)
        if out.size != y.size:
            return
        if self.inverse == "log":
            with np.errstate(divide="ignore", invalid="ignore"):
                out = np.log(out)  # (a mean of 0 gives -inf: the check finds the row, the prediction pass names it)
        raw = out
        start = np.zeros(y.size) if self.init_score is None else np.asarray(self.init_score, dtype=np.float64).reshape(-1)
        rows = np.unique(np.linspace(0, y.size - 1, min(SAMPLE_ROWS, y.size)).round().astype(np.intp))
        sample = self.X.iloc[rows] if hasattr(self.X, "iloc") else self.X[rows]
        pred = np.asarray(booster.predict(sample, raw_score=True), dtype=np.float64).reshape(-1) + start[rows]
        if not np.all(np.abs(raw[rows] - pred) <= SAMPLE_TOL * np.maximum(1.0, np.abs(pred))):
            return
        if not self.targets:
            cluster.keep_scores(self.token, raw, None, None, booster.current_iteration())
            return
        w = None if self.w is None else np.asarray(self.w, dtype=np.float64).reshape(-1)
        cluster.keep_scores(self.token, raw, y, w, booster.current_iteration())


class KeepingRegressor(LGBMRegressor):
    """``LGBMRegressor`` whose ``fit(..., keep=(token, inverse, targets))`` keeps the trained raw scores
    on the worker (``KeepScores``; with ``targets``, the float64 targets and weights too); without
    ``keep`` it is LGBMRegressor."""

    def fit(self, X, y, sample_weight=None, init_score=None, keep=None, **kwargs):
        if keep is not None:
            token, inverse, targets = keep
            callbacks = list(kwargs.pop("callbacks", None) or [])
            callbacks.append(KeepScores(token, inverse, targets, X, y, sample_weight, init_score))
            kwargs["callbacks"] = callbacks
        return super().fit(X, y, sample_weight=sample_weight, init_score=init_score, **kwargs)
