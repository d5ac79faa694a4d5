"""The README's Python examples run as written (each block in a fresh interpreter)."""
import pathlib
import re
import subprocess
import sys

import pytest

README = pathlib.Path(__file__).resolve().parents[1] / "README.md"
BLOCKS = re.findall(r"```python\n(.*?)```", README.read_text(encoding="utf-8"), re.S)


def test_readme_has_examples():
    assert len(BLOCKS) >= 2


@pytest.mark.parametrize("index", range(len(BLOCKS)))
def test_readme_example_runs(index, tmp_path):
    code = BLOCKS[index]
    if "Client(" in code and "tcp://" in code:
        pytest.skip("needs an existing dask cluster (shown as a how-to)")
    out = subprocess.run([sys.executable, "-c", code], cwd=tmp_path, capture_output=True, text=True,
                         timeout=300, env={**__import__("os").environ, "MPLBACKEND": "Agg"})
    assert out.returncode == 0, f"README block {index} failed:\n{code}\n--- stderr ---\n{out.stderr[-3000:]}"
