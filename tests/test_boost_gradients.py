"""The engines' float32 gradient buffers (lossfam._boost.gradients.Gradients, engine_buffers=True).

They must hold exactly the float64 assembly (unit, guard, weights) rounded to float32, whatever
the row blocks and the number of threads that fill them, for every registered family and a user
family; and they must be checked as the float64 result is (dead rows repaired, invalid rows named
by their row in the whole set).  Targets are drawn from each family's own law (scipy.stats laws,
or lossfam's), on simulated raw scores (a scenario of our own).
"""
from __future__ import annotations

import dataclasses
import sys
from pathlib import Path

import numpy as np
import pytest

import lossfam
from lossfam._boost.gradients import Gradients, resolve_guard
from lossfam._checks import REAL
from lossfam.links import IDENTITY

sys.path.insert(0, str(Path(__file__).parent))
from user_families import LogisticErrors  # noqa: E402

FAMILIES = sorted(lossfam.available(scores="one"))
BLOCK = 64  # small row blocks, so that a few hundred rows span several blocks and threads


def family(name):
    return LogisticErrors(scale=0.7) if name == "user" else lossfam.family(name)


def draw(fam, n, seed):
    """float32 targets from the family's law (as the engines store them), raw scores around them."""
    rng = np.random.default_rng(seed)
    raw = 0.5 + 0.5 * rng.normal(size=n)
    law = fam.distribution(raw)
    for _ in range(100):
        y = np.asarray(law.rvs(random_state=rng), dtype=np.float64).astype(np.float32)
        if fam.target_domain.inside(y.astype(np.float64)).all():
            break
    else:  # pragma: no cover
        pytest.skip(f"{fam.name}: no float32 draw inside the support")
    raw[::13] += rng.normal(scale=3.0, size=raw[::13].size)  # some rows farther out
    return y, raw


@pytest.fixture
def small_blocks(monkeypatch):
    monkeypatch.setattr(Gradients, "_BLOCK", BLOCK)
    monkeypatch.setattr(Gradients, "_MIN_BLOCKS_PER_WORKER", 1)


@pytest.mark.parametrize("weighted", [False, True], ids=["unweighted", "weighted"])
@pytest.mark.parametrize("step_limit", ["auto", None, 0.5])
@pytest.mark.parametrize("name", FAMILIES + ["user"])
def test_engine_buffers_hold_the_float64_result_rounded(name, step_limit, weighted, small_blocks):
    fam = family(name)
    n = 5 * BLOCK + 17
    y32, raw = draw(fam, n, seed=len(name))
    w = np.random.default_rng(1).uniform(0.2, 3.0, n) if weighted else None
    guard = resolve_guard(fam, step_limit)
    g64, h64 = Gradients(fam, guard)(y32.astype(np.float64), raw, w)
    want_g, want_h = g64.astype(np.float32), h64.astype(np.float32)
    for workers in (1, 2, 3, 8):
        grads = Gradients(fam, guard, engine_buffers=True, workers=workers)
        for _ in range(2):  # the buffers are reused from call to call
            g, h = grads(y32, raw, w)
            assert g.dtype == h.dtype == np.float32
            np.testing.assert_array_equal(g, want_g, err_msg=f"{name}: gradient, {workers} workers")
            np.testing.assert_array_equal(h, want_h, err_msg=f"{name}: Hessian, {workers} workers")
        # float64 labels give the same buffers
        g, h = Gradients(fam, guard, engine_buffers=True, workers=workers)(y32.astype(np.float64), raw, w)
        np.testing.assert_array_equal(g, want_g)
        np.testing.assert_array_equal(h, want_h)


@dataclasses.dataclass(frozen=True)
class Faulty(lossfam.Family):
    """Squared error whose Hessian is 0 where y == 5 and NaN where y == 7 (for the checks); y == 9
    gives a gradient finite in float64 but beyond float32's range."""

    name = "faulty_test"
    link_function = IDENTITY
    target_domain = REAL

    def _nll(self, y, raw):
        return 0.5 * (raw - y) ** 2

    def _grad_hess(self, y, raw):
        g = raw - y
        g[y == 9] = 1e39
        h = np.ones_like(g)
        h[y == 5] = 0.0
        h[y == 7] = np.nan
        return g, h


@pytest.mark.parametrize("workers", [1, 2, 3])
def test_engine_buffers_repair_dead_rows_and_name_invalid_rows_of_the_whole_set(workers, small_blocks):
    fam = Faulty()
    n = 6 * BLOCK
    y = np.zeros(n, dtype=np.float32)
    raw = np.linspace(-1.0, 1.0, n)
    dead = [3, BLOCK + 1, 5 * BLOCK + 2]
    y[dead] = 5
    grads = Gradients(fam, resolve_guard(fam, None), engine_buffers=True, workers=workers)
    g, h = grads(y, raw, None)
    np.testing.assert_array_equal(h[dead], np.abs(g[dead]).astype(np.float32))  # a unit Newton step
    assert (h[np.setdiff1d(np.arange(n), dead)] == 1).all()
    # the same repair as the float64 path
    g64, h64 = Gradients(fam, resolve_guard(fam, None))(y.astype(np.float64), raw, None)
    np.testing.assert_array_equal(h, h64.astype(np.float32))

    y[[2 * BLOCK + 7, 4 * BLOCK + 9]] = 7
    with pytest.raises(ValueError, match=rf"faulty_test: .*2 rows.*\[{2 * BLOCK + 7}, {4 * BLOCK + 9}\]"):
        grads(y, raw, None)
    y[:] = 0
    y[3 * BLOCK] = 9  # 1e39 in float64 is infinite in float32: what the engine would receive
    with pytest.raises(ValueError, match=rf"faulty_test: .*row.*\[{3 * BLOCK}\]"):
        grads(y, raw, None)


def test_gradients_pickle_without_their_pool_and_buffers(small_blocks):
    import pickle

    fam = lossfam.family("huber")
    y32, raw = draw(fam, 4 * BLOCK, seed=3)
    grads = Gradients(fam, resolve_guard(fam, "auto"), engine_buffers=True, workers=2)
    g, _ = grads(y32, raw, None)
    copy = pickle.loads(pickle.dumps(grads))
    assert copy.workers == 2 and copy._pool is None and copy._out is None
    np.testing.assert_array_equal(copy(y32, raw, None)[0], g)
