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


ROOT = README.parent
LINKED_DOCS = [README, ROOT / "benchmarks" / "README.md"]
_PATHLIKE = re.compile(r"`((?:[\w.-]+/)*[\w-]+\.(?:py|md|ipynb|csv))`")


@pytest.mark.parametrize("doc", LINKED_DOCS, ids=lambda p: p.relative_to(ROOT).as_posix())
def test_readme_links_point_to_files_that_exist(doc):
    """Every relative link, and every repository path quoted in backticks, names a file that exists."""
    text = doc.read_text(encoding="utf-8")
    targets = [t.split("#")[0] for t in re.findall(r"\]\(([^)\s]+)\)", text)
               if not re.match(r"[a-z]+:", t) and not t.startswith("#")]
    missing = [t for t in targets if t and not (doc.parent / t).exists()]
    for path in _PATHLIKE.findall(text):
        bare_name_found = "/" not in path and any(ROOT.glob(f"[!.]*/**/{path}"))
        if not ((ROOT / path).exists() or (doc.parent / path).exists() or bare_name_found):
            missing.append(path)
    assert not missing, f"{doc.name} refers to files that do not exist: {missing}"
