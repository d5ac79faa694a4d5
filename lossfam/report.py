"""One self-contained HTML file with a ranking: the table, its notes, every plot and a data summary.

``write_report(path, rows, details, y, summary)`` writes it (the command's
``--report FILE.html``); :func:`table_html` is the table alone (also what a
:class:`lossfam.selection.Ranking` shows in a notebook).  Plots are PNGs
embedded as ``data:image/png;base64`` URIs and the style sheet is inline, so
the file references nothing outside itself: it can be mailed or attached as it is.
"""
from __future__ import annotations

import base64
import html
import io
import math

import numpy as np

from . import selection

__all__ = ["table_html", "figures", "write_report"]

#: header text of each column in the HTML and plain-text tables
HEADINGS = {
    "place": "place",
    "family": "family",
    "nll_per_row": "nll per row",
    "nll_uncertainty": "+/- over folds",
    "behind_best": "behind the best",
    "behind_best_uncertainty": "+/- paired",
    "calibration90": "PIT in [0.05, 0.95]",
    "plain_interval90": "plain 90% interval (extra)",
    "residual_ks": "KS distance",
    "rounds_used": "rounds used",
    "nuisance": "nuisance parameters",
    "scored_by": "scored by",
}

LEGEND = (
    "nll per row: mean held-out negative log-likelihood per row (nats), lower is better; "
    "+/- over folds: its standard error over the folds; behind the best: nll per row minus the best "
    "family's, with its standard error paired over rows (+/- paired); PIT in [0.05, 0.95]: share of "
    "held-out rows whose PIT value (randomized for discrete laws) lies in [0.05, 0.95], 0.90 when the law "
    "is right; plain 90% interval: coverage of the central 90% interval, shown for discrete laws only, "
    "where it over-covers by construction; KS distance: Kolmogorov-Smirnov distance of the held-out "
    "quantile residuals from N(0, 1); rounds used: boosting rounds kept after early stopping on the "
    "family's own held-back nll (mean over folds)."
)

_STYLE = """
body { font-family: sans-serif; margin: 2em; color: #222; }
table { border-collapse: collapse; margin: 1em 0; }
th, td { border: 1px solid #bbb; padding: 0.25em 0.6em; text-align: right; }
th { background: #eee; }
td.text { text-align: left; }
figure { display: inline-block; margin: 0.5em; }
figcaption { font-size: 0.85em; text-align: center; }
p.note { font-size: 0.9em; max-width: 60em; }
"""


#: from this magnitude on a table number is written in exponent form (a fixed-point nll of 1e299
#: would take 300 digits)
LARGE = 1e9


def number_text(value, decimals):
    """``value`` with ``decimals`` decimals, or in exponent form (as many significant digits) when
    it is ``LARGE`` or more in size."""
    if abs(value) >= LARGE:
        return f"{value:.{decimals}e}"
    return f"{value:.{decimals}f}"


def _cell(key, value):
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "-"
    if key == "nuisance":
        return ", ".join(f"{k}={v:.4g}" for k, v in value.items()) or "-"
    if key == "rounds_used":
        return number_text(value, 1)
    if key in ("calibration90", "plain_interval90", "residual_ks"):
        return number_text(value, 3)
    if isinstance(value, float):
        return number_text(value, 4)
    return str(value)


def table_html(rows, notes=()) -> str:
    """An HTML table of the scored rows, then the others and the notes (no outside references)."""
    keys = [k for k in HEADINGS if any(r.get(k) is not None for r in rows if r["status"] == selection.STATUS_OK)]
    out = ["<table>", "<thead><tr>" + "".join(f"<th>{html.escape(HEADINGS[k])}</th>" for k in keys) + "</tr></thead>",
           "<tbody>"]
    for r in rows:
        if r["status"] != selection.STATUS_OK:
            continue
        cells = []
        for k in keys:
            cls = ' class="text"' if k in ("family", "nuisance", "scored_by") else ""
            cells.append(f"<td{cls}>{html.escape(_cell(k, r.get(k)))}</td>")
        out.append("<tr>" + "".join(cells) + "</tr>")
    out.append("</tbody></table>")
    others = [r for r in rows if r["status"] != selection.STATUS_OK]
    if others:
        out.append("<ul>" + "".join(f"<li>{html.escape(r['status'])}: {html.escape(str(r['family']))}: "
                                    f"{html.escape(r['note'] or '')}</li>" for r in others) + "</ul>")
    for note in notes:
        out.append(f'<p class="note">note: {html.escape(note)}</p>')
    out.append(f'<p class="note">{html.escape(LEGEND)}</p>')
    return "\n".join(out)


def figures(rows, details, y):
    """(place, family, kind, Figure) for every scored family: QQ, PIT, coverage, and calibration for 0/1 targets."""
    from . import plot
    from .diagnostics import binned_calibration

    for r in rows:
        if r["status"] != selection.STATUS_OK:
            continue
        d = details[r["family"]]
        name = r["family"]
        yield r["place"], name, "qq", plot.qq_plot(d["residuals"], title=f"{name}: held-out residuals against N(0, 1)")
        yield r["place"], name, "pit", plot.pit_histogram(d["pit"], title=f"{name}: PIT histogram")
        yield r["place"], name, "coverage", plot.coverage_plot(d["coverage"], title=f"{name}: interval coverage")
        if d["p1"] is not None:
            yield r["place"], name, "calibration", plot.calibration_plot(
                binned_calibration(y, d["p1"]), title=f"{name}: forecast chance against outcome")
    fig = _coverage_by_spread_figure(rows, details, y)
    if fig is not None:
        yield 0, "families", "coverage_by_spread", fig


def _coverage_by_spread_figure(rows, details, y):
    """When a family with a scale per row was scored: the held-out coverage of every scored
    family's central 90% interval per decile of the predicted 90% interval width of the best-placed
    such family (the same rows in each group for every family; rows unweighted), or None."""
    from . import plot
    from .diagnostics import grouped_coverage

    ok = [r for r in rows if r["status"] == selection.STATUS_OK]
    several = [r for r in ok if details[r["family"]].get("several")]
    if not several:
        return None
    lead = several[0]["family"]
    key = details[lead]["width90"]
    w = np.ones(key.shape[0])
    tables = {r["family"]: grouped_coverage(key, details[r["family"]]["inside90"], details[r["family"]]["width90"],
                                            w, selection.CALIBRATION_LEVEL)
              for r in ok}
    fig = plot.coverage_by_spread_plot(tables, title=f"90% coverage per decile of {lead}'s interval width")
    fig.axes[0].set_xlabel(f"{lead}: predicted 90% interval width (decile mean)")
    return fig


def _png(fig) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=80)
    return buf.getvalue()


def report_html(rows, details, y, summary, notes=()) -> str:
    """The whole report as a string."""
    from . import __version__

    facts = [
        ("rows", summary["rows"]),
        ("target", summary.get("target", "y")),
        ("features", ", ".join(f"{n} ({summary['feature_kinds'][n]})" for n in summary["features"])),
        ("folds", summary["folds"]),
        ("engine", summary["engine"]),
        ("maximum rounds", summary.get("max_rounds") or "-"),
        ("seed", summary["seed"]),
        ("offset", summary.get("offset") or "none"),
        ("exposure", summary.get("exposure") or "none"),
        ("lossfam version", __version__),
    ]
    parts = [
        "<!DOCTYPE html>", '<html lang="en">', "<head>", '<meta charset="utf-8">',
        f"<title>lossfam: noise models for {html.escape(str(summary.get('target', 'y')))}</title>",
        f"<style>{_STYLE}</style>", "</head>", "<body>",
        f"<h1>Which noise model fits {html.escape(str(summary.get('target', 'y')))}?</h1>",
        "<h2>Data and settings</h2>", "<table>",
    ]
    parts += [f'<tr><th>{html.escape(k)}</th><td class="text">{html.escape(str(v))}</td></tr>' for k, v in facts]
    parts += ["</table>", "<h2>Held-out likelihood, best first</h2>", table_html(rows, notes), "<h2>Plots</h2>"]
    for place, name, kind, fig in figures(rows, details, y):
        data = base64.b64encode(_png(fig)).decode("ascii")
        alt = f"{name}: {kind}"
        parts.append(f'<figure><img alt="{html.escape(alt)}" src="data:image/png;base64,{data}">'
                     f"<figcaption>{place}. {html.escape(alt)}</figcaption></figure>")
    parts += ["</body>", "</html>"]
    return "\n".join(parts) + "\n"


def write_report(path, rows, details, y, summary, notes=()):
    """Write :func:`report_html` to ``path``; refuses to replace an existing file."""
    text = report_html(rows, details, y, summary, notes)
    with open(path, "x", encoding="utf-8") as fh:
        fh.write(text)
    return path
