"""Command line: ``lossfam rank DATA.csv --target COL`` puts noise models in order for a CSV file.

Usage::

    lossfam rank DATA.csv --target COL [--families a,b:param=value,...] [--spread] [--engine linear|lightgbm|xgboost]
                    [--folds 5] [--seed 0] [--rounds 300] [--weight COL] [--offset COL] [--exposure COL]
                    [--features A,B,...] [--drop A,B,...] [--threads N]
                    [--plots DIR] [--report FILE.html] [--json] [--quiet]
    lossfam rank --demo [...]          # built-in demo data (orchard_bruises.csv)
    python -m lossfam rank ...         # the same

The CSV has a header row.  The target column must be numeric with no missing
values; so must the ``--weight``, ``--offset`` and ``--exposure`` columns
(exposure > 0; its log is the offset), none of which is a feature.  Every
other column is a feature unless ``--features`` names the ones to use or
``--drop`` the ones to leave out.  Numeric columns are numbers (empty cells,
``NA`` and ``nan`` are missing values, which the boosting engines accept).
A text column is a category (LightGBM and XGBoost split on it natively, the
linear engine one-hot encodes it); a text column of ISO dates
(``2024-03-01``, optionally with a time) becomes days since 1970-01-01; a
text column whose values are all different (an identifier) is left out, with
a note on stderr, unless ``--features`` names it.  Text columns need pandas;
without it they are left out with a note.

Every failure is one line on stderr (``lossfam: error: ...``) and exit code
2, with nothing on stdout: a file that cannot be used (missing, empty, no
target column, non-numeric or missing target values, no feature), bad
options, an output path that cannot be written, or no family that could be
fitted.  Input and output paths are checked before any fitting.

Output: a table, best family first (``--json``: a JSON list of the same rows;
the best row's ``behind_best_uncertainty`` is null).  Progress goes to stderr.
``--plots DIR`` saves, for every scored family, a normal QQ plot of the
held-out quantile residuals, a PIT histogram, an interval-coverage plot and,
for 0/1 targets, a calibration curve (PNG, named ``NN_family_kind.png``).  An
existing file is never replaced: a DIR that already holds such plots is
refused before fitting, and should a file appear meanwhile the new plot gets
the next free name (``..._kind-2.png``).  ``--report FILE.html`` writes one
self-contained HTML file (table, notes, every plot embedded, data summary);
an existing FILE is refused.
"""
from __future__ import annotations

import argparse
import csv
import json
import math
import os
import re
import sys
import tempfile
import warnings
from importlib import resources

from . import report, selection

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


_ISO_DATE = re.compile(r"^\d{4}-\d{2}-\d{2}([ T]\d{2}:\d{2}(:\d{2}(\.\d+)?)?)?(Z|[+-]\d{2}:?\d{2})?$")


def _split_names(text, option):
    names = [s.strip() for s in (text or "").split(",") if s.strip()]
    if text is not None and not names:
        raise DataError(f"{option}: give comma-separated column names")
    return names


def read_csv(path, target, weight=None, *, offset=None, exposure=None, features=None, drop=None,
             lower=None, upper=None, event=None):
    """Read a CSV with the csv module.

    Returns a dict: ``X`` (a float array, or a pandas DataFrame when there are
    text or date features), ``y``, ``weight``, ``offset``, ``exposure`` (arrays
    or None), ``features`` (names), ``notes``.  Raises DataError with the
    file's line numbers for anything unusable.

    Censored targets: ``lower`` and ``upper`` name two columns of bounds per row
    (equal for an exact row; -inf / inf for an open side), or ``event`` names a
    0/1 column beside the ``target`` durations (0: still running at that time);
    ``y`` is then a :class:`lossfam.censoring.IntervalTarget`.
    """
    import numpy as np

    try:
        with open(path, newline="", encoding="utf-8-sig") as fh:
            reader = csv.reader(fh)
            records = [(reader.line_num, row) for row in reader if any(c.strip() for c in row)]
    except FileNotFoundError:
        raise DataError(f"{path}: no such file") from None
    except IsADirectoryError:
        raise DataError(f"{path}: is a directory, not a CSV file") from None
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
    roles = {"target": target, "weight": weight, "offset": offset, "exposure": exposure,
             "lower": lower, "upper": upper, "event": event}
    for what, col in roles.items():
        if col is not None and col not in header:
            raise DataError(f"{path}: no {what} column named {col!r}; the columns are {header}")
    used = {}
    for what, col in roles.items():
        if col is not None:
            if col in used:
                raise DataError(f"the {what} column {col!r} is already the {used[col]} column; give another column")
            used[col] = what
    wanted = _split_names(features, "--features")
    dropped = _split_names(drop, "--drop")
    if wanted and dropped:
        raise DataError("give --features or --drop, not both")
    for option, names in (("--features", wanted), ("--drop", dropped)):
        unknown = [c for c in names if c not in header]
        if unknown:
            raise DataError(f"{option}: no column(s) named {unknown}; the columns are {header}")
        clash = [c for c in names if c in used]
        if option == "--features" and clash:
            raise DataError(f"--features: {clash} cannot be a feature: it is the {used[clash[0]]} column")
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
    for what, col in roles.items():
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
        if infinite.size and what not in ("lower", "upper"):  # an open side of a censored row is +-inf
            ln = [lines[i] for i in infinite]
            raise DataError(f"{path}: {what} column {col!r} has {len(ln)} infinite value(s), e.g. line(s) {_show(ln)}")
    if exposure is not None:
        bad = np.flatnonzero(columns[exposure] <= 0)
        if bad.size:
            ln = [lines[i] for i in bad]
            raise DataError(f"{path}: exposure column {exposure!r} must be > 0; {len(ln)} value(s) are not, "
                            f"e.g. line(s) {_show(ln)}")
    candidates = wanted or [h for h in header if h not in used and h not in dropped]
    notes = []
    text_cols = [h for h in candidates if h in non_numeric]
    kept_text = {}
    if text_cols:
        try:
            import pandas as pd
        except ImportError:
            notes.append(f"left out text column(s) (reading them as categories needs pandas): {', '.join(text_cols)}")
            pd = None
        if pd is not None:
            for h in text_cols:
                j = header.index(h)
                raw = [row[j].strip() for _, row in body]
                present = [v for v in raw if v.lower() not in _MISSING]
                if present and all(_ISO_DATE.match(v) for v in present):
                    try:
                        kept_text[h] = pd.to_datetime(pd.Series([None if v.lower() in _MISSING else v for v in raw]),
                                                      utc=True, format="ISO8601")
                    except (ValueError, TypeError) as exc:
                        raise DataError(f"{path}: column {h!r} looks like dates but cannot be read as such ({exc})") from None
                    continue
                if len(set(present)) == len(raw) and h not in wanted:
                    notes.append(f"left out column {h!r}: every value is different (an identifier?); "
                                 "name it in --features to use it as a category")
                    continue
                kept_text[h] = pd.Series([None if v.lower() in _MISSING else v for v in raw], dtype="object")
    features = [h for h in candidates if h in columns or h in kept_text]
    if not features:
        raise DataError(f"{path}: no feature column besides the target {target!r}")
    if kept_text:
        import pandas as pd

        X = pd.DataFrame({h: (kept_text[h] if h in kept_text else columns[h]) for h in features})
    else:
        X = np.column_stack([columns[h] for h in features])
    from .censoring import IntervalTarget, right_censored

    try:
        if lower is not None:
            y = IntervalTarget(columns[lower], columns[upper], owner=f"{path}: --lower/--upper")
        elif event is not None:
            y = right_censored(columns[target], columns[event])
        else:
            y = columns[target]
    except ValueError as exc:
        raise DataError(f"{exc} (rows counted from 0 below the header)") from None
    extra = ("target", "lower", "upper", "event")
    return {
        "X": X, "y": y, "features": features, "notes": notes,
        **{what: (columns[col] if col is not None else None) for what, col in roles.items() if what not in extra},
    }


# ---------------------------------------------------------------------- output
#: the plain-text table's columns: (row key, header, decimals)
TEXT_COLUMNS = (
    ("place", "place", None),
    ("family", "family", None),
    ("nll_per_row", "nll/row", 4),
    ("nll_uncertainty", "+/- folds", 4),
    ("behind_best", "behind best", 4),
    ("behind_best_uncertainty", "+/- paired", 4),
    ("calibration90", "PIT 5-95%", 3),
    ("plain_interval90", "plain 90% (extra)", 3),
    ("residual_ks", "KS dist", 3),
    ("rounds_used", "rounds", 1),
    ("nuisance", "nuisance parameters", None),
    ("scored_by", "scored by", None),
)


def _num(v, decimals):
    if v is None or (isinstance(v, float) and not math.isfinite(v)):
        return "-"
    return report.number_text(v, decimals)


def _params(p):
    if not p:
        return "-"
    return ", ".join(f"{k}={v}" if isinstance(v, bool) else f"{k}={v:.4g}" for k, v in p.items())


def format_table(rows) -> str:
    """A plain-text table of rank_families()'s rows (no pandas needed); empty columns are left out."""
    ok = [r for r in rows if r["status"] == selection.STATUS_OK]
    cols = [c for c in TEXT_COLUMNS if c[0] in ("place", "family") or any(r.get(c[0]) is not None for r in ok)]
    head = [h for _, h, _ in cols]
    body = []
    for r in ok:
        cells = []
        for key, _, fmt in cols:
            v = r.get(key)
            cells.append(_params(v) if key == "nuisance" else (_num(v, fmt) if fmt else ("-" if v is None else str(v))))
        body.append(cells)
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
    lines.append("nll/row: mean held-out negative log-likelihood per row (nats), lower is better; +/- folds: its")
    lines.append("standard error over folds; behind best: nll/row minus the best family's, +/- paired over rows;")
    lines.append("PIT 5-95%: share of held-out PIT values (randomized for discrete laws) in [0.05, 0.95], 0.90 when")
    lines.append("the law is right; plain 90%: coverage of the central 90% interval of a discrete law, which")
    lines.append("over-covers by construction; KS dist: Kolmogorov-Smirnov distance of the held-out quantile")
    lines.append("residuals from N(0, 1); rounds: boosting rounds kept by early stopping (mean over folds).")
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


_PLOT_NAME = re.compile(r"^\d{2,}_.+_(qq|pit|coverage|calibration|coverage_by_spread)(-\d+)?\.png$")


def _free_path(path):
    """Open ``path`` for writing without replacing anything: the next free ``stem-N.png`` when it exists."""
    stem, ext = os.path.splitext(path)
    k = 1
    while True:
        candidate = path if k == 1 else f"{stem}-{k}{ext}"
        try:
            return candidate, open(candidate, "xb")
        except FileExistsError:
            k += 1


def write_plots(directory, rows, details, y):
    """PNG files per scored family; returns the paths written (existing files are never replaced)."""
    from .report import figures

    os.makedirs(directory, exist_ok=True)
    written = []
    for place, name, kind, fig in figures(rows, details, y):
        path, fh = _free_path(os.path.join(directory, f"{place:02d}_{_safe(name)}_{kind}.png"))
        with fh:
            fig.savefig(fh, format="png", dpi=90)
        written.append(path)
    return written


# ---------------------------------------------------------------------- output paths
def _probe_directory(directory, option):
    """Raise DataError unless files can be created in ``directory`` (created when missing; returns whether it was)."""
    if os.path.exists(directory) and not os.path.isdir(directory):
        raise DataError(f"{option} {directory}: exists and is not a directory")
    created = not os.path.exists(directory)
    try:
        os.makedirs(directory, exist_ok=True)
        fd, probe = tempfile.mkstemp(dir=directory, prefix=".lossfam-probe-")
        os.close(fd)
        os.remove(probe)
    except OSError as exc:
        raise DataError(f"{option} {directory}: cannot write there ({exc.strerror or exc})") from None
    return created


def _check_outputs(args):
    """Check --plots and --report before any fitting; returns directories this run created."""
    created = []
    if args.plots is not None:
        if _probe_directory(args.plots, "--plots"):
            created.append(args.plots)
        old = sorted(f for f in os.listdir(args.plots) if _PLOT_NAME.match(f))
        if old:
            raise DataError(f"--plots {args.plots}: already holds {len(old)} plot(s) (e.g. {old[0]}); "
                            "choose a new directory or remove them (nothing is replaced)")
    if args.report is not None:
        if os.path.isdir(args.report):
            raise DataError(f"--report {args.report}: is a directory; give a file name such as report.html")
        if os.path.exists(args.report):
            raise DataError(f"--report {args.report}: exists; choose another name or remove it (nothing is replaced)")
        parent = os.path.dirname(os.path.abspath(args.report))
        if not os.path.isdir(parent):
            raise DataError(f"--report {args.report}: {parent} is not an existing folder")
        _probe_directory(parent, "--report")
    return created


# ---------------------------------------------------------------------- main
class _Parser(argparse.ArgumentParser):
    """argparse, but a usage error is one line on stderr (and exit code 2), like every other failure."""

    def error(self, message):
        _fail(f"{message} (see {self.prog} --help)")
        raise SystemExit(EXIT_BAD_INPUT)


def _parser():
    parser = _Parser(prog="lossfam", description="Noise models as losses: which one fits your target?")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND", parser_class=_Parser)
    cmd = sub.add_parser(
        "rank",
        help="put noise models in order by cross-validated held-out negative log-likelihood",
        description="Put noise models (families) in order by cross-validated held-out negative log-likelihood per row.",
    )
    cmd.add_argument("data", nargs="?", help="CSV file with a header row")
    cmd.add_argument("--target", help="name of the target column")
    cmd.add_argument("--demo", action="store_true", help=f"use the built-in demo data ({DEMO_FILE})")
    cmd.add_argument("--families", help="comma-separated family names, parameters as name:param=value "
                     "(e.g. gaussian,asymmetric_laplace:quantile=0.9; default: every applicable family)")
    cmd.add_argument("--spread", action="store_true",
                     help="add each family's scale-varying version (e.g. gaussian_spread after gaussian) where one "
                          "is registered, so both compete on the same folds")
    cmd.add_argument("--engine", default="linear", choices=selection.ENGINES, help="model fitted per family (default: linear)")
    cmd.add_argument("--folds", type=int, default=5, help="cross-validation folds (default: 5)")
    cmd.add_argument("--seed", type=int, default=0, help="seed of the folds, engines and randomized residuals")
    cmd.add_argument("--rounds", type=int, default=selection.DEFAULT_ROUNDS,
                     help="maximum boosting rounds; each family stops early on its own held-back nll "
                          f"(default: {selection.DEFAULT_ROUNDS})")
    cmd.add_argument("--lower", metavar="COL", help="censored targets: column of lower bounds (-inf: open); with --upper")
    cmd.add_argument("--upper", metavar="COL", help="censored targets: column of upper bounds (inf: open); with --lower")
    cmd.add_argument("--event", metavar="COL", help="right-censored durations: 0/1 column beside --target "
                     "(1: observed at that time, 0: still running then)")
    cmd.add_argument("--weight", metavar="COL", help="name of a column of row weights")
    cmd.add_argument("--offset", metavar="COL", help="name of a column added to the raw score (link scale)")
    cmd.add_argument("--exposure", metavar="COL", help="name of a column of exposures (> 0); its log is the offset")
    cmd.add_argument("--features", metavar="A,B", help="comma-separated feature columns (default: every other column)")
    cmd.add_argument("--drop", metavar="A,B", help="comma-separated columns that are not features")
    cmd.add_argument("--threads", type=int, help="threads of the boosting engine (default: 2)")
    cmd.add_argument("--plots", metavar="DIR", help="save diagnostic PNGs for every scored family in DIR")
    cmd.add_argument("--report", metavar="FILE.html", help="write one self-contained HTML report")
    cmd.add_argument("--json", action="store_true", help="print a JSON list of rows, best first")
    cmd.add_argument("--quiet", action="store_true", help="no progress on stderr")
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
    text = " ".join(str(msg).split())  # one line, whatever the message held
    print(f"lossfam: error: {text}", file=sys.stderr)
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
        if (args.lower is None) != (args.upper is None):
            return _fail("give --lower and --upper together (the two bounds of each row)")
        if args.lower is not None and (args.target or args.event):
            return _fail("give either --lower/--upper or --target (with --event), not both")
        if args.event is not None and not args.target:
            return _fail("--event needs --target COL, the durations it marks as observed or still running")
        if not args.target and args.lower is None:
            return _fail("rank needs --target COL, the name of the target column")
        path, target = args.data, args.target
    for option in ("folds", "rounds", "threads"):
        value = getattr(args, option)
        if value is not None and value < (2 if option == "folds" else 1):
            return _fail(f"--{option} must be at least {2 if option == 'folds' else 1}, got {value}")
    censored = getattr(args, "lower", None) is not None or getattr(args, "event", None) is not None
    if censored and (args.plots is not None or args.report is not None):
        return _fail("--plots and --report are not available for censored targets yet")
    if args.plots is not None or args.report is not None:
        try:
            import matplotlib  # noqa: F401
        except ImportError:
            return _fail('--plots and --report need matplotlib: pip install "lossfam[plot]"')
    try:
        data = read_csv(path, target, args.weight, offset=args.offset, exposure=args.exposure,
                        features=args.features, drop=args.drop, lower=getattr(args, "lower", None),
                        upper=getattr(args, "upper", None), event=getattr(args, "event", None))
    except DataError as exc:
        return _fail(str(exc))
    try:
        families = _parse_families(args.families)
    except ValueError as exc:
        return _fail(str(exc))
    try:
        created = _check_outputs(args)
    except DataError as exc:
        return _fail(str(exc))
    code = EXIT_BAD_INPUT
    try:
        code = _run(args, data, target, families)
    finally:
        if code != 0:
            for d in created:  # leave nothing behind on failure (only a directory this run made, if still empty)
                try:
                    os.rmdir(d)
                except OSError:
                    pass
    return code


class _Discard:
    """A logger for LightGBM that drops its native messages: a failure reaches the user as one line."""

    def info(self, msg):
        pass

    warning = info


def _quiet_lightgbm():
    import lightgbm

    lightgbm.register_logger(_Discard())


def _run(args, data, target, families):
    log = (lambda m: None) if args.quiet else (lambda m: print(f"[lossfam rank] {m}", file=sys.stderr, flush=True))
    for note in data["notes"]:
        print(f"lossfam: note: {note}", file=sys.stderr)
    y = data["y"]
    target = target if target is not None else f"[{args.lower}, {args.upper}]"
    log(f"{y.size} rows, target {target!r}, features: {', '.join(data['features'])}; "
        f"engine {args.engine}, {args.folds} folds")
    if args.engine == "lightgbm":
        _quiet_lightgbm()
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)  # a failed family is reported in its row
            rows, details, summary = selection._rank_detailed(
                data["X"], y, families=families, engine=args.engine, folds=args.folds, weight=data["weight"],
                seed=args.seed, offset=data["offset"], exposure=data["exposure"], rounds=args.rounds,
                threads=args.threads, progress=log, spread=args.spread,
            )
    except ValueError as exc:
        return _fail(str(exc))
    if not any(r["status"] == selection.STATUS_OK for r in rows):
        first = rows[0] if rows else {"family": "-", "note": "no candidate family"}
        return _fail(f"no family could be fitted to these data (e.g. {first['family']}: {first['note']})")
    # the engines saw the columns in the CSV's order: name their kinds after the CSV's headers
    summary.update(target=target, features=data["features"],
                   feature_kinds=dict(zip(data["features"], summary["feature_kinds"].values())))
    if args.plots is not None:
        paths = write_plots(args.plots, rows, details, y)
        log(f"wrote {len(paths)} plot(s) to {args.plots}")
    if args.report is not None:
        from .report import write_report

        write_report(args.report, rows, details, y, summary, selection._table_notes(rows))
        log(f"wrote the report {args.report}")
    try:
        print(json.dumps(_jsonable(rows)) if args.json else format_table(rows), flush=True)
    except BrokenPipeError:  # e.g. piped into `head`: the reader has gone, nothing more to say
        sys.stdout = open(os.devnull, "w")  # noqa: SIM115 - keeps the interpreter's final flush quiet
    return 0


def main(argv=None) -> int:
    """Entry point of the ``lossfam`` command; returns the exit code (2: any failure, one line on stderr)."""
    args = _parser().parse_args(argv)
    try:
        if args.command == "rank":
            return _rank(args)
        return _fail(f"unknown command {args.command!r}")  # pragma: no cover - argparse refuses it first
    except KeyboardInterrupt:
        return _fail("interrupted")
    except Exception as exc:  # noqa: BLE001 - no traceback reaches the user: one line, exit 2
        return _fail(f"{type(exc).__name__}: {exc}")
