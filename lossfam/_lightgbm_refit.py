"""Median / quantile leaf refit inside ``lightgbm.dask`` training (lossfam's custom path on a cluster).

Imported only when such a training runs (it imports lightgbm and distributed).
``lightgbm.dask`` trains each worker's rows with ``model_factory(**params).fit(...)``
and hands every worker LightGBM's network parameters (``machines``,
``local_listen_port``, ``num_machines``); ``RefitRegressor`` is that model
factory.  Its ``fit`` runs LightGBM's rounds with two additions:

* before each round (a callback), the trees grown since the last one are
  refit.  The rows' leaves of the newest tree come from the change of
  LightGBM's own training scores (``leaves_from_scores``: it adds each row's
  leaf value to its float64 score; rows of leaves whose values it cannot tell
  apart, and trees whose scores were not built so, by ``pred_leaf``); per leaf, the residual quantile ``y - raw`` over the rows of every
  worker, exact by selection (``lossfam._boost.cluster.leaf_quantiles``, the
  quantile definition LightGBM renews by, ``facts.renewal_definition``), times
  the learning rate, set with ``Booster.set_leaf_output``.  Every worker
  computes the same float64 numbers (the reductions add the workers' arrays in
  rank order), so every worker's model is the same, and ``lightgbm.dask``
  returns one of them.  The worker adds the refit leaves to its rows' raw
  scores (LightGBM's own training scores never see edited leaves);
* the objective (``Growth``) hands LightGBM the growth gradients at those raw
  scores (``growth_gradients``), as local training does.

After the last round the last tree is refit; with ``keep`` the worker's refit
raw scores (not LightGBM's buffer) are kept for the check and the nuisance fit
(``cluster.keep_scores``), and the refit's seconds, reductions and the number of
workers ride on the returned model (``finish`` reads and removes them).

The reduction (``Allreduce``) is built on ``distributed.Variable``: at step s
each worker sets its array, as bytes, under ``<prefix>-s-<rank>`` and reads the
others' (a read waits until the variable exists, at most ``REDUCE_TIMEOUT``
seconds, then a clear error).  Once a worker has read every value of step s,
every worker has finished reading step s - 1, so each deletes its own s - 1
variable then; the client deletes the last step's at the end (``finish``).  A
worker that fails deletes its own last two and sets ``<prefix>-abort`` (so does
the client after an error, ``stop``, which deletes the mark again later), and a
worker waiting at a reduction looks for the mark every ``POLL`` seconds and
stops (deleting its own), so that no worker holds its thread until the timeout.
Only the public ``distributed.Variable`` is used.  The data sent per reduction
is what ``leaf_quantiles`` reduces: O(leaves) numbers, never rows.  A worker's
rank is its entry in LightGBM's ``machines`` list (``rank_of``); before the
first tree the workers check that their ranks are distinct (one reduction).
"""
from __future__ import annotations

import threading
import time
import uuid
from urllib.parse import urlparse

import numpy as np

from ._boost import cluster
from ._boost.gradients import growth_gradients
from ._boost.leaves import FLOAT64_UNIT, leaves_from_scores
from ._lightgbm_keep import KeepingRegressor, training_scores

#: seconds a worker waits for another worker's value at one reduction before it gives up
REDUCE_TIMEOUT = 600.0
#: while waiting, every this many seconds a worker looks whether the training was stopped (``abort``)
POLL = 1.0
#: names of this module's distributed Variables start with this (then the training's token)
PREFIX = "lossfam-lgb-refit"

# per process: the refit state of each training running in this process, by (token, thread)
_STATE: dict = {}


class Allreduce:
    """Sum of equal-shape float64 arrays over ``world`` workers, by distributed Variables (module
    docstring).  Every worker calls it with the same shapes in the same order; all get the same
    bits (the arrays are added in rank order).  ``timeout``: seconds to wait for a worker's value."""

    def __init__(self, token, rank, world, timeout=REDUCE_TIMEOUT, client=None):
        self.token, self.rank, self.world, self.timeout = token, int(rank), int(world), float(timeout)
        self.step = 0
        self._client = client

    @property
    def client(self):
        if self._client is None:
            from distributed import get_client

            self._client = get_client()
        return self._client

    def name(self, step, rank):
        return f"{PREFIX}-{self.token}-{step}-{rank}"

    def drop_own(self):
        """Delete this worker's variables of the last two steps (after a failure; never raises)."""
        from distributed import Variable

        for s in (self.step - 2, self.step - 1):
            if s >= 0 and self.world > 1:
                try:
                    Variable(self.name(s, self.rank), self.client).delete()
                except Exception:  # (a leftover variable is a few bytes on the scheduler)
                    pass

    def abort_as(self, why):
        """Tell the other workers this training stopped (they stop waiting within ``POLL`` seconds)."""
        if self.world > 1 and self._stopped() is None:
            abort(self.client, self.token, why)

    def _stopped(self):
        from distributed import Variable

        try:
            return Variable(f"{PREFIX}-{self.token}-abort", self.client).get(timeout=0.001)
        except (TimeoutError, OSError):
            return None

    def _wait(self, s, r):
        """Worker r's value of step s: waits in slices of ``POLL`` s, stops when the training was
        stopped or after ``timeout`` s."""
        from distributed import Variable

        deadline = time.monotonic() + self.timeout
        while True:
            left = deadline - time.monotonic()
            try:
                return Variable(self.name(s, r), self.client).get(timeout=max(min(POLL, left), 0.001))
            except (TimeoutError, OSError) as exc:
                who = self._stopped()
                if who is not None:
                    raise RuntimeError(f"leaf refit on the LightGBM cluster: worker {self.rank} stopped at reduction {s}: "
                                       f"the training was stopped ({who})") from None
                if time.monotonic() >= deadline:
                    raise RuntimeError(
                        f"leaf refit on the LightGBM cluster: worker {self.rank} of {self.world} waited {self.timeout:g} s "
                        f"for worker {r}'s value at reduction {s}; that worker failed or stalls") from exc

    def __call__(self, a):
        from distributed import Variable

        a = np.ascontiguousarray(a, dtype=np.float64)
        if self.world == 1:
            return a.copy()
        s = self.step
        self.step += 1
        client = self.client
        try:
            Variable(self.name(s, self.rank), client).set(a.tobytes())
            parts = []
            for r in range(self.world):
                if r == self.rank:
                    parts.append(a)
                    continue
                got = self._wait(s, r)
                part = np.frombuffer(got, dtype=np.float64)
                if part.size != a.size:
                    raise RuntimeError(f"leaf refit on the LightGBM cluster: worker {r} sent {part.size} numbers at "
                                       f"reduction {s}, worker {self.rank} {a.size}; the workers are out of step")
                parts.append(part)
        except BaseException:
            self.drop_own()
            raise
        if s > 0:  # every worker has set step s, so each has read all of step s - 1
            Variable(self.name(s - 1, self.rank), client).delete()
        total = parts[0].copy()
        for part in parts[1:]:
            total += part
        return total


def abort(client, token, who):
    """Mark the training ``token`` as stopped (``who``: why, shown to the waiting workers); never raises."""
    from distributed import Variable

    try:
        Variable(f"{PREFIX}-{token}-abort", client).set(str(who))
    except Exception:  # (the marker only shortens the others' wait; their timeout still holds)
        pass


def stop(client, token):
    """After a failed training: mark it stopped, give the workers still waiting at a reduction
    ``2 POLL`` seconds to see the mark and end their task (each deletes its own variables), then
    delete the mark."""
    from distributed import Variable

    abort(client, token, "by the client after an error")
    time.sleep(2 * POLL)
    Variable(f"{PREFIX}-{token}-abort", client).delete()


def finish(client, token, model):
    """After a training: delete the workers' variables of the last step and return (seconds,
    reductions, detail) of the refit on the worker that returned ``model`` (every reduction of the
    training, the ranks' check included), removed from it; detail as ``_xgboost_refit.take_timing``."""
    from distributed import Variable

    got = model.__dict__.pop("lossfam_refit_", None)
    if got is None:
        return 0.0, 0, {}
    secs, steps, world, detail = got
    if steps > 0 and world > 1:
        for r in range(world):
            Variable(f"{PREFIX}-{token}-{steps - 1}-{r}", client).delete()
    return float(secs), int(steps), detail


def rank_of(params, address=None):
    """(rank, world) of this worker from LightGBM's network parameters as ``lightgbm.dask`` hands
    them to each worker: its position in ``machines`` ("host:port,...") is the entry with its
    ``local_listen_port`` (and, where several share the port, its host; ``address``: the dask
    worker's).  The entries are distinct, so the workers' ranks are 0..world-1."""
    machines, port = params.get("machines"), params.get("local_listen_port")
    if not machines or port is None:
        raise RuntimeError("leaf refit on the LightGBM cluster: lightgbm.dask handed this worker no 'machines' and "
                           "'local_listen_port'; its rank among the workers is unknown")
    entries = [e.strip() for e in str(machines).split(",") if e.strip()]
    hosts = [e.rsplit(":", 1)[0] for e in entries]
    ports = [int(e.rsplit(":", 1)[1]) for e in entries]
    found = [i for i, p in enumerate(ports) if p == int(port)]
    if len(found) > 1 and address:
        host = urlparse(address).hostname
        same = [i for i in found if hosts[i] == host]
        if len(same) != 1:
            import socket

            try:
                ip = socket.gethostbyname(host)
                same = [i for i in found if socket.gethostbyname(hosts[i]) == ip]
            except OSError:
                same = []
        found = same
    if len(found) != 1:
        raise RuntimeError(f"leaf refit on the LightGBM cluster: this worker (port {port}, {address}) is not exactly one "
                           f"entry of machines={machines!r}; its rank is unknown")
    world = int(params.get("num_machines") or len(entries))
    if world != len(entries):
        raise RuntimeError(f"leaf refit on the LightGBM cluster: num_machines={world} but machines lists {len(entries)}")
    return found[0], world


class Spec:
    """What every worker needs (picklable): the training's token, the leaf rule and level (of the
    growth gradients; ``leaf_level``: of the leaves' quantile, default the same), the learning rate,
    LightGBM's renewal definition, an upper bound on the leaves per tree (``num_leaves``), the
    reduction timeout."""

    def __init__(self, rule, level, learning_rate, definition, max_leaves, timeout=None, leaf_level=None):
        self.token = uuid.uuid4().hex
        self.rule, self.level, self.learning_rate = rule, float(level), float(learning_rate)
        self.leaf_level = self.level if leaf_level is None else float(leaf_level)
        self.definition, self.max_leaves = definition, int(max_leaves)
        self.timeout = REDUCE_TIMEOUT if timeout is None else float(timeout)


class _Worker(cluster.RefitTally):
    """One worker's side of a refit training: its rows, its raw scores with refit leaves, its trees done."""

    def __init__(self, spec, X, y, w, init_score, reduce):
        super().__init__()
        self.spec, self.X, self.reduce = spec, X, reduce
        self.y = np.asarray(y, dtype=np.float64).reshape(-1)
        self.w = None if w is None else np.asarray(w, dtype=np.float64).reshape(-1)
        self.raw = (np.zeros(self.y.size) if init_score is None
                    else np.array(init_score, dtype=np.float64).reshape(-1))
        self.done = 0
        self.scores = None  # LightGBM's training scores at the last catch_up
        self.score_trees = 0  # the trees those scores hold

    def gradients(self):
        return growth_gradients(self.spec.rule, self.spec.level, self.y, self.raw, self.w)

    def catch_up(self, booster, training=True):
        """Refit every tree of ``booster`` not refit yet (all workers together).  ``training``: the
        booster still holds its training data (a callback's; ``lightgbm.train`` returns a booster
        rebuilt from its model string, whose training scores are gone)."""
        t0 = time.perf_counter()
        sp = self.spec
        n_trees = booster.num_trees()
        scores = None
        if training:
            try:  # LightGBM's own training scores (original leaves; the Python objective's: raw scores)
                scores = training_scores(booster)
            except Exception:  # (LightGBM's C API changed: every tree by pred_leaf)
                scores = None
            if scores is not None and scores.size != self.y.size:
                scores = None

        red = self.timed(self.reduce)
        while self.done < n_trees:
            t = self.done
            leaves = None
            if scores is not None and self.scores is not None and self.score_trees == t and t + 1 == n_trees:
                n_t = int(booster.dump_model(start_iteration=t, num_iteration=1)["tree_info"][0]["num_leaves"])
                values = [booster.get_leaf_output(t, j) for j in range(n_t)]

                def read_rows(idx, t=t):
                    self.rows_by_prediction += idx.size
                    rows = self.X.iloc[idx] if hasattr(self.X, "iloc") else self.X[idx]
                    return booster.predict(rows, pred_leaf=True, start_iteration=t, num_iteration=1)

                leaves = leaves_from_scores(np.arange(n_t), values, self.scores, scores, read_rows, FLOAT64_UNIT)
            if leaves is None:
                leaves = np.asarray(booster.predict(self.X, pred_leaf=True, start_iteration=t, num_iteration=1),
                                    dtype=np.intp).reshape(-1)
                self.by_prediction += 1
            n_leaves = sp.max_leaves
            if leaves.size and leaves.max() >= n_leaves:  # (num_leaves bounds every tree: LightGBM's own limit)
                raise RuntimeError(f"tree {t} has leaf {leaves.max()}, above num_leaves={n_leaves}")
            values, has, k = cluster.leaf_quantiles(red, self.reduce.rank, self.reduce.world, leaves,
                                                    self.y - self.raw, self.w,
                                                    n_leaves, sp.leaf_level, sp.definition)
            table = np.zeros(n_leaves)
            own = np.flatnonzero(np.bincount(leaves, minlength=n_leaves))  # (no sort of the rows)
            for j in own[~has[own]]:  # leaves whose rows all weigh 0 keep LightGBM's value (as on one machine)
                table[j] = booster.get_leaf_output(t, int(j))
            table[has] = sp.learning_rate * values[has]
            for j in np.flatnonzero(has):
                booster.set_leaf_output(t, int(j), float(table[j]))
            self.raw += table[leaves]
            self.reductions += k
            self.done += 1
        self.scores, self.score_trees = scores, n_trees
        self.seconds += time.perf_counter() - t0


def _key(token):
    # per training and thread: a worker runs its whole fit (callbacks, objective) in one thread, and
    # threads of one process may be several workers (LocalCluster(processes=False))
    return token, threading.get_ident()


class Growth:
    """The objective LightGBM calls on a refit training: the growth gradients at the worker's raw
    scores with the refit leaves (``_Worker``).  Holds only the token: lightgbm deep-copies it."""

    def __init__(self, token):
        self.token = token

    def __call__(self, y_true, y_pred):
        st = _STATE.get(_key(self.token))
        if st is None:
            raise RuntimeError("lossfam's refit objective runs only inside lossfam.lightgbm.train on a cluster")
        return st.gradients()

    def __repr__(self):
        return "lossfam_refit"


class _BeforeRound:
    """LightGBM callback: refit the trees grown so far before each round."""

    order = -1000
    before_iteration = True

    def __init__(self, state):
        self.state = state

    def __call__(self, env):
        self.state.catch_up(env.model)


class RefitRegressor(KeepingRegressor):
    """The model factory of a refit training: ``fit(..., refit=Spec, keep=(token, targets))``
    (module docstring); without ``refit`` it is ``KeepingRegressor``."""

    def fit(self, X, y, sample_weight=None, init_score=None, refit=None, keep=None, **kwargs):
        if refit is None:
            return super().fit(X, y, sample_weight=sample_weight, init_score=init_score, keep=keep, **kwargs)
        params = self.get_params()
        address = cluster._worker_address()
        rank, world = rank_of(params, address)
        reduce = Allreduce(refit.token, rank, world, refit.timeout)
        # the workers agree on their ranks: each adds a one at its own (before any tree)
        seen = reduce(np.eye(world)[rank])
        if not np.array_equal(seen, np.ones(world)):
            raise RuntimeError(f"leaf refit on the LightGBM cluster: the workers' ranks overlap ({seen})")
        st = _Worker(refit, X, y, sample_weight, init_score, reduce)
        key = _key(refit.token)
        _STATE[key] = st
        try:
            callbacks = list(kwargs.pop("callbacks", None) or [])
            callbacks.append(_BeforeRound(st))
            kwargs["callbacks"] = callbacks
            self.set_params(objective=Growth(refit.token))
            super().fit(X, y, sample_weight=sample_weight, init_score=init_score, **kwargs)
            booster = self.booster_
            st.catch_up(booster, training=False)  # the last tree
        except BaseException as exc:  # the others would wait for this worker's next value: tell them
            reduce.abort_as(f"worker {rank} failed: {type(exc).__name__}: {exc}"[:300])
            reduce.drop_own()
            # lightgbm.dask frees LightGBM's network (per thread) only after a fit that succeeded: free it
            # here, or the worker's next training can find it half set up ("initialize the network first")
            try:
                from lightgbm.basic import _LIB, _safe_call

                _safe_call(_LIB.LGBM_NetworkFree())
            except Exception:  # (nothing more to undo)
                pass
            raise
        finally:
            _STATE.pop(key, None)
        if keep is not None and address is not None:
            token, targets = keep
            cluster.keep_scores(token, st.raw, st.y if targets else None, st.w if targets else None,
                                booster.current_iteration())
        # read (and removed) by the client: the refit's share of the engine's training call
        self.lossfam_refit_ = (st.seconds, reduce.step, world, st.detail(reduce.step))
        return self
