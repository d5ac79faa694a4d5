"""The ``lossfam`` command line: bad CSVs, --json, --plots, --demo; in a subprocess and in-process."""
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
    assert "left out non-numeric column(s): tray" in res.stderr
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
    assert out.splitlines()[0].split()[:3] == ["rank", "family", "nll/row"]
    assert "unit interval around y" in out
    assert "not applicable: gamma" in out
    assert err.count("[lossfam rank]") == 0  # --quiet


def test_demo_json_runs_and_parses():
    res = _run("rank", "--demo", "--json", "--folds", "3")
    assert res.returncode == 0, res.stderr
    rows = json.loads(res.stdout)
    assert isinstance(rows, list) and all("family" in r and "nll" in r for r in rows)
    scored = [r for r in rows if r["status"] == "ok"]
    assert [r["rank"] for r in scored] == list(range(1, len(scored) + 1))
    assert all(scored[i]["nll"] <= scored[i + 1]["nll"] for i in range(len(scored) - 1))
    # the demo counts are Poisson by construction (lossfam/data/make_demo.py); negative_binomial
    # contains poisson (dispersion -> 0), so it may tie with it: then within two paired standard errors
    top = [r["family"] for r in scored[:2]]
    assert top[0] == "poisson" or (top == ["negative_binomial", "poisson"]
                                   and scored[1]["gap"] < 2.0 * scored[1]["gap_se"]), scored[:3]
    # not applicable: exactly the default candidates whose declared support refuses counts 0, 1, 2, 5
    refusing = set()
    for name in set(lossfam.available()) - set(lossfam.selection.NOT_BY_DEFAULT):
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
    assert by["asymmetric_laplace(quantile=0.7)"]["params"]["quantile"] == 0.7
    assert cli.main(["rank", path, "--target", "y", "--families", "laplace:scale"]) == 2
    assert "name:param=number" in capsys.readouterr().err
    assert cli.main(["rank", path, "--target", "y", "--families", "cauchy"]) == 2
    assert "unknown family" in capsys.readouterr().err
