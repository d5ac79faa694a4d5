"""The weighted metric both engines report: mean nll (nats per row) or mean unit deviance."""
from __future__ import annotations

import numpy as np

from .._scoring import check_metric_kind, per_row_loss


class Scorer:
    """Weighted mean of the family's per-row nll (``kind="nll"``) or unit deviance."""

    def __init__(self, fam, kind="nll"):
        self.family = fam
        self.kind = check_metric_kind(kind)
        self.name = f"{fam.name}_{kind}"

    def sums(self, y, raw, w):
        """(sum w loss, sum w): additive across data shards."""
        per_row = per_row_loss(self.family, self.kind, y, raw)
        if w is None:
            return float(per_row.sum()), float(y.size)
        return float(np.dot(w, per_row)), float(w.sum())

    def value(self, y, raw, w):
        num, den = self.sums(y, raw, w)
        return num / den if den > 0 else float("nan")


def raw_from_output(fam, preds, *, overwrite=False):
    """Raw scores from an engine's transformed predictions (built-in objectives hand metrics the
    inverse link of the raw score: a probability, a mean).

    The link is applied in float64; where the prediction has rounded onto the
    link's boundary (p = 1 or 0, a mean of 0), the nearest representable
    prediction inside is used, so the raw score is finite: exact wherever the
    engine's precision resolves the prediction (|raw| below about 36 for a
    logit in float64, 16 in float32).

    Row blocks at a time, so the temporaries stay small; the result is a fresh
    float64 array, or ``preds`` itself when ``overwrite`` is True and ``preds``
    is a float64 array the caller no longer needs.
    """
    p = np.asarray(preds)
    dtype = p.dtype if p.dtype in (np.float32, np.float64) else np.float64
    p = p.astype(dtype, copy=False).reshape(-1)
    out = p if overwrite and p.dtype == np.float64 and p.flags.writeable else np.empty(p.shape)
    for i in range(0, p.size, _BLOCK):
        out[i:i + _BLOCK] = _raw_block(fam.link_function, p[i:i + _BLOCK], dtype)
    return out


_BLOCK = 1 << 16  # rows per block of raw_from_output


def _raw_block(link, p, dtype):
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        raw = link._forward(p.astype(np.float64))
        hi, lo = raw == np.inf, raw == -np.inf
        if hi.any() or lo.any():
            nudged = np.where(hi, np.nextafter(p, dtype.type(-np.inf)), np.where(lo, np.nextafter(p, dtype.type(np.inf)), p))
            raw = link._forward(nudged.astype(np.float64))
    return raw
