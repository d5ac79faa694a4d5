"""Execute the example notebooks with nbclient (kernel "python3") so they never rot.

The committed notebooks carry their outputs (tables and plots, for readers on
the web) and are written by notebooks/build_notebooks.py; their cells must be
the builder's.  Each runs here again in a fresh kernel with the repository
root as its working directory, and a few claims their text makes are checked
against what the cells print.
"""
import pathlib

import pytest

nbformat = pytest.importorskip("nbformat")
nbclient = pytest.importorskip("nbclient")

ROOT = pathlib.Path(__file__).resolve().parent.parent
NOTEBOOKS = sorted((ROOT / "notebooks").glob("*.ipynb"))
TIMEOUT = 120  # seconds per cell; each notebook runs in well under 30 s on an idle machine


def _execute(path):
    nb = nbformat.read(path, as_version=4)
    client = nbclient.NotebookClient(nb, timeout=TIMEOUT, kernel_name="python3",
                                     resources={"metadata": {"path": str(ROOT)}})
    client.execute()
    return nb


def _text(nb):
    parts = []
    for cell in nb.cells:
        for out in cell.get("outputs", []):
            if out.get("output_type") == "stream":
                parts.append(out.get("text", ""))
            elif "data" in out:
                parts.append(out["data"].get("text/plain", ""))
    return "\n".join(parts)


def _builder():
    import importlib.util

    spec = importlib.util.spec_from_file_location("build_notebooks", ROOT / "notebooks" / "build_notebooks.py")
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


def test_notebooks_are_the_builders_and_carry_their_outputs():
    builder = _builder()
    assert len(NOTEBOOKS) >= 2
    assert {p.name for p in NOTEBOOKS} == set(builder.NOTEBOOKS)
    for path in NOTEBOOKS:
        nb = nbformat.read(path, as_version=4)
        nbformat.validate(nb)
        built = builder.build(builder.NOTEBOOKS[path.name], execute=False)
        assert [(c.cell_type, c.source) for c in nb.cells] == [(c.cell_type, c.source) for c in built.cells], (
            f"{path.name} differs from notebooks/build_notebooks.py: run it to rebuild")
        code = [c for c in nb.cells if c.cell_type == "code"]
        assert all(c.execution_count is not None for c in code), f"{path.name} was not executed"
        assert not [o for c in code for o in c.outputs if o.get("output_type") == "error"]
        kinds = {k for c in code for o in c.outputs for k in o.get("data", {})}
        assert "image/png" in kinds, f"{path.name} has no plot in its outputs"
        assert [i for i, c in enumerate(code) if c.execution_count != i + 1] == []  # run top to bottom, once


@pytest.mark.parametrize("path", NOTEBOOKS, ids=[p.stem for p in NOTEBOOKS])
def test_notebook_runs(path):
    nb = _execute(path)
    text = _text(nb)
    errors = [o for c in nb.cells for o in c.get("outputs", []) if o.get("output_type") == "error"]
    assert not errors
    if path.stem == "repair_amounts_gamma":
        # the table's first row is the gamma family
        first = [line for line in text.splitlines() if line.strip().startswith("0 ")][0]
        assert "gamma" in first
    if path.stem == "moth_counts_exposure":
        lines = {line.split(" held-out")[0].strip(): line for line in text.splitlines() if "KS p-value" in line}
        p_with = float(lines["with log(hours) offset"].rsplit(" ", 1)[1])
        p_without = float(lines["hours ignored"].rsplit(" ", 1)[1])
        assert p_with > 0.01 and p_without < 0.01
    if path.stem == "flat_tyres_overdispersed_counts":
        held = {ln.split(" held-out")[0]: ln.split() for ln in text.splitlines() if " held-out nll " in ln}
        nb_line, pois_line = held["negative_binomial"], held["poisson"]
        assert float(nb_line[3]) < float(pois_line[3])  # held-out nll
        # calibration: share of held-out days above the 95% quantile, and uniformity of the PIT
        assert abs(float(nb_line[5]) - 0.05) < abs(float(pois_line[5]) - 0.05)
        assert float(nb_line[-1]) > 0.01 > float(pois_line[-1])
        first = [line for line in text.splitlines() if line.strip().startswith("0 ")][0]
        assert "negative_binomial" in first
    if path.stem == "parcel_delivery_censored":
        medians = {ln.split()[0]: float(ln.split("typical parcel ")[1].split()[0])
                   for ln in text.splitlines() if "median for a typical parcel" in ln}
        truth = medians["truth"]
        assert abs(medians["censored"] - truth) < 0.05 * truth     # the censored likelihood recovers it
        assert medians["dropped"] < 0.85 * truth and medians["plugged"] < 0.85 * truth  # both biased low
    if path.stem == "kiln_quantile_intervals":
        line = [ln for ln in text.splitlines() if ln.startswith("two quantile models")][0]
        assert abs(float(line.split("covers ")[1].split(" ")[0]) - 0.8) < 0.08
        hot = [ln for ln in text.splitlines() if ln.startswith("gaussian 80% interval on the hottest")][0]
        g = float(hot.split("firings: ")[1].split(";")[0])
        q = float(hot.rsplit(" ", 1)[1])
        assert abs(q - 0.8) < abs(g - 0.8)  # the quantile models follow the growing spread
