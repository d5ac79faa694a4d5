"""The saved-model file: one JSON document holding the engine's own model and the noise model.

Layout (no pickle; readable with any JSON reader)::

    {"lossfam_model": 1,                  # format version
     "engine": "lightgbm" | "xgboost",
     "family": {"name": ..., "params": {...}},
     "baseline": <float>,                 # the starting raw score
     "extra": {...},                      # engine-specific settings
     "model": <the engine's own model text or JSON, as a string>}
"""
from __future__ import annotations

import json
import os

from .registry import family as make_family

FORMAT_VERSION = 1
_KEY = "lossfam_model"


def write_model_file(path, *, engine: str, family, baseline: float, model: str, extra: dict | None = None,
                     key=None) -> None:
    _no_key(key)
    doc = {
        _KEY: FORMAT_VERSION,
        "engine": engine,
        "family": {"name": family.name, "params": family.params},
        "baseline": float(baseline),
        "extra": extra or {},
        "model": model,
    }
    tmp = f"{os.fspath(path)}.tmp"
    with open(tmp, "w", encoding="utf-8") as fh:
        json.dump(doc, fh)
    os.replace(tmp, path)


def _no_key(key):
    if key is not None:
        raise NotImplementedError("keyed (signed) model files are not supported by this version of lossfam")


def read_model_file(path, *, engine: str | None = None, key=None) -> dict:
    """Read and check a saved model; returns the document with ``family`` rebuilt as an object.

    ``engine``: refuse files of another engine (None: either).
    """
    _no_key(key)
    try:
        with open(path, "r", encoding="utf-8") as fh:
            doc = json.load(fh)
    except FileNotFoundError:
        raise
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise ValueError(f"{path}: not a lossfam model file (not valid JSON: {exc}); was it truncated or corrupted?") from None
    if not isinstance(doc, dict) or _KEY not in doc:
        raise ValueError(f"{path}: not a lossfam model file (no '{_KEY}' key)")
    if doc[_KEY] != FORMAT_VERSION:
        raise ValueError(f"{path}: lossfam model format {doc[_KEY]!r} is not supported (expected {FORMAT_VERSION})")
    missing = [k for k in ("engine", "family", "baseline", "model") if k not in doc]
    if missing:
        raise ValueError(f"{path}: lossfam model file lacks {missing}; was it truncated or edited?")
    if engine is not None and doc["engine"] != engine:
        raise ValueError(f"{path}: this model was saved by lossfam.{doc['engine']}, load it with lossfam.load "
                         f"or lossfam.{doc['engine']}.load")
    fam = doc["family"]
    try:
        doc["family"] = make_family(fam["name"], **fam.get("params", {}))
    except (KeyError, TypeError) as exc:
        raise ValueError(f"{path}: the family entry is malformed ({exc})") from None
    if not isinstance(doc["model"], str) or not doc["model"]:
        raise ValueError(f"{path}: the engine model is missing or empty")
    doc.setdefault("extra", {})
    return doc
