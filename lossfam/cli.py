"""Command line: ``lossfam rank DATA.csv --target COL`` ranks noise models for a CSV file.

Usage::

    lossfam rank DATA.csv --target COL [--families a,b:param=value,...] [--engine linear|lightgbm|xgboost]
                    [--folds 5] [--seed 0] [--rounds 100] [--weight COL] [--plots DIR] [--json] [--quiet]
    lossfam rank --demo [...]          # built-in demo data (orchard_bruises.csv)
    python -m lossfam rank ...         # the same

The CSV has a header row.  The target column must be numeric with no missing
values.  Every other numeric column is a feature (empty cells, ``NA`` and
``nan`` are missing values, which the boosting engines accept); columns with
any non-numeric entry are left out, with a note on stderr.  A file that
cannot be used (missing, empty, no target column, non-numeric or missing
target values, no numeric feature) gives a message on stderr and exit code 2,
and nothing is written: no plots directory, nothing on stdout.

Output: a table, best family first (``--json``: a JSON list of the same rows).
Progress goes to stderr.  ``--plots DIR`` saves, for every scored family, a
normal QQ plot of the held-out quantile residuals, a PIT histogram, an
interval-coverage plot and, for 0/1 targets, a calibration curve (PNG).
"""
from __future__ import annotations

import argparse
import csv
import json
import math
import os
import re
import sys
from importlib import resources

from . import selection

EXIT_BAD_INPUT = 2
DEMO_FILE = "orchard_bruises.csv"
DEMO_TARGET = "bruised"
_MISSING = {"", "na", "nan", "null", "none"}


class DataError(ValueError):
    """The input file or options cannot be used."""


# ---------------------------------------------------------------------- CSV
def _parse(cell):
    """float, or None when the cell is not a number; NaN for a missing cell."""
    s = cell.strip()
    if s.lower() in _MISSING:
        return math.nan
    try:
        return float(s)
    except ValueError:
        return None


def _show(lines, values=None, k=5):
    shown = lines[:k]
    more = f" (and {len(lines) - k} more)" if len(lines) > k else ""
    if values is None:
        return ", ".join(map(str, shown)) + more
    return ", ".join(f"{ln} ({v!r})" for ln, v in zip(shown, values[:k])) + more


def read_csv(path, target, weight=None):
    """Read a CSV with the csv module: (X rows, y, weight or None, feature names, notes).

    Raises DataError with the file's line numbers for anything unusable.
    """
    import numpy as np

    try:
        with open(path, newline="", encoding="utf-8-sig") as fh:
            reader = csv.reader(fh)
            records = [(reader.line_num, row) for row in reader if any(c.strip() for c in row)]
    except FileNotFoundError:
        raise DataError(f"{path}: no such file") from None
    except (OSError, UnicodeDecodeError, csv.Error) as exc:
        raise DataError(f"{path}: cannot be read as a CSV file ({exc})") from None
    if not records:
        raise DataError(f"{path}: the file is empty (no header row, no data)")
    header = [h.strip() for h in records[0][1]]
    body = records[1:]
    if not body:
        raise DataError(f"{path}: the header has no data rows below it")
    dup = sorted({h for h in header if header.count(h) > 1})
    if dup:
        raise DataError(f"{path}: duplicate column name(s) {dup}")
    for col, what in ((target, "target"), (weight, "weight")):
        if col is not None and col not in header:
            raise DataError(f"{path}: no {what} column named {col!r}; the columns are {header}")
    ragged = [ln for ln, row in body if len(row) != len(header)]
    if ragged:
        raise DataError(f"{path}: {len(ragged)} line(s) do not have {len(header)} fields, e.g. line(s) {_show(ragged)}")
    lines = [ln for ln, _ in body]
    columns = {}
    non_numeric = {}
    for j, name in enumerate(header):
        vals = [_parse(row[j]) for _, row in body]
        bad = [i for i, v in enumerate(vals) if v is None]
        if bad:
            non_numeric[name] = ([lines[i] for i in bad], [body[i][1][j] for i in bad])
        else:
            columns[name] = np.asarray(vals, dtype=float)
    for col, what in ((target, "target"), (weight, "weight")):
        if col is None:
            continue
        if col in non_numeric:
            ln, vals = non_numeric[col]
            raise DataError(f"{path}: {what} column {col!r} is not numeric: {len(ln)} value(s), e.g. line(s) {_show(ln, vals)}")
        missing = np.flatnonzero(np.isnan(columns[col]))
        if missing.size:
            ln = [lines[i] for i in missing]
            raise DataError(f"{path}: {what} column {col!r} has {len(ln)} missing/NaN value(s), e.g. line(s) {_show(ln)}")
        infinite = np.flatnonzero(np.isinf(columns[col]))
        if infinite.size:
            ln = [lines[i] for i in infinite]
            raise DataError(f"{path}: {what} column {col!r} has {len(ln)} infinite value(s), e.g. line(s) {_show(ln)}")
    notes = []
    skipped = [h for h in header if h in non_numeric and h not in (target, weight)]
    if skipped:
        notes.append(f"left out non-numeric column(s): {', '.join(skipped)}")
    features = [h for h in header if h in columns and h not in (target, weight)]
    if not features:
        raise DataError(f"{path}: no numeric feature column besides the target {target!r}")
    X = np.column_stack([columns[h] for h in features])
    w = columns[weight] if weight is not None else None
    return X, columns[target], w, features, notes


# ---------------------------------------------------------------------- output
def _num(v, fmt):
    if v is None or (isinstance(v, float) and not math.isfinite(v)):
        return "-"
    return format(v, fmt)


def _params(p):
    if not p:
        return "-"
    return ", ".join(f"{k}={v:.4g}" for k, v in p.items())


def format_table(rows) -> str:
    """A plain-text table of rank_families()'s rows (no pandas needed)."""
    head = ("rank", "family", "nll/row", "se", "gap", "gap se", "cover90", "KS", "nuisance params", "scored by")
    body = []
    for r in rows:
        if r["status"] != selection.STATUS_OK:
            continue
        body.append((
            str(r["rank"]), r["family"], _num(r["nll"], ".4f"), _num(r["nll_se"], ".4f"),
            _num(r["gap"], ".4f"), _num(r["gap_se"], ".4f") if r["rank"] != 1 else "-",
            _num(r["coverage90"], ".3f"), _num(r["ks"], ".3f"), _params(r["params"]), r["scored_by"],
        ))
    widths = [max(len(h), *(len(b[i]) for b in body)) if body else len(h) for i, h in enumerate(head)]
    lines = ["  ".join(h.ljust(wd) for h, wd in zip(head, widths)).rstrip()]
    lines += ["  ".join(c.ljust(wd) for c, wd in zip(b, widths)).rstrip() for b in body]
    others = [r for r in rows if r["status"] != selection.STATUS_OK]
    if others:
        lines.append("")
        for r in others:
            lines.append(f"{r['status']}: {r['family']}: {r['note']}")
    if any(r["scored_by"] == selection.SCORED_INTERVAL for r in rows):
        lines.append("")
        lines.append("note: the targets are integers, so continuous families are scored by -log(F(y+1/2) - F(y-1/2)),")
        lines.append("      the probability they give to the unit interval around y (a density is not a probability).")
    lines.append("")
    lines.append("nll/row: mean held-out negative log-likelihood per row (nats), lower is better; se: standard error")
    lines.append("over folds; gap: nll minus the best (se paired over rows); cover90: observed coverage of the central")
    lines.append("90% interval; KS: Kolmogorov-Smirnov distance of the held-out quantile residuals from N(0, 1).")
    return "\n".join(lines)


def _jsonable(rows):
    def clean(v):
        if isinstance(v, float):
            return v if math.isfinite(v) else None
        if isinstance(v, dict):
            return {k: clean(x) for k, x in v.items()}
        return v

    return [{k: clean(v) for k, v in r.items()} for r in rows]


def _safe(name):
    return re.sub(r"[^A-Za-z0-9_.=-]+", "_", name).strip("_")


def write_plots(directory, rows, details, y):
    """PNG files per scored family; returns the paths written."""
    from . import plot
    from .diagnostics import calibration_bins

    os.makedirs(directory, exist_ok=True)
    written = []
    for r in rows:
        if r["status"] != selection.STATUS_OK:
            continue
        d = details[r["family"]]
        stem = os.path.join(directory, f"{r['rank']:02d}_{_safe(r['family'])}")
        figs = {
            "qq": plot.qq_plot(d["residuals"], title=f"{r['family']}: normal QQ of quantile residuals"),
            "pit": plot.pit_histogram(d["pit"], title=f"{r['family']}: PIT histogram"),
            "coverage": plot.coverage_plot(d["coverage"], title=f"{r['family']}: interval coverage"),
        }
        if d["p1"] is not None:
            table = calibration_bins(y, d["p1"])
            figs["calibration"] = plot.calibration_plot(table, title=f"{r['family']}: calibration")
        for kind, fig in figs.items():
            path = f"{stem}_{kind}.png"
            fig.savefig(path, dpi=90)
            written.append(path)
    return written


# ---------------------------------------------------------------------- main
def _parser():
    parser = argparse.ArgumentParser(prog="lossfam", description="Noise models as losses: which one fits your target?")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")
    cmp_ = sub.add_parser(
        "rank",
        help="rank noise models by cross-validated held-out negative log-likelihood",
        description="Rank noise models (families) by cross-validated held-out negative log-likelihood per row.",
    )
    cmp_.add_argument("data", nargs="?", help="CSV file with a header row")
    cmp_.add_argument("--target", help="name of the target column")
    cmp_.add_argument("--demo", action="store_true", help=f"use the built-in demo data ({DEMO_FILE})")
    cmp_.add_argument("--families", help="comma-separated family names, parameters as name:param=value "
                      "(e.g. gaussian,asymmetric_laplace:quantile=0.9; default: every applicable family)")
    cmp_.add_argument("--engine", default="linear", choices=selection.ENGINES, help="model fitted per family (default: linear)")
    cmp_.add_argument("--folds", type=int, default=5, help="cross-validation folds (default: 5)")
    cmp_.add_argument("--seed", type=int, default=0, help="seed of the folds, engines and randomized residuals")
    cmp_.add_argument("--rounds", type=int, default=100, help="boosting rounds (boosting engines; default: 100)")
    cmp_.add_argument("--weight", help="name of a column of row weights")
    cmp_.add_argument("--plots", metavar="DIR", help="save diagnostic PNGs for every scored family in DIR")
    cmp_.add_argument("--json", action="store_true", help="print a JSON list of rows, best first")
    cmp_.add_argument("--quiet", action="store_true", help="no progress on stderr")
    return parser


def _parse_families(text):
    """"gaussian,asymmetric_laplace:quantile=0.9" -> names and family objects (None: the default)."""
    if not text:
        return None
    from .registry import family as make_family

    out = []
    for item in (s.strip() for s in text.split(",")):
        if not item:
            continue
        name, *settings = item.split(":")
        if not settings:
            out.append(name.strip())
            continue
        params = {}
        for setting in settings:
            key, sep, value = setting.partition("=")
            try:
                params[key.strip()] = float(value)
            except ValueError:
                sep = ""
            if not sep:
                raise ValueError(f"--families: cannot read {setting!r} in {item!r}; write name:param=number, "
                                 "e.g. asymmetric_laplace:quantile=0.9")
        out.append(make_family(name.strip(), **params))
    return out


def _fail(msg):
    print(f"lossfam: error: {msg}", file=sys.stderr)
    return EXIT_BAD_INPUT


def _rank(args):
    if args.demo and args.data:
        return _fail("give either a CSV file or --demo, not both")
    if args.demo:
        path = resources.files("lossfam").joinpath("data", DEMO_FILE)
        target = args.target or DEMO_TARGET
    else:
        if not args.data:
            return _fail("rank needs a CSV file (or --demo)")
        if not args.target:
            return _fail("rank needs --target COL, the name of the target column")
        path, target = args.data, args.target
    if args.plots is not None:
        if os.path.exists(args.plots) and not os.path.isdir(args.plots):
            return _fail(f"--plots {args.plots}: exists and is not a directory")
        try:
            import matplotlib  # noqa: F401
        except ImportError:
            return _fail('--plots needs matplotlib: pip install "lossfam[plot]"')
    try:
        X, y, w, features, notes = read_csv(path, target, args.weight)
    except DataError as exc:
        return _fail(str(exc))
    log = (lambda m: None) if args.quiet else (lambda m: print(f"[lossfam rank] {m}", file=sys.stderr, flush=True))
    for note in notes:
        print(f"lossfam: note: {note}", file=sys.stderr)
    log(f"{y.size} rows, target {target!r}, features: {', '.join(features)}; engine {args.engine}, {args.folds} folds")
    try:
        families = _parse_families(args.families)
        rows, details = selection._rank_detailed(
            X, y, families=families, engine=args.engine, folds=args.folds, weight=w, seed=args.seed,
            rounds=args.rounds, progress=log,
        )
    except ValueError as exc:
        return _fail(str(exc))
    if args.plots is not None:
        paths = write_plots(args.plots, rows, details, y)
        log(f"wrote {len(paths)} plot(s) to {args.plots}")
    try:
        print(json.dumps(_jsonable(rows)) if args.json else format_table(rows), flush=True)
    except BrokenPipeError:  # e.g. piped into `head`: the reader has gone, nothing more to say
        sys.stdout = open(os.devnull, "w")  # noqa: SIM115 - keeps the interpreter's final flush quiet
    return 0


def main(argv=None) -> int:
    """Entry point of the ``lossfam`` command; returns the exit code (2: unusable input)."""
    args = _parser().parse_args(argv)
    if args.command == "rank":
        return _rank(args)
    return _fail(f"unknown command {args.command!r}")  # pragma: no cover - argparse refuses it first
