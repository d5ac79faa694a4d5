"""Median / quantile leaf refit inside ``xgboost.dask`` training (lossfam's custom path on a cluster).

Imported only when such a training runs (it imports xgboost).  Each worker runs
XGBoost's boosting loop on its own rows; before each round the objective
(``RefitObjective``) refits the leaves of the trees grown since its last call:
per leaf, the residual quantile ``y - raw`` of the rows of every worker, exact by
selection (``lossfam._boost.cluster.leaf_quantiles``, reductions by XGBoost's
own collective ``allreduce``: O(leaves) numbers per reduction, no rows), times
the learning rate, rounded to float32 as on one machine.  The worker keeps its
rows' raw scores with the refit leaves (XGBoost's own prediction cache does not
see edited leaves) and grows the next tree on the sign gradient there
(``growth_gradients``), as local training does.  ``RefitCallback`` hands the
worker's booster to the objective before each round and, after the last, refits
the last tree and writes every refit leaf into the model (one JSON edit), which
``xgboost.dask`` returns.  Objective and callback are pickled separately to each
worker; they meet in ``_STATE`` (per process) under the training's key and the worker's rank.
"""
from __future__ import annotations

import time
import uuid

import numpy as np
import xgboost as xgb
from xgboost import collective

from ._boost import cluster
from ._boost.gradients import growth_gradients

_STATE: dict = {}


def _reduce(a, op=collective.Op.SUM):
    return np.asarray(collective.allreduce(np.ascontiguousarray(a, dtype=np.float64), op), dtype=np.float64)


def _key(obj):
    # per training and worker: threads of one process may be several workers (LocalCluster(processes=False))
    return obj.key, collective.get_rank()


class _Worker:
    def __init__(self):
        self.booster = None
        self.dtrain = None
        self.y = self.w = self.raw = None
        self.tables = []
        self.reductions = 0
        self.seconds = 0.0


class RefitObjective:
    """The custom objective of a cluster refit: refit pending trees, then the growth gradients."""

    def __init__(self, key, rule, level, eta, definition, baseline):
        self.key, self.rule, self.level, self.eta = key, rule, float(level), float(eta)
        self.definition, self.baseline = definition, float(baseline)

    def __call__(self, preds, dtrain):
        st = _STATE.setdefault(_key(self), _Worker())
        if st.raw is None:
            st.dtrain = dtrain
            st.y = np.asarray(dtrain.get_label(), dtype=np.float64)
            w = dtrain.get_weight()
            st.w = np.asarray(w, dtype=np.float64) if w.size else None
            margin = dtrain.get_base_margin()
            st.raw = (np.asarray(margin, dtype=np.float64).copy() if margin.size
                      else np.full(st.y.size, self.baseline))
        catch_up(self, st)
        return growth_gradients(self.rule, self.level, st.y, st.raw, st.w)


def catch_up(obj, st):
    """Refit every tree of ``st.booster`` not refitted yet (all workers together)."""
    if st.booster is None:
        return
    t0 = time.perf_counter()
    rank, world = collective.get_rank(), collective.get_world_size()
    for t in range(len(st.tables), st.booster.num_boosted_rounds()):
        leaves = np.asarray(st.booster[t:t + 1].predict(st.dtrain, pred_leaf=True), dtype=np.intp).reshape(-1)
        n_nodes = int(_reduce(np.array([leaves.max() + 1.0 if leaves.size else 0.0]), collective.Op.MAX)[0])
        values, has, reductions = cluster.leaf_quantiles(_reduce, rank, world, leaves, st.y - st.raw, st.w, n_nodes,
                                                     obj.level, obj.definition)
        table = np.where(has, obj.eta * values, 0.0).astype(np.float32).astype(np.float64)
        st.tables.append(table)
        st.raw += table[leaves]
        st.reductions += reductions
    st.seconds += time.perf_counter() - t0


class RefitCallback(xgb.callback.TrainingCallback):
    """Hands the booster to ``RefitObjective`` each round; at the end refits the last tree and writes
    the refit leaves into the model."""

    def __init__(self, objective):
        super().__init__()
        self.objective = objective

    def before_iteration(self, model, epoch, evals_log):
        _STATE.setdefault(_key(self.objective), _Worker()).booster = model
        return False

    def after_training(self, model):
        from .xgboost import _write_leaf_values

        st = _STATE.pop(_key(self.objective), None)
        if st is None or st.raw is None:
            return model
        st.booster = model
        catch_up(self.objective, st)
        out = _write_leaf_values(xgb, model, st.tables)
        # read (and removed) by the client: the refit's share of the engine's training call
        out.set_attr(lossfam_refit_seconds=repr(st.seconds), lossfam_refit_reductions=str(st.reductions))
        return out


def take_timing(booster):
    """(seconds, reductions) the workers' refit took (this worker's), removed from the booster."""
    secs, rounds = booster.attr("lossfam_refit_seconds"), booster.attr("lossfam_refit_reductions")
    booster.set_attr(lossfam_refit_seconds=None, lossfam_refit_reductions=None)
    return float(secs or 0.0), int(rounds or 0)


def make(rule, level, eta, definition, baseline):
    obj = RefitObjective(uuid.uuid4().hex, rule, level, eta, definition, baseline)
    return obj, RefitCallback(obj)
