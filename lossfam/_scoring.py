"""What the engine metrics share: the metric kinds and the per-row loss they average."""
from __future__ import annotations

import numpy as np

from .censoring import IntervalTarget

METRIC_KINDS = ("nll", "deviance")


def check_metric_kind(kind: str) -> str:
    if kind not in METRIC_KINDS:
        raise ValueError(f"metric kind must be 'nll' or 'deviance', got {kind!r}")
    return kind


def per_row_loss(fam, kind: str, y, raw):
    """Per-row nll or unit deviance at validated float64 ``y`` and ``raw`` (unchecked kernels).

    ``y`` may be a validated IntervalTarget (censored rows): the censored nll; its deviance is
    refused where a row is censored (the family's ``deviance`` says why)."""
    if isinstance(y, IntervalTarget):
        if kind == "nll":
            from .families._censored import censored_nll
            with np.errstate(over="ignore"):
                return censored_nll(fam, y, raw)
        return fam.deviance(y, raw)
    with np.errstate(over="ignore"):
        return fam._nll(y, raw) if kind == "nll" else fam._deviance(y, raw)
