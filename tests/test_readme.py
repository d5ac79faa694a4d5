"""The README's Python examples run as written.

The blocks of one section (a '## ' heading) build on each other, so each section's blocks run
together, in order, in a fresh interpreter.  Blocks that start by saying they need a running
dask cluster (they show how to point at one) are left out.
"""
import os
import pathlib
import re
import subprocess
import sys

import pytest

README = pathlib.Path(__file__).resolve().parents[1] / "README.md"
TEXT = README.read_text(encoding="utf-8")
SECTIONS = {}
for part in re.split(r"^## ", TEXT, flags=re.M)[1:]:
    title = part.splitlines()[0].strip()
    blocks = [b for b in re.findall(r"```python\n(.*?)```", part, re.S)
              if not b.startswith("# (needs a running dask cluster")]
    if blocks:
        SECTIONS[title] = "\n".join(blocks)


def test_readme_has_examples():
    assert len(SECTIONS) >= 3


@pytest.mark.parametrize("title", sorted(SECTIONS))
def test_readme_section_examples_run(title, tmp_path):
    code = SECTIONS[title]
    out = subprocess.run([sys.executable, "-c", code], cwd=tmp_path, capture_output=True, text=True,
                         timeout=600, env={**os.environ, "MPLBACKEND": "Agg"})
    assert out.returncode == 0, f"README section {title!r} failed:\n--- stderr ---\n{out.stderr[-3000:]}"
