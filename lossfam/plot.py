"""Diagnostic plots: normal QQ plot, PIT histogram, calibration curve, interval coverage.

Needs matplotlib (``pip install "lossfam[plot]"``), imported only when a
function here is called.  Figures are built with ``matplotlib.figure.Figure``
directly (not through pyplot), so they render and save under the Agg backend
with no display and are not kept alive by pyplot's figure registry.  Each
function returns the Figure; pass ``ax=`` to draw into an existing Axes
instead (its figure is returned).

The inputs are the outputs of :mod:`lossfam.diagnostics`: quantile
residuals, PIT values, a calibration table or a coverage table (overall or by predicted spread).
"""
from __future__ import annotations

import numpy as np

from . import diagnostics

__all__ = ["qq_plot", "pit_histogram", "calibration_plot", "coverage_plot", "coverage_by_spread_plot"]


def _figure(ax, figsize=(4.5, 4.0)):
    try:
        from matplotlib.figure import Figure
    except ImportError:
        raise ImportError('lossfam.plot needs matplotlib; install it with: pip install "lossfam[plot]"') from None
    if ax is not None:
        return ax.figure, ax
    fig = Figure(figsize=figsize, layout="constrained")
    return fig, fig.add_subplot()


def qq_plot(residuals, *, ax=None, title=None, label=None):
    """Normal QQ plot of quantile residuals, with the line y = x.

    Points on the line: the residuals look standard normal (the noise model
    fits).  An S shape: the law's tails are too light or too heavy; a bow: it
    is skewed the wrong way.
    """
    theo, sample = diagnostics.qq_data(residuals)
    fig, ax = _figure(ax)
    ax.plot(theo, sample, ".", ms=3, alpha=0.6, label=label)
    lim = float(max(np.max(np.abs(theo)), np.max(np.abs(sample)), 1.0))
    ax.plot([-lim, lim], [-lim, lim], color="0.3", lw=1)
    ax.set_xlabel("where N(0, 1) puts it")
    ax.set_ylabel("held-out residual on the normal scale")
    ax.set_title(title or "Normal QQ plot of quantile residuals")
    if label is not None:
        ax.legend(loc="upper left")
    return fig


def pit_histogram(pit_values, *, bins=20, ax=None, title=None):
    """Histogram of PIT values on [0, 1], as a density, with the flat line at 1.

    Flat: calibrated.  U shape: the predictive law is too narrow; hump: too
    wide; slope: biased.
    """
    u = np.asarray(pit_values, dtype=float).ravel()
    if u.size == 0 or np.any(~((u >= 0) & (u <= 1))):
        raise ValueError("pit_histogram: PIT values must be a non-empty array in [0, 1]")
    fig, ax = _figure(ax)
    ax.hist(u, bins=int(bins), range=(0.0, 1.0), density=True, color="C0", alpha=0.75, edgecolor="white")
    ax.axhline(1.0, color="0.3", lw=1)
    ax.set_xlim(0.0, 1.0)
    ax.set_xlabel("u = F(y), the law's cdf at the target")
    ax.set_ylabel("height (flat at 1 when calibrated)")
    ax.set_title(title or "PIT histogram")
    return fig


def calibration_plot(table, *, ax=None, title=None):
    """Calibration curve from :func:`lossfam.diagnostics.calibration_table`.

    Share of y = 1 against the average forecast chance per bin, marker area
    proportional to the bin's row count, with the diagonal of perfect calibration.
    """
    pred = np.asarray(table["predicted"], dtype=float)
    obs = np.asarray(table["observed"], dtype=float)
    count = np.asarray(table["count"], dtype=float)
    fig, ax = _figure(ax)
    ax.plot([0, 1], [0, 1], color="0.3", lw=1)
    ax.plot(pred, obs, "-", color="C0", lw=1)
    size = 15.0 + 185.0 * count / max(float(count.max()), 1.0) if count.size else 20.0
    ax.scatter(pred, obs, s=size, color="C0", zorder=3)
    ax.set_xlim(0.0, 1.0)
    ax.set_ylim(0.0, 1.0)
    ax.set_xlabel("forecast chance of y = 1 (bin average)")
    ax.set_ylabel("share of rows with y = 1")
    ax.set_title(title or "Calibration")
    return fig


def coverage_plot(table, *, ax=None, title=None):
    """Observed against nominal coverage of central prediction intervals.

    ``table`` is :func:`lossfam.diagnostics.interval_coverage`'s output.  Points
    below the diagonal: intervals too narrow; above: too wide (or a discrete law).
    """
    level = np.asarray(table["level"], dtype=float)
    obs = np.asarray(table["observed"], dtype=float)
    fig, ax = _figure(ax)
    ax.plot([0, 1], [0, 1], color="0.3", lw=1)
    ax.plot(level, obs, "o-", color="C1")
    for lv, ob in zip(level, obs):
        ax.annotate(f"{ob:.3f}", (lv, ob), textcoords="offset points", xytext=(4, -10), fontsize=8)
    ax.set_xlim(0.0, 1.0)
    ax.set_ylim(0.0, 1.02)
    ax.set_xlabel("probability the interval should hold")
    ax.set_ylabel("share of targets inside it")
    ax.set_title(title or "Prediction-interval coverage")
    return fig


def coverage_by_spread_plot(tables, *, ax=None, title=None):
    """Coverage of the central interval per group of predicted spread (conditional coverage).

    ``tables`` is :func:`lossfam.diagnostics.coverage_by_spread`'s output, or a dict
    {label: table} to draw several models on one set of axes (e.g. a scale-varying and a
    constant-scale model grouped by the same ``by``).  Each group is drawn at its mean spread with
    a bar of +/- 2 binomial standard errors; the dashed line is the nominal level.  Points below
    the line on the right and above it on the left: the intervals do not widen with the spread
    as the data do (a scale that should vary is held constant).
    """
    if isinstance(tables, dict) and "coverage" in tables:
        tables = {None: tables}
    if not tables:
        raise ValueError("coverage_by_spread_plot: no table to draw")
    fig, ax = _figure(ax, figsize=(5.5, 4.0))
    levels = set()
    for i, (label, table) in enumerate(tables.items()):
        x = np.asarray(table["spread"], dtype=float)
        cov = np.asarray(table["coverage"], dtype=float)
        se = np.asarray(table["se"], dtype=float)
        levels.update(np.asarray(table["level"], dtype=float).tolist())
        ax.errorbar(x, cov, yerr=2.0 * se, fmt="o-", color=f"C{i}", ms=4, lw=1, capsize=2, label=label)
    for lv in sorted(levels):
        ax.axhline(lv, color="0.3", lw=1, ls="--")
    ax.set_xlabel("predicted spread (group mean)")
    ax.set_ylabel("share of targets inside the central interval")
    ax.set_title(title or "Interval coverage by predicted spread")
    if any(label is not None for label in tables):
        ax.legend(loc="lower left")
    return fig
