"""The cluster refit reads each new tree's leaves from the change of the engine's cached training
scores (``lossfam._boost.leaves.leaves_from_scores``: XGBoost's float32 margins handed to the
objective, LightGBM's float64 training-score buffer): the same leaves as the engine's leaf
prediction; rows the change cannot place are read by that prediction, and scores not built as
assumed give None."""
from __future__ import annotations

import numpy as np
import pytest

from lossfam._boost.facts import ENGINES
from lossfam._boost.leaves import FLOAT32_UNIT, FLOAT64_UNIT, leaves_from_scores

import lossfam  # noqa: E402


def _data(seed, n=4000):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, 5))
    y = np.exp(0.4 * X[:, 0] - 0.3 * X[:, 1]) * rng.gamma(2.0, 1.0, n) + 50.0 * (X[:, 2] > 1.5)
    return X, y, rng.uniform(0.5, 2.0, n)


def _rounds(engine, X, y, w, shift, rounds=12):
    """Train ``rounds`` trees of sign gradients (unit Hessians) from a start of ``shift``; returns the
    engine's cached training scores before each round, and per tree t (nodes, values, leaf
    prediction of rows idx) and the scores' unit."""
    def gradients(scores):
        r = y + shift - scores
        return np.where(r > 0, -0.9, 0.1) * (1.0 if w is None else w), np.ones_like(r)

    seen = []
    if engine == "xgboost":
        xgb = pytest.importorskip("xgboost")
        from lossfam._xgboost_refit import tree_leaves

        d = xgb.DMatrix(X, y + shift, weight=w, base_margin=np.full(y.size, shift))

        def obj(preds, dtrain):
            seen.append(np.asarray(preds, dtype=np.float32).copy())
            return gradients(np.asarray(preds, dtype=np.float64))

        b = xgb.train({"max_depth": 4, "eta": 0.5, "nthread": 1, "tree_method": "hist"}, d, rounds, obj=obj)

        def tree(t):
            _, nodes, values = tree_leaves(b[t:t + 1])
            return nodes, values, lambda idx: b[t:t + 1].predict(d.slice(idx), pred_leaf=True)
        return seen, tree, FLOAT32_UNIT
    lgb = pytest.importorskip("lightgbm")
    from lossfam._lightgbm_keep import training_scores

    def keep(env):
        seen.append(training_scores(env.model))
    keep.before_iteration = True

    def obj(preds, data):
        return gradients(np.asarray(preds, dtype=np.float64))

    b = lgb.train({"objective": obj, "num_leaves": 16, "learning_rate": 0.5, "verbose": -1, "num_threads": 1},
                  lgb.Dataset(X, y + shift, weight=w, init_score=np.full(y.size, shift)), rounds, callbacks=[keep])

    def tree(t):
        n = int(b.dump_model(start_iteration=t, num_iteration=1)["tree_info"][0]["num_leaves"])
        return (np.arange(n), np.array([b.get_leaf_output(t, j) for j in range(n)]),
                lambda idx: b.predict(X[idx], pred_leaf=True, start_iteration=t, num_iteration=1))
    return seen, tree, FLOAT64_UNIT


@pytest.mark.parametrize("engine", ENGINES)
@pytest.mark.parametrize("weighted", [False, True])
def test_leaves_from_scores_equal_the_engines_leaf_prediction(engine, weighted):
    """Every tree of a training on sign gradients (leaves of equal or nearly equal values): the
    leaves read from the change of the engine's cached scores are the engine's own leaf
    prediction, row for row, also with scores far from zero (where the rounding of the cached sums
    is largest)."""
    X, y, w = _data(3)
    for shift in (0.0, 1e4):
        seen, tree, unit = _rounds(engine, X, y, w if weighted else None, shift)
        unsure, whole = 0, 0
        for t in range(1, len(seen)):
            nodes, values, predict = tree(t - 1)
            expect = np.asarray(predict(np.arange(y.size)), dtype=np.intp).reshape(-1)
            asked = []

            def read_rows(idx):
                asked.append(idx)
                return predict(idx)

            got = leaves_from_scores(nodes, values, seen[t - 1], seen[t], read_rows, unit)
            if got is None:
                whole += 1
                continue
            # reference: the engine's own leaf prediction (Booster.predict(pred_leaf=True), xgboost 3.2 /
            # lightgbm 4.7 as installed)
            np.testing.assert_array_equal(got, expect)
            unsure += sum(a.size for a in asked)
        if shift and engine == "xgboost":  # near 1e4 float32's rounding (2^-10) hides some leaves' gaps
            assert unsure + whole > 0
        elif weighted:  # (weights of their own per row: leaf values apart)
            assert whole == 0, whole
        else:  # unit weights: pure leaves of equal size take equal values; most trees are still read
            assert whole <= (len(seen) - 1) // 3, whole


def test_leaves_that_cannot_be_told_apart_are_read():
    rng = np.random.default_rng(0)
    nodes, values = np.array([3, 4, 5]), np.array([-0.5, 0.25, 0.75], dtype=np.float32)
    before = rng.normal(size=1000).astype(np.float32)
    leaf = rng.choice(3, size=1000, p=[0.8, 0.1, 0.1])  # (a fifth of the rows in leaves 4 and 5)
    asked = []

    def read_rows(idx):
        asked.append(idx)
        return nodes[leaf[idx]]

    def from_margins(vals, b, a):
        asked.clear()
        return leaves_from_scores(nodes, vals, b, a, read_rows, FLOAT32_UNIT)

    after = (before + values[leaf]).astype(np.float32)
    np.testing.assert_array_equal(from_margins(values, before, after), nodes[leaf])
    assert not asked
    # two leaves with the same value: their rows are read, the third leaf's are not
    same = np.array([-0.5, 0.25, 0.25], dtype=np.float32)
    np.testing.assert_array_equal(from_margins(same, before, (before + same[leaf]).astype(np.float32)), nodes[leaf])
    np.testing.assert_array_equal(np.concatenate(asked), np.flatnonzero(leaf > 0))
    # leaf values closer than the margins' rounding allows to tell apart: the same
    near = np.array([-0.5, 0.25, 0.25 + 1e-6], dtype=np.float32)
    big = np.full(1000, 100.0, dtype=np.float32)
    np.testing.assert_array_equal(from_margins(near, big, (big + near[leaf]).astype(np.float32)), nodes[leaf])
    np.testing.assert_array_equal(np.concatenate(asked), np.flatnonzero(leaf > 0))
    # a change that is no leaf's value (the margins were not built by adding this tree): None
    off = after.copy()
    off[7] += np.float32(0.1)
    assert from_margins(values, before, off) is None
    # most rows unsure: None (pred_leaf on every row is then cheaper)
    assert from_margins(np.array([0.25, 0.25, 0.25], dtype=np.float32), before,
                        (before + np.float32(0.25)).astype(np.float32)) is None
    # one leaf: every row
    np.testing.assert_array_equal(leaves_from_scores(nodes[:1], values[:1], before,
                                                     (before + values[0]).astype(np.float32), read_rows, FLOAT32_UNIT),
                                  np.full(1000, 3))
    # float64 scores near 1: leaf values 1e-9 apart are told apart (float32 margins could not)
    close = np.array([0.5, 0.5 + 1e-9, 0.5 + 2e-9])
    ones = np.ones(1000)
    asked.clear()
    got = leaves_from_scores(nodes, close, ones, ones + close[leaf], read_rows, FLOAT64_UNIT)
    np.testing.assert_array_equal(got, nodes[leaf])
    assert not asked


@pytest.mark.parametrize("weighted", [False, True])
def test_xgboost_refit_reads_margins_and_trains_the_same_model(weighted, monkeypatch):
    """The refit objective and callback in one process (XGBoost's collective of one worker): the
    model trained with leaves read from the margins is bit for bit the one trained with pred_leaf
    on every tree, and only the last tree (no objective call after it) is read whole by pred_leaf."""
    xgb = pytest.importorskip("xgboost")
    from lossfam import _xgboost_refit as refit
    from lossfam._boost import facts

    X, y, w = _data(5, 3000)
    fam = lossfam.family("asymmetric_laplace", quantile=0.9)
    params = {"max_depth": 4, "eta": 0.3, "nthread": 1, "tree_method": "hist", "base_score": 1.0}

    def run():
        d = xgb.DMatrix(X, y, weight=w if weighted else None)
        obj, cb = refit.make(facts.leaf_rule(fam), facts.leaf_level(fam), params["eta"],
                             facts.renewal_definition("xgboost", weighted=weighted), 1.0)
        b = xgb.train(params, d, 15, obj=obj, callbacks=[cb])
        return b, refit.take_timing(b)

    fast, timing = run()
    assert timing["by_prediction"] == 1 and timing["reductions"] >= 15
    assert 0.0 < timing["reduce_seconds"] <= timing["seconds"]
    monkeypatch.setattr(refit, "leaves_from_scores", lambda *a: None)
    slow, timing = run()
    assert timing["by_prediction"] == 15
    assert bytes(fast.save_raw("json")) == bytes(slow.save_raw("json"))
