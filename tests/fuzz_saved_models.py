"""Worker for the saved-model fuzz (run in a subprocess by tests/test_fuzz_files.py).

    python fuzz_saved_models.py ENGINE START STOP SEED MODE FOLDER

trains one small model per registered family, the test suite's user family
included (deterministic: one thread, fixed
data), then for mutation i in [START, STOP) damages the saved file of family
i mod (number of families) with a generator seeded by (SEED, i), loads it and
predicts.  One line per mutation on stdout, flushed before the next starts:

    i family outcome

outcome: ``refused`` (ValueError at load), ``identical`` (predictions equal bit
for bit), ``changed`` (loaded, predictions differ), or ``error:Type`` (any other
exception).  A crash or hang shows as a missing line; the parent records it
and restarts after it.

MODE ``bytes`` mutates the file's bytes.  MODE ``resealed`` mutates the
engine's model text inside the document and recomputes the checksum, so the
damage reaches the structural checks (and, past them, the engine's parser).
"""
from __future__ import annotations

import json
import os
import sys

import numpy as np

import lossfam
from lossfam._filecheck import reseal

N_ROWS, N_FEATURES, ROUNDS = 120, 3, 3


def _data(name):
    rng = np.random.default_rng(11)
    X = rng.normal(size=(N_ROWS, N_FEATURES))
    eta = 0.5 * X[:, 0]
    # targets inside each family's support: draws from the family's own law at raw score eta
    law = lossfam.family(name).distribution(eta)
    y = np.asarray(law.rvs(random_state=rng), dtype=float)
    return X, y


def train(engine, name):
    X, y = _data(name)
    if engine == "lightgbm":
        import lightgbm as lgb
        import lossfam.lightgbm as adapter

        params = {"num_threads": 1, "verbose": -1, "num_leaves": 5, "min_data_in_leaf": 5}
        return adapter.train(name, params, lgb.Dataset(X, y), ROUNDS), X
    import xgboost as xgb
    import lossfam.xgboost as adapter

    return adapter.train(name, {"nthread": 1, "max_depth": 2}, xgb.DMatrix(X, y), ROUNDS), X


def load(engine, path):
    if hasattr(lossfam, "load"):
        return lossfam.load(path)
    if engine == "lightgbm":
        import lossfam.lightgbm as adapter
    else:
        import lossfam.xgboost as adapter
    return adapter.load(path)


def mutate_bytes(data: bytes, rng) -> bytes:
    buf = bytearray(data)
    kind = rng.integers(5)
    pos = int(rng.integers(len(buf)))
    if kind == 0:  # replace one byte by a random one
        buf[pos] = (buf[pos] + int(rng.integers(1, 256))) % 256
    elif kind == 1:  # replace one byte by a digit, a sign or a JSON delimiter
        buf[pos] = ord(rng.choice(list('0123456789-+.eE"{}[],:')))
    elif kind == 2:  # delete a short run
        del buf[pos:pos + int(rng.integers(1, 8))]
    elif kind == 3:  # duplicate a short run
        run = buf[pos:pos + int(rng.integers(1, 16))]
        buf[pos:pos] = run
    else:  # truncate
        del buf[pos:]
    return bytes(buf)


def mutate_model_text(text: str, rng) -> str:
    """Damage the engine's model text: a digit, a count, a child index, a line."""
    kind = rng.integers(4)
    if kind == 0:  # change one character to a digit
        pos = int(rng.integers(len(text)))
        return text[:pos] + str(int(rng.integers(10))) + text[pos + 1:]
    if kind == 1:  # replace one number by an extreme or out-of-range integer
        starts = [i for i in range(1, len(text)) if text[i].isdigit() and not text[i - 1].isdigit()]
        pos = starts[int(rng.integers(len(starts)))]
        stop = pos
        while stop < len(text) and text[stop].isdigit():
            stop += 1
        new = str(rng.choice([0, 1, 2, 7, 15, 99, 2**31 - 1, 2**31, -2, 10**12]))
        return text[:pos] + new + text[stop:]
    if kind == 2:  # delete one line (LightGBM) or one element of a list (XGBoost JSON)
        sep = "\n" if "\n" in text else ","
        parts = text.split(sep)
        del parts[int(rng.integers(len(parts)))]
        return sep.join(parts)
    pos = int(rng.integers(len(text)))  # delete one character
    return text[:pos] + text[pos + 1:]


def main(engine, start, stop, seed, mode, folder):
    sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
    from user_families import LogisticErrors

    lossfam.register(LogisticErrors, replace=True)  # a user-registered family is saved and loaded too
    fams = lossfam.available(scores="one")
    models, originals, preds = {}, {}, {}
    for name in fams:
        model, X = train(engine, name)
        path = os.path.join(folder, f"{engine}-{name}.json")
        model.save(path)
        with open(path, "rb") as fh:
            originals[name] = fh.read()
        models[name] = X
        preds[name] = np.asarray(model.predict(X))
    target = os.path.join(folder, f"{engine}-mutated.json")
    for i in range(start, stop):
        name = fams[i % len(fams)]
        rng = np.random.default_rng([seed, i])
        if mode == "bytes":
            data = mutate_bytes(originals[name], rng)
        else:
            doc = json.loads(originals[name])
            doc["model"] = mutate_model_text(doc["model"], rng)
            data = json.dumps(reseal(doc)).encode("utf-8")
        with open(target, "wb") as fh:
            fh.write(data)
        try:
            loaded = load(engine, target)
        except ValueError:
            outcome = "refused"
        except Exception as exc:  # noqa: BLE001 - reported, the parent fails the test
            outcome = f"error:{type(exc).__name__}"
        else:
            try:
                new = np.asarray(loaded.predict(models[name]))
            except Exception as exc:  # noqa: BLE001
                outcome = f"error:{type(exc).__name__}:at-predict"
            else:
                outcome = "identical" if np.array_equal(new, preds[name]) else "changed"
        print(i, name, outcome, flush=True)


if __name__ == "__main__":
    a = sys.argv[1:]
    main(a[0], int(a[1]), int(a[2]), int(a[3]), a[4], a[5])
