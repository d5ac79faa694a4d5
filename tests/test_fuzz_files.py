"""Fuzz of saved models: damaged files never crash, hang or load with changed predictions.

Each engine's models (one per registered family and one of a user-registered
family) are saved, then damaged by
seeded random mutations (tests/fuzz_saved_models.py) in a worker subprocess,
so a crash (segfault, abort) or a hang is observed instead of killing the test
run.  A crashed or hung worker is recorded and restarted after the mutation
that killed it.

* ``bytes``: random byte edits of the file.  Promise: the load raises
  ValueError, or the model predicts bit for bit as before.
* ``resealed``: edits of the engine's model text with the checksum recomputed
  (what a hand edit or a malicious file looks like).  Promise: no crash, no
  hang, and only ValueError escapes; predictions may differ (the file says so).

The default run does 28 mutations of each kind per engine; the slow run
(``-m slow``) 5,040 byte mutations and 2,016 resealed edits per engine.
"""
from __future__ import annotations

import collections
import os
import queue
import subprocess
import sys
import threading

import pytest

pytest.importorskip("lightgbm")
pytest.importorskip("xgboost")

WORKER = os.path.join(os.path.dirname(__file__), "fuzz_saved_models.py")
ENGINES = ("lightgbm", "xgboost")
#: seconds one mutation may take (load + predict of a 3-round model) before it counts as a hang;
#: the first line also waits for the worker to import the engine and train one model per family
STEP_TIMEOUT, START_TIMEOUT = 30.0, 180.0


def run_fuzz(engine, n, seed, mode, folder):
    """Run mutations [0, n) and return a Counter of outcomes (crashes and hangs included)."""
    counts = collections.Counter()
    bad = []
    root = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
    env = dict(os.environ, PYTHONPATH=root + os.pathsep + os.environ.get("PYTHONPATH", ""),
               OMP_NUM_THREADS="1", PYTHONWARNINGS="ignore")
    i = 0
    while i < n:
        proc = subprocess.Popen([sys.executable, WORKER, engine, str(i), str(n), str(seed), mode, str(folder)],
                                stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True, env=env)
        lines: queue.Queue = queue.Queue()
        threading.Thread(target=lambda: [lines.put(x) for x in proc.stdout] + [lines.put(None)], daemon=True).start()
        timeout = START_TIMEOUT
        while True:
            try:
                line = lines.get(timeout=timeout)
            except queue.Empty:
                proc.kill()
                proc.wait()
                counts["hang"] += 1
                bad.append((i, "hang"))
                i += 1
                break
            timeout = STEP_TIMEOUT
            if line is None:  # the worker ended: done, or crashed on mutation i
                rc = proc.wait()
                if i < n:
                    counts["crash"] += 1
                    bad.append((i, f"crash (exit {rc})"))
                    i += 1
                break
            k, name, outcome = line.split()
            assert int(k) == i
            counts[outcome] += 1
            if outcome not in ("refused", "identical", "changed"):
                bad.append((i, f"{name}: {outcome}"))
            elif mode == "bytes" and outcome == "changed":
                bad.append((i, f"{name}: loaded with changed predictions"))
            i += 1
    return counts, bad


def _check(engine, n, seed, mode, tmp_path):
    counts, bad = run_fuzz(engine, n, seed, mode, tmp_path)
    print(f"\n{engine} {mode}: {n} mutations: {dict(counts)}")
    assert sum(counts.values()) == n
    assert not bad, f"{engine} {mode}: {bad[:10]}"
    return counts


@pytest.mark.parametrize("engine", ENGINES)
def test_damaged_files_are_refused_or_predict_identically(engine, tmp_path):
    counts = _check(engine, 28, 2026, "bytes", tmp_path)
    assert counts["refused"] > 0


@pytest.mark.parametrize("engine", ENGINES)
def test_edited_engine_models_with_a_valid_checksum_never_crash(engine, tmp_path):
    _check(engine, 28, 7, "resealed", tmp_path)


@pytest.mark.slow
@pytest.mark.parametrize("engine", ENGINES)
def test_thousands_of_byte_mutations_per_engine(engine, tmp_path):
    _check(engine, 5040, 20261202, "bytes", tmp_path)  # 630 mutations per family (7 built-in + 1 user)


@pytest.mark.slow
@pytest.mark.parametrize("engine", ENGINES)
def test_thousands_of_resealed_edits_per_engine(engine, tmp_path):
    _check(engine, 2016, 4242, "resealed", tmp_path)
