"""The ``lossfam`` command line: bad CSVs, --json, --plots, --demo; in a subprocess and in-process."""
import base64
import csv
import json
import subprocess
import sys

import numpy as np
import pytest

import lossfam
import lossfam.selection
from lossfam import cli

PNG_MAGIC = b"\x89PNG\r\n\x1a\n"


def _run(*args):
    return subprocess.run([sys.executable, "-m", "lossfam", *args], capture_output=True, text=True, timeout=300)


def _problems(stderr):
    """stderr without the progress lines and notes."""
    return [ln for ln in stderr.splitlines() if not ln.startswith(("[lossfam rank]", "lossfam: note:"))]


def _write_csv(path, header, rows):
    with open(path, "w", newline="") as fh:
        out = csv.writer(fh)
        out.writerow(header)
        out.writerows(rows)
    return str(path)


def _binary_csv(path, n=400, seed=3):
    # invented: whether a seed tray germinated (y) from soil warmth and watering
    rng = np.random.default_rng(seed)
    warmth = rng.normal(20, 3, n)
    water = rng.uniform(0, 1, n)
    p = 1 / (1 + np.exp(-(0.3 * (warmth - 20) + 1.5 * (water - 0.5))))
    y = rng.binomial(1, p)
    return _write_csv(path, ["warmth", "water", "tray", "germinated"],
                      [[f"{a:.3f}", f"{b:.3f}", f"T{i}", int(c)] for i, (a, b, c) in enumerate(zip(warmth, water, y))])


BAD_CASES = {
    "missing target column": (["a", "b"], [["1", "2"], ["3", "4"]], "no target column named 'y'"),
    "non-numeric target": (["a", "y"], [["1", "2"], ["3", "lots"], ["5", "6"]], "not numeric"),
    "empty file": (None, None, "empty"),
    "NaN target": (["a", "y"], [["1", "2"], ["3", "nan"], ["5", ""], ["6", "1"]], "missing/NaN"),
}


def _bad_file(tmp_path, case):
    header, rows, _ = BAD_CASES[case]
    path = tmp_path / "bad.csv"
    if header is None:
        path.write_text("")
        return str(path)
    return _write_csv(path, header, rows)


@pytest.mark.parametrize("case", sorted(BAD_CASES))
def test_bad_csv_in_a_subprocess(tmp_path, case):
    path = _bad_file(tmp_path, case)
    plots = tmp_path / "plots"
    res = _run("rank", path, "--target", "y", "--plots", str(plots), "--json")
    assert res.returncode == 2, res.stderr
    assert BAD_CASES[case][2] in res.stderr
    assert res.stderr.startswith("lossfam: error: ")
    assert res.stdout == ""
    assert not plots.exists()


@pytest.mark.parametrize("case", sorted(BAD_CASES))
def test_bad_csv_in_process(tmp_path, case, capsys):
    path = _bad_file(tmp_path, case)
    plots = tmp_path / "plots"
    code = cli.main(["rank", path, "--target", "y", "--plots", str(plots)])
    out, err = capsys.readouterr()
    assert code == 2
    assert BAD_CASES[case][2] in err
    assert out == ""
    assert not plots.exists()


def test_bad_csv_messages_name_the_lines(tmp_path, capsys):
    path = _write_csv(tmp_path / "d.csv", ["a", "y"], [["1", "2"], ["3", "x"], ["5", "6"], ["7", "?"]])
    assert cli.main(["rank", path, "--target", "y"]) == 2
    err = capsys.readouterr().err
    assert "2 value(s)" in err and "line(s) 3 ('x'), 5 ('?')" in err
    # a missing file, a header without rows, and no data file at all
    assert cli.main(["rank", str(tmp_path / "nope.csv"), "--target", "y"]) == 2
    assert "no such file" in capsys.readouterr().err
    header_only = tmp_path / "h.csv"
    header_only.write_text("a,y\n")
    assert cli.main(["rank", str(header_only), "--target", "y"]) == 2
    assert "no data rows" in capsys.readouterr().err
    assert cli.main(["rank", "--target", "y"]) == 2
    assert "CSV file" in capsys.readouterr().err


def test_plots_are_written_as_png(tmp_path):
    from matplotlib.image import imread

    path = _binary_csv(tmp_path / "trays.csv")
    plots = tmp_path / "plots"
    res = _run("rank", path, "--target", "germinated", "--folds", "2", "--plots", str(plots),
               "--families", "bernoulli,gaussian")
    assert res.returncode == 0, res.stderr
    assert "left out column 'tray': every value is different" in res.stderr
    names = sorted(p.name for p in plots.iterdir())
    assert names == sorted(
        f"{i:02d}_{fam}_{kind}.png"
        for i, fam in ((1, "bernoulli"), (2, "gaussian"))
        for kind in ("qq", "pit", "coverage", "calibration")
    )
    for p in plots.iterdir():
        assert p.read_bytes()[:8] == PNG_MAGIC
        img = imread(p)
        assert img.ndim == 3 and min(img.shape[:2]) > 100
    assert res.stdout.splitlines()[1].split()[:2] == ["1", "bernoulli"]


def test_plain_table_and_interval_note(tmp_path, capsys):
    path = _binary_csv(tmp_path / "trays.csv", n=300)
    assert cli.main(["rank", path, "--target", "germinated", "--folds", "2", "--quiet"]) == 0
    out, err = capsys.readouterr()
    assert out.splitlines()[0].split()[:3] == ["place", "family", "nll/row"]
    assert "unit interval around y" in out
    assert "not applicable: gamma" in out
    assert err.count("[lossfam rank]") == 0  # --quiet


def test_demo_json_runs_and_parses():
    res = _run("rank", "--demo", "--json", "--folds", "3")
    assert res.returncode == 0, res.stderr
    rows = json.loads(res.stdout)
    assert isinstance(rows, list) and all("family" in r and "nll_per_row" in r for r in rows)
    scored = [r for r in rows if r["status"] == "ok"]
    assert [r["place"] for r in scored] == list(range(1, len(scored) + 1))
    assert all(scored[i]["nll_per_row"] <= scored[i + 1]["nll_per_row"] for i in range(len(scored) - 1))
    # the demo counts are Poisson by construction (lossfam/data/make_demo.py); negative_binomial
    # contains poisson (dispersion -> 0), so it may tie with it: then within two paired standard errors
    top = [r["family"] for r in scored[:2]]
    assert top[0] == "poisson" or (top == ["negative_binomial", "poisson"]
                                   and scored[1]["behind_best"] < 2.0 * scored[1]["behind_best_uncertainty"]), scored[:3]
    # not applicable: exactly the default candidates whose declared support refuses counts 0, 1, 2, 5
    refusing = set()
    for name in set(lossfam.available(scores="one")) - set(lossfam.selection.NOT_BY_DEFAULT):
        try:
            lossfam.family(name).check_target(np.array([0.0, 1.0, 2.0, 5.0]))
        except ValueError:
            refusing.add(name)
    assert {"gamma", "bernoulli"} <= refusing
    assert {r["family"] for r in rows if r["status"] == "not applicable"} == refusing
    assert "[lossfam rank]" in res.stderr  # progress on stderr, JSON alone on stdout


def test_demo_file_matches_its_generator(tmp_path):
    # the shipped CSV is what lossfam/data/make_demo.py writes (fixed seed)
    import importlib.util
    from importlib import resources

    spec = importlib.util.spec_from_file_location("make_demo", resources.files("lossfam") / "data" / "make_demo.py")
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    mod.OUT = tmp_path / "demo.csv"
    mod.main()
    shipped = (resources.files("lossfam") / "data" / cli.DEMO_FILE).read_text()
    assert mod.OUT.read_text() == shipped


def test_weight_column_and_missing_features(tmp_path, capsys):
    rng = np.random.default_rng(5)
    n = 300
    x = rng.normal(size=n)
    y = rng.normal(x, 1.0)
    rows = [[f"{a:.4f}", f"{b:.4f}", "1.0"] for a, b in zip(x, y)]
    rows[4][0] = ""  # a missing feature value
    path = _write_csv(tmp_path / "m.csv", ["x", "y", "w"], rows)
    # the linear engine needs finite features: clear error, exit 2
    assert cli.main(["rank", path, "--target", "y", "--weight", "w", "--quiet"]) == 2
    assert "finite features" in capsys.readouterr().err
    rows[4][0] = "0.5"
    path = _write_csv(tmp_path / "m.csv", ["x", "y", "w"], rows)
    assert cli.main(["rank", path, "--target", "y", "--weight", "w", "--json", "--quiet",
                     "--families", "gaussian,laplace", "--folds", "2"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert {r["family"] for r in out} == {"gaussian", "laplace"}


def test_families_option_with_parameters(tmp_path, capsys):
    rng = np.random.default_rng(6)
    x = rng.normal(size=400)
    y = x + rng.laplace(0.0, 1.0, 400) + 0.5
    path = _write_csv(tmp_path / "q.csv", ["x", "y"], [[f"{a:.4f}", f"{b:.4f}"] for a, b in zip(x, y)])
    assert cli.main(["rank", path, "--target", "y", "--json", "--quiet", "--folds", "2",
                     "--families", "laplace,asymmetric_laplace:quantile=0.7"]) == 0
    rows = json.loads(capsys.readouterr().out)
    by = {r["family"]: r for r in rows}
    assert set(by) == {"laplace", "asymmetric_laplace(quantile=0.7)"}
    assert by["asymmetric_laplace(quantile=0.7)"]["nuisance"]["quantile"] == 0.7
    assert cli.main(["rank", path, "--target", "y", "--families", "laplace:scale"]) == 2
    assert "name:param=number" in capsys.readouterr().err
    assert cli.main(["rank", path, "--target", "y", "--families", "cauchy"]) == 2
    assert "unknown family" in capsys.readouterr().err


# ---------------------------------------------------------------------- snapshots of the labels
JSON_KEYS = ["place", "family", "nll_per_row", "nll_uncertainty", "behind_best", "behind_best_uncertainty",
             "calibration90", "plain_interval90", "residual_ks", "rounds_used", "nuisance", "scored_by",
             "status", "note"]
TEXT_HEADER_COUNTS = ("place  family     nll/row  +/- folds  behind best  +/- paired  PIT 5-95%  "
                      "plain 90% (extra)  KS dist  nuisance parameters  scored by")


def _counts_csv(path, n=300, seed=8):
    # invented: bruised apples per crate from drop height
    rng = np.random.default_rng(seed)
    h = rng.uniform(0, 1, n)
    y = rng.poisson(np.exp(1.0 + h))
    return _write_csv(path, ["height", "bruised"], [[f"{a:.3f}", int(b)] for a, b in zip(h, y)])


def test_json_and_text_labels_snapshot(tmp_path, capsys):
    path = _counts_csv(tmp_path / "c.csv")
    args = ["rank", path, "--target", "bruised", "--families", "poisson,gaussian", "--folds", "2", "--quiet"]
    assert cli.main(args + ["--json"]) == 0
    rows = json.loads(capsys.readouterr().out)
    assert [list(r) for r in rows] == [JSON_KEYS, JSON_KEYS]
    assert rows[0]["behind_best_uncertainty"] is None and rows[0]["behind_best"] == 0.0
    assert rows[1]["behind_best_uncertainty"] > 0
    # the discrete law gets the plain interval as a labelled extra, and the continuous one on the integer footing too
    assert rows[0]["plain_interval90"] is not None
    assert cli.main(args) == 0
    out = capsys.readouterr().out
    header = out.splitlines()[0]
    assert " ".join(header.split()) == " ".join(TEXT_HEADER_COUNTS.split())
    assert out.splitlines()[1].split()[:2] == ["1", "poisson"]
    assert out.splitlines()[1].split()[4:6] == ["0.0000", "-"]  # the best row: no distance, no uncertainty


# ---------------------------------------------------------------------- options
def test_features_drop_offset_exposure_threads(tmp_path, capsys):
    rng = np.random.default_rng(9)
    n = 600
    x = rng.normal(size=n)
    nights = rng.uniform(0.3, 4.0, n)
    y = rng.poisson(nights * np.exp(1.5 + 0.4 * x))
    second = y * 2  # a second target: must not become a feature
    path = _write_csv(tmp_path / "traps.csv", ["x", "nights", "lognights", "count", "count2"],
                      [[f"{a:.4f}", f"{b:.4f}", f"{np.log(b):.6f}", int(c), int(d)]
                       for a, b, c, d in zip(x, nights, y, second)])
    base = ["rank", path, "--target", "count", "--folds", "2", "--quiet", "--json", "--engine", "lightgbm",
            "--threads", "1", "--families", "poisson,gaussian"]
    assert cli.main(base + ["--features", "x", "--exposure", "nights"]) == 0
    with_exposure = json.loads(capsys.readouterr().out)
    assert cli.main(base + ["--drop", "count2,nights", "--offset", "lognights"]) == 0
    with_offset = json.loads(capsys.readouterr().out)
    assert with_exposure[0]["family"] == with_offset[0]["family"] == "poisson"
    # the CSV holds nights to 4 decimals and their logs to 6: equal up to that rounding
    assert with_exposure[0]["nll_per_row"] == pytest.approx(with_offset[0]["nll_per_row"], rel=1e-4)
    for bad, msg in [
        (["--features", "x", "--drop", "nights"], "--features or --drop, not both"),
        (["--features", "x,count"], "it is the target column"),
        (["--drop", "nope"], "no column(s) named ['nope']"),
        (["--weight", "count"], "already the target column"),
        (["--exposure", "x"], "must be > 0"),
        (["--threads", "0"], "--threads must be at least 1"),
    ]:
        assert cli.main(base + bad) == 2, bad
        err = capsys.readouterr().err
        assert msg in err and err.count("\n") == 1, (bad, err)


def test_text_and_date_columns_from_csv(tmp_path, capsys):
    pytest.importorskip("pandas")
    rng = np.random.default_rng(10)
    n = 400
    shop = rng.choice(["north", "south", "east"], n)
    shift = np.select([shop == "north", shop == "south"], [0.0, 2.0], -1.5)
    days = rng.integers(0, 300, n)
    y = rng.normal(shift + 0.01 * days, 0.5)
    path = _write_csv(tmp_path / "shops.csv", ["shop", "intake", "ticket", "y"],
                      [[s, f"2025-01-{1 + d % 28:02d}", f"T{i}", f"{v:.4f}"]
                       for i, (s, d, v) in enumerate(zip(shop, days, y))])
    assert cli.main(["rank", path, "--target", "y", "--folds", "2", "--json", "--families", "gaussian"]) == 0
    out, err = capsys.readouterr()
    assert "shop, intake" in err and "left out column 'ticket'" in err
    rows = json.loads(out)
    assert rows[0]["nuisance"]["scale"] < 1.0  # the workshop shift (sd ~1.5) was learnt from the category


# ---------------------------------------------------------------------- reliability of the command
@pytest.mark.parametrize("where", ["unwritable", "under_a_file", "proc"])
def test_unusable_output_paths_fail_before_fitting(tmp_path, where):
    import os

    path = _binary_csv(tmp_path / "trays.csv", n=100)
    if where == "unwritable":
        if os.geteuid() == 0:
            pytest.skip("root can write into a read-only folder")
        locked = tmp_path / "locked"
        locked.mkdir()
        locked.chmod(0o500)
        target = locked / "plots"
    elif where == "under_a_file":
        target = tmp_path / "trays.csv" / "plots"
    else:
        target = "/proc/lossfam-plots"
    for option in ("--plots", "--report"):
        out = str(target) if option == "--plots" else str(target) + ".html"
        res = _run("rank", path, "--target", "germinated", option, out)
        assert res.returncode == 2, res.stderr
        assert res.stdout == "" and res.stderr.count("\n") == 1 and res.stderr.startswith("lossfam: error: ")
        assert "[lossfam rank]" not in res.stderr  # refused before any fitting
        assert "Traceback" not in res.stderr


def test_existing_plots_are_never_replaced(tmp_path):
    path = _binary_csv(tmp_path / "trays.csv", n=200)
    plots = tmp_path / "plots"
    plots.mkdir()
    mine = plots / "01_bernoulli_qq.png"
    mine.write_bytes(b"my own file")
    res = _run("rank", path, "--target", "germinated", "--plots", str(plots), "--families", "bernoulli")
    assert res.returncode == 2 and "already holds 1 plot(s)" in res.stderr and res.stdout == ""
    assert mine.read_bytes() == b"my own file"
    # a file that appears while the command runs gets a new name next to it
    from lossfam.cli import _free_path

    name, fh = _free_path(str(mine))
    fh.close()
    assert name.endswith("01_bernoulli_qq-2.png") and mine.read_bytes() == b"my own file"


def test_report_refuses_to_replace_a_file(tmp_path, capsys):
    path = _binary_csv(tmp_path / "trays.csv", n=100)
    report = tmp_path / "r.html"
    report.write_text("keep me")
    assert cli.main(["rank", path, "--target", "germinated", "--report", str(report)]) == 2
    assert "exists" in capsys.readouterr().err and report.read_text() == "keep me"


def test_tiny_data_with_lightgbm_gives_a_result_or_one_line(tmp_path):
    pytest.importorskip("lightgbm")
    for n in (8, 30, 50):
        path = _binary_csv(tmp_path / f"tiny{n}.csv", n=n, seed=n)
        res = _run("rank", path, "--target", "germinated", "--engine", "lightgbm", "--folds", "2", "--json")
        assert "Traceback" not in res.stderr
        if res.returncode == 0:
            assert json.loads(res.stdout)
        else:
            assert res.returncode == 2 and res.stdout == ""
            assert len(_problems(res.stderr)) == 1 and _problems(res.stderr)[0].startswith("lossfam: error: ")


@pytest.mark.parametrize("scale", [1e-300, 1e300])
def test_extreme_targets_never_give_a_traceback(tmp_path, scale):
    rng = np.random.default_rng(13)
    x = rng.normal(size=200)
    y = np.exp(rng.normal(0.3 * x, 0.5)) * scale
    path = _write_csv(tmp_path / "big.csv", ["x", "y"], [[f"{a:.4f}", repr(float(b))] for a, b in zip(x, y)])
    res = _run("rank", path, "--target", "y", "--folds", "2", "--json")
    assert "Traceback" not in res.stderr
    assert res.returncode in (0, 2)
    if res.returncode == 0:
        rows = json.loads(res.stdout)
        assert any(r["status"] == "ok" for r in rows)
        assert all(r["nll_per_row"] is None or np.isfinite(r["nll_per_row"]) for r in rows)
    else:
        assert res.stdout == "" and len(_problems(res.stderr)) == 1


def test_usage_errors_are_one_line(capsys):
    with pytest.raises(SystemExit) as stop:
        cli.main(["rank", "--folds", "many"])
    assert stop.value.code == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and err.startswith("lossfam: error: ")


# ---------------------------------------------------------------------- the HTML report
def test_report_is_one_self_contained_file(tmp_path):
    from html.parser import HTMLParser

    path = _binary_csv(tmp_path / "trays.csv", n=300)
    report = tmp_path / "trays.html"
    res = _run("rank", path, "--target", "germinated", "--folds", "2", "--families", "bernoulli,gaussian",
               "--report", str(report), "--seed", "4")
    assert res.returncode == 0, res.stderr

    class Collect(HTMLParser):
        def __init__(self):
            super().__init__()
            self.tags, self.refs, self.images, self.text = [], [], [], []

        def handle_starttag(self, tag, attrs):
            self.tags.append(tag)
            attrs = dict(attrs)
            if tag == "img":
                self.images.append(attrs.get("src", ""))
            for key in ("src", "href", "data", "action", "poster"):
                if key in attrs:
                    self.refs.append(attrs[key])

        def handle_data(self, data):
            self.text.append(data)

    doc = Collect()
    text = report.read_text(encoding="utf-8")
    doc.feed(text)
    doc.close()
    body = " ".join(doc.text)
    assert doc.tags[:2] == ["html", "head"] and "table" in doc.tags and "style" in doc.tags
    # 2 families x (QQ, PIT, coverage, calibration), each a PNG inside the file
    assert len(doc.images) == 8
    for src in doc.images:
        assert src.startswith("data:image/png;base64,")
        assert base64.b64decode(src.split(",", 1)[1])[:8] == PNG_MAGIC
    assert all(r.startswith("data:") for r in doc.refs)  # nothing outside the file
    assert "url(" not in text and "@import" not in text and "<script" not in text and "<link" not in text
    import lossfam

    for fact in ("rows", "300", "germinated", "warmth (number)", "folds", "linear", "seed", "4",
                 "lossfam version", lossfam.__version__, "nll per row", "+/- paired"):
        assert fact in body, fact


def test_text_and_html_tables_write_huge_numbers_in_exponent_form():
    """An nll near 1e299 (counts near the float64 limit) is a short cell, not 300 digits."""
    from lossfam import cli, report, selection

    row = {"status": selection.STATUS_OK, "place": 1, "family": "poisson", "nll_per_row": 1.234e299,
           "nll_uncertainty": 2.5e297, "behind_best": 0.0, "nuisance": {}, "scored_by": "log probability"}
    text = cli.format_table([row])
    assert "1.2340e+299" in text and "2.5000e+297" in text and max(map(len, text.split())) < 20
    assert "0.0000" in text  # ordinary sizes keep their fixed decimals
    assert "1.2340e+299" in report.table_html([row])
