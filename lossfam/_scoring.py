"""What the engine metrics share: the metric kinds and the per-row loss they average."""
from __future__ import annotations

import numpy as np

METRIC_KINDS = ("nll", "deviance")


def check_metric_kind(kind: str) -> str:
    if kind not in METRIC_KINDS:
        raise ValueError(f"metric kind must be 'nll' or 'deviance', got {kind!r}")
    return kind


def per_row_loss(fam, kind: str, y, raw):
    """Per-row nll or unit deviance at validated float64 ``y`` and ``raw`` (unchecked kernels)."""
    with np.errstate(over="ignore"):
        return fam._nll(y, raw) if kind == "nll" else fam._deviance(y, raw)
