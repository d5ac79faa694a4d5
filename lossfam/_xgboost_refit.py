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

The rows' leaves of the newest tree are read from the change of XGBoost's cached margins
(``lossfam._boost.leaves.leaves_from_scores``), which the objective receives anyway, instead of a
``pred_leaf`` prediction of every row (about 4x slower at 5e5 rows); rows of leaves the change
cannot tell apart are read by ``pred_leaf`` on a slice, and a tree whose margins were not built as
assumed by ``pred_leaf`` on every row.  The tree's node count comes from its JSON, the same on
every worker.
"""
from __future__ import annotations

import json
import time
import uuid

import numpy as np
import xgboost as xgb
from xgboost import collective

from ._boost import cluster
from ._boost.gradients import growth_gradients
from ._boost.leaves import FLOAT32_UNIT, leaves_from_scores

_STATE: dict = {}


def _reduce(a, op=collective.Op.SUM):
    return np.asarray(collective.allreduce(np.ascontiguousarray(a, dtype=np.float64), op), dtype=np.float64)


def _key(obj):
    # per training and worker: threads of one process may be several workers (LocalCluster(processes=False))
    return obj.key, collective.get_rank()


class _Worker(cluster.RefitTally):
    def __init__(self):
        super().__init__()
        self.booster = None
        self.dtrain = None
        self.y = self.w = self.raw = None
        self.tables = []
        self.margins = None  # XGBoost's cached margins at the last objective call (float32)
        self.margin_trees = 0  # the number of trees those margins hold


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
        catch_up(self, st, np.asarray(preds, dtype=np.float32).reshape(-1))
        return growth_gradients(self.rule, self.level, st.y, st.raw, st.w)


def tree_leaves(tree):
    """(node count, leaf node ids, their float32 values) of a booster of one tree, from its JSON."""
    doc = json.loads(bytes(tree.save_raw("json")))
    tree = doc["learner"]["gradient_booster"]["model"]["trees"][0]
    left = np.asarray(tree["left_children"], dtype=np.intp)
    nodes = np.flatnonzero(left == -1)
    return left.size, nodes, np.asarray(tree["split_conditions"], dtype=np.float32)[nodes]


def catch_up(obj, st, margins=None):
    """Refit every tree of ``st.booster`` not refitted yet (all workers together); ``margins``:
    XGBoost's cached margins now (objective calls), to read the newest tree's leaves from."""
    if st.booster is None:
        return
    t0 = time.perf_counter()
    rank, world = collective.get_rank(), collective.get_world_size()
    n_trees = st.booster.num_boosted_rounds()
    reduce = st.timed(_reduce)
    for t in range(len(st.tables), n_trees):
        tree = st.booster[t:t + 1]
        n_nodes, nodes, values = tree_leaves(tree)
        leaves = None
        if margins is not None and st.margins is not None and st.margin_trees == t and t + 1 == n_trees:
            def read_rows(idx, tree=tree):
                st.rows_by_prediction += idx.size
                return tree.predict(st.dtrain.slice(idx), pred_leaf=True)

            leaves = leaves_from_scores(nodes, values, st.margins, margins, read_rows, FLOAT32_UNIT)
        if leaves is None:
            leaves = np.asarray(tree.predict(st.dtrain, pred_leaf=True), dtype=np.intp).reshape(-1)
            st.by_prediction += 1
        values, has, reductions = cluster.leaf_quantiles(reduce, rank, world, leaves, st.y - st.raw, st.w, n_nodes,
                                                     obj.level, obj.definition)
        table = np.where(has, obj.eta * values, 0.0).astype(np.float32).astype(np.float64)
        st.tables.append(table)
        st.raw += table[leaves]
        st.reductions += reductions
    if margins is not None:
        st.margins, st.margin_trees = margins.copy(), n_trees
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
        out.set_attr(**{f"lossfam_refit_{k}": repr(v) for k, v in st.detail().items()})
        return out


def take_timing(booster):
    """The workers' refit (this worker's figures), removed from the booster: seconds, of which
    ``reduce_seconds`` in the reductions (waits for the other workers included), reductions, trees
    whose leaves were read by pred_leaf (``by_prediction``: the last tree, and trees whose margins
    could not tell the leaves apart) and rows of the other trees read by it."""
    out = {}
    for k in cluster.RefitTally().detail():
        v = booster.attr(f"lossfam_refit_{k}")
        booster.set_attr(**{f"lossfam_refit_{k}": None})
        out[k] = (float if "seconds" in k else int)(v or 0)
    return out


def make(rule, level, eta, definition, baseline):
    obj = RefitObjective(uuid.uuid4().hex, rule, level, eta, definition, baseline)
    return obj, RefitCallback(obj)
