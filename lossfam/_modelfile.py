"""The saved-model file: one JSON document holding the engine's own model and the noise model.

Layout (no pickle; readable with any JSON reader)::

    {"lossfam_model": 2,                  # format version
     "engine": "lightgbm" | "xgboost",
     "family": {"name": ..., "params": {...}},
     "baseline": <float> | [<float>, ...], # the starting raw score (k of them: several-score family)
     "extra": {...},                      # engine-specific settings
     "model": <the engine's own model text or JSON, as a string>,
     "integrity": {"algorithm": "sha256" | "hmac-sha256", "digest": <hex>}}

The integrity record covers every other field (canonical JSON: sorted keys,
no spaces), and is checked before any field is used and before the engine's
parser sees the model.  Without a key it is a SHA-256 checksum: it detects
corruption, truncation and hand edits, **not** deliberate tampering (anyone
can recompute it).  With ``key=`` it is an HMAC-SHA-256 signature that only
holders of the key can produce.  Load only files from sources you trust.

Saving is atomic: the document goes to a unique temporary file in the same
folder (``tempfile.mkstemp``), is flushed to disk, then renamed over ``path``
(``os.replace``); on any failure the temporary file is removed and ``path``
is left as it was.
"""
from __future__ import annotations

import json
import math
import os
import tempfile

import numpy as np

from . import _filecheck
from .registry import family as make_family

FORMAT_VERSION = 2
_KEY = "lossfam_model"
ENGINES = ("lightgbm", "xgboost")
_FIELDS = {_KEY, "engine", "family", "baseline", "extra", "model", _filecheck.SEAL_FIELD}


def _number_map(value, what: str) -> dict:
    """Family parameters: finite numbers, or booleans for a family's switches (student_t's estimate_df)."""
    if not isinstance(value, dict) or not all(
            isinstance(k, str) and (isinstance(v, bool) or _filecheck.is_number(v)) for k, v in value.items()):
        raise ValueError(f"{what} must map parameter names to finite numbers or booleans, got {value!r:.80}")
    return value


def write_model_file(path, *, engine: str, family, baseline: float, model: str, extra: dict | None = None,
                     key=None) -> None:
    """Write a model document to ``path`` atomically, sealed with a checksum (or an HMAC when ``key`` is given)."""
    if engine not in ENGINES:
        raise ValueError(f"engine must be one of {ENGINES}, got {engine!r}")
    several = isinstance(baseline, (list, tuple))
    if several:
        if not baseline or not all(isinstance(v, (int, float)) and math.isfinite(v) for v in baseline):
            raise ValueError(f"the baseline {baseline!r} is not a list of finite numbers")
        baseline = [float(v) for v in baseline]
    elif not (isinstance(baseline, (int, float)) and math.isfinite(baseline)):
        raise ValueError(f"the baseline {baseline!r} is not a finite number")
    body = {
        _KEY: FORMAT_VERSION,
        "engine": engine,
        "family": {"name": family.name, "params": dict(family.params)},
        "baseline": baseline if several else float(baseline),
        "extra": dict(extra or {}),
        "model": model,
    }
    try:  # plain JSON types only (numpy scalars and arrays converted), exactly as they will be read back
        body = json.loads(json.dumps(body, allow_nan=False, default=_plain))
    except ValueError as exc:
        raise ValueError(f"cannot save the model: a value is not finite ({exc})") from None
    body[_filecheck.SEAL_FIELD] = _filecheck.seal(body, key)
    _write_atomic(path, json.dumps(body, allow_nan=False))


def _plain(value):
    if isinstance(value, (np.integer, np.floating, np.bool_)):
        return value.item()
    if isinstance(value, np.ndarray):
        return value.tolist()
    raise TypeError(f"cannot save a value of type {type(value).__name__} in a model file")


def _write_atomic(path, text: str) -> None:
    path = os.fspath(path)
    if os.path.isdir(path):
        raise IsADirectoryError(f"{path} is a folder; give the model a file name, e.g. {os.path.join(path, 'model.json')}")
    folder, name = os.path.split(os.path.abspath(path))
    if not os.path.isdir(folder):
        raise FileNotFoundError(f"cannot save to {path}: the folder {folder} does not exist")
    fd, tmp = tempfile.mkstemp(prefix=f".{name}.", suffix=".tmp", dir=folder)
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            fh.write(text)
            fh.flush()
            os.fsync(fh.fileno())
        # mkstemp creates the file readable by its owner only; give it the permissions open() would
        mask = os.umask(0)
        os.umask(mask)
        os.chmod(tmp, 0o666 & ~mask)
        os.replace(tmp, path)
    except BaseException:
        try:
            os.unlink(tmp)
        except FileNotFoundError:
            pass
        raise


def read_model_file(path, *, engine: str | None = None, key=None) -> dict:
    """Read, verify and check a saved model.

    Returns the document with ``family`` rebuilt as a family object and
    ``model`` holding the engine's model as checked (for XGBoost, the JSON as
    re-serialised after its structural check).  ``engine=None`` accepts either
    engine.  Raises ValueError for anything that is not an intact lossfam
    model file (and for signed files read without their key).
    """
    with open(path, "rb") as fh:
        raw = fh.read()
    try:
        doc = _filecheck.parse_json(raw, f"{path}: not a lossfam model file")
    except ValueError as exc:
        raise ValueError(f"{exc}; was it truncated or corrupted?") from None
    if not isinstance(doc, dict) or _KEY not in doc:
        raise ValueError(f"{path}: not a lossfam model file (no '{_KEY}' key)")
    version = doc[_KEY]
    if version != FORMAT_VERSION or not _filecheck.is_int(version):
        hint = " (format 1 files carry no integrity check; re-train and save with this version)" if version == 1 else ""
        raise ValueError(f"{path}: lossfam model format {version!r} is not supported (expected {FORMAT_VERSION}){hint}")
    _filecheck.verify_seal(doc, str(path), key)
    unknown, missing = sorted(set(doc) - _FIELDS), sorted(_FIELDS - set(doc))
    if unknown or missing:
        raise ValueError(f"{path}: lossfam model file has unknown fields {unknown} / lacks {missing}")
    if doc["engine"] not in ENGINES:
        raise ValueError(f"{path}: unknown engine {doc['engine']!r}")
    if engine is not None and doc["engine"] != engine:
        raise ValueError(f"{path}: this model was saved by lossfam.{doc['engine']}, load it with "
                         f"lossfam.{doc['engine']}.load or lossfam.load")
    fam = doc["family"]
    if not (isinstance(fam, dict) and set(fam) == {"name", "params"} and isinstance(fam["name"], str)):
        raise ValueError(f"{path}: the family entry must be {{'name': str, 'params': {{...}}}}")
    params = _number_map(fam["params"], f"{path}: the family parameters")
    b = doc["baseline"]
    if not (_filecheck.is_number(b) or (isinstance(b, list) and b and all(_filecheck.is_number(v) for v in b))):
        raise ValueError(f"{path}: the baseline {doc['baseline']!r} is not a finite number (or a list of them)")
    extra = doc["extra"]
    if not isinstance(extra, dict):
        raise ValueError(f"{path}: 'extra' must be an object, got {type(extra).__name__}")
    if "fitted_params" in extra:
        _number_map(extra["fitted_params"], f"{path}: the fitted parameters")
    if not isinstance(doc["model"], str) or not doc["model"]:
        raise ValueError(f"{path}: the engine model is missing or empty")
    try:
        doc["family"] = make_family(fam["name"], **params)
    except (TypeError, ValueError) as exc:
        raise ValueError(f"{path}: the family entry is not usable ({exc})") from None
    if doc["engine"] == "xgboost":
        doc["model"] = _filecheck.check_xgboost_json(doc["model"], str(path))
    else:
        _filecheck.check_lightgbm_text(doc["model"], str(path))
    return doc
