"""The XGBoost cluster refit reads each new tree's leaves from the change of XGBoost's cached
margins (``lossfam._xgboost_refit.leaves_from_margins``): the same leaves as ``pred_leaf``; rows the
change cannot place are read by ``pred_leaf``, and margins not built as assumed give None."""
from __future__ import annotations

import numpy as np
import pytest

xgb = pytest.importorskip("xgboost")
from lossfam import _xgboost_refit as refit  # noqa: E402
from lossfam._boost import facts  # noqa: E402

import lossfam  # noqa: E402


def _data(seed, n=4000):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, 5))
    y = np.exp(0.4 * X[:, 0] - 0.3 * X[:, 1]) * rng.gamma(2.0, 1.0, n) + 50.0 * (X[:, 2] > 1.5)
    return X, y, rng.uniform(0.5, 2.0, n)


@pytest.mark.parametrize("weighted", [False, True])
def test_leaves_from_margins_equal_pred_leaf(weighted):
    """Every tree of a custom-objective training: the leaves read from the margins XGBoost hands the
    objective are pred_leaf's, row for row, also with margins far from zero (where the rounding of
    the cached sums is largest) and with sign gradients (leaves of equal or nearly equal values)."""
    X, y, w = _data(3)
    for shift in (0.0, 1e4):
        d = xgb.DMatrix(X, y + shift, weight=w if weighted else None, base_margin=np.full(y.size, shift))
        seen = []

        def obj(preds, dtrain):
            seen.append(np.asarray(preds, dtype=np.float32).copy())
            r = y + shift - preds
            return np.where(r > 0, -0.9, 0.1) * (w if weighted else 1.0), np.ones_like(r)

        b = xgb.train({"max_depth": 4, "eta": 0.5, "nthread": 1, "tree_method": "hist"}, d, 12, obj=obj)
        unsure, whole = 0, 0
        for t in range(1, len(seen)):
            n_nodes, nodes, values = refit.tree_leaves(b, t - 1)
            tree = b[t - 1:t]
            expect = np.asarray(tree.predict(d, pred_leaf=True), dtype=np.intp).reshape(-1)
            assert expect.max() < n_nodes
            asked = []

            def read_rows(idx):
                asked.append(idx)
                return tree.predict(d.slice(idx), pred_leaf=True)

            got = refit.leaves_from_margins(nodes, values, seen[t - 1], seen[t], read_rows)
            if got is None:
                whole += 1
                continue
            np.testing.assert_array_equal(got, expect)
            unsure += sum(a.size for a in asked)
        if shift:  # near 1e4 the rounding (2^-10) hides the gaps between some leaves: rows or trees read
            assert unsure + whole > 0
        else:
            assert whole <= 1, whole


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
        return refit.leaves_from_margins(nodes, vals, b, a, read_rows)

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
    np.testing.assert_array_equal(refit.leaves_from_margins(nodes[:1], values[:1], before,
                                                            (before + values[0]).astype(np.float32), read_rows),
                                  np.full(1000, 3))


@pytest.mark.parametrize("weighted", [False, True])
def test_refit_reads_margins_and_trains_the_same_model(weighted, monkeypatch):
    """The refit objective and callback in one process (XGBoost's collective of one worker): the
    model trained with leaves read from the margins is bit for bit the one trained with pred_leaf
    on every tree, and only the last tree (no objective call after it) is read whole by pred_leaf."""
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
    monkeypatch.setattr(refit, "leaves_from_margins", lambda *a: None)
    slow, timing = run()
    assert timing["by_prediction"] == 15
    assert bytes(fast.save_raw("json")) == bytes(slow.save_raw("json"))
