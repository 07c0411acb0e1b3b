"""The README and the documentation: their Python blocks run as written, on the demo (the README's first
command writes it), and the documentation site builds with Sphinx with warnings as errors."""

from __future__ import annotations

import os
import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

pytestmark = pytest.mark.slow  # CI runs it; pytest -m 'not slow' skips it

ROOT = Path(__file__).resolve().parents[2]
README = ROOT / "README.md"
DOCS = ROOT / "docs"
# the guide pages with Python blocks, in the order they build on one another (the quick start's store)
GUIDE = ["quickstart.md", "guide/select.md", "guide/pool.md", "guide/stores.md", "guide/surfaces.md"]


def _blocks(path: Path) -> list[str]:
    return re.findall(r"```python\n(.*?)```", path.read_text(encoding="utf-8"), re.S)


def test_readme_and_guide_python_blocks_run_as_written(demo_tree, tmp_path):
    readme = _blocks(README)
    assert len(readme) == 1  # a quick start: one Python block
    pages = [(DOCS / page, _blocks(DOCS / page)) for page in GUIDE]
    assert all(blocks for _, blocks in pages)
    # every page with a Python block is run here
    have = {str(p.relative_to(DOCS)) for p in DOCS.rglob("*.md") if "_build" not in p.parts and _blocks(p)}
    assert have == set(GUIDE)
    (tmp_path / "mapstore-demo").mkdir()
    os.symlink(demo_tree, tmp_path / "mapstore-demo" / "data")
    here = os.getcwd()
    os.chdir(tmp_path)
    try:
        ns: dict = {}
        for block in readme:
            exec(compile(block, str(README), "exec"), ns)  # noqa: S102 - the README's own code
        assert np.isfinite(ns["scores"]).all() and len(ns["scores"]) >= 2
        assert (tmp_path / "reading-vs-listening.nii.gz").exists()
        for path, blocks in pages[1:]:  # the quick start's block is the README's: its store is there
            for block in blocks:
                exec(compile(block, str(path), "exec"), {})  # noqa: S102 - the guide's own code
    finally:
        os.chdir(here)
    assert (tmp_path / "reading-pooled" / "pooled.json").exists()
    assert _blocks(DOCS / "quickstart.md") == readme


def test_readme_stays_a_quick_start():
    words = len(README.read_text(encoding="utf-8").split())
    assert words <= 900, f"README.md has {words} words: move detail to docs/"


def test_the_documentation_builds_without_warnings(example_store, tmp_path):
    """Sphinx with numpydoc, the click CLI reference and the examples gallery, whose examples run on the
    labelled demo store at build time and show what they print; -W: a warning fails."""
    import os
    import shutil

    store = tmp_path / "gallery" / "store"
    shutil.copytree(example_store, store)
    env = {**os.environ, "MAPSTORE_GALLERY_STORE": str(store)}
    done = subprocess.run([sys.executable, "-m", "sphinx", "-W", "--keep-going", "-q", "-b", "html",
                           "-d", str(tmp_path / "doctrees"), str(DOCS), str(tmp_path / "html")],
                          capture_output=True, text=True, timeout=900, env=env)
    assert done.returncode == 0, done.stderr[-4000:]
    cli = (tmp_path / "html" / "cli.html").read_text(encoding="utf-8")
    from mapstore.cli import cli as group

    ids = re.findall(r'id="mapstore-([a-z]+)"', cli)
    assert ids == group.list_commands(None), ids  # every command, in the order of `mapstore --help`
    assert "--use-variance" in cli and "MAPSTORE_STORE" in cli
    api = (tmp_path / "html" / "api.html").read_text(encoding="utf-8")
    assert "mapstore.analyses.pool" in api and "Selection.blocks" in api
    gallery = tmp_path / "html" / "auto_examples"
    assert {p.stem for p in gallery.glob("*.html")} >= {p.stem for p in (ROOT / "examples").glob("*.py")}
    # the examples ran: their pages show what they printed
    decode = (gallery / "decode_across_studies.html").read_text(encoding="utf-8")
    assert "held-out" in decode and "sphx-glr-script-out" in decode
    assert "white-space: pre-wrap" in (tmp_path / "html" / "_static" / "mapstore.css").read_text()
    # code fits the page as a browser lays it out: no code block scrolls sideways at a laptop's width
    from ..check.test_report import _chromium

    browser = _chromium()
    for page in (tmp_path / "html" / "quickstart.html", gallery / "decode_across_studies.html"):
        probe = page.with_name("probe-" + page.name)  # beside the page: its styles load as they do for it
        probe.write_text(page.read_text(encoding="utf-8").replace("</body>", (
            "<script>window.addEventListener('load',function(){var w=0;document.querySelectorAll('pre')"
            ".forEach(function(p){w=Math.max(w,p.scrollWidth-p.clientWidth);});"
            "document.body.dataset.overflow=w;document.body.dataset.blocks=document.querySelectorAll('pre')"
            ".length;});</script></body>")), encoding="utf-8")
        out = subprocess.run([browser, "--headless", "--no-sandbox", "--disable-gpu", "--virtual-time-budget=5000",
                              "--window-size=1100,900", "--dump-dom", probe.as_uri()],
                             capture_output=True, text=True, timeout=120)
        facts = dict(re.findall(r'data-([a-z]+)="(\d+)"', re.search(r"<body([^>]*)>", out.stdout).group(1)))
        assert int(facts["blocks"]) > 0 and facts["overflow"] == "0", (page.name, facts)
    assert "catalog-parts" in (tmp_path / "html" / "formats.html").read_text(encoding="utf-8")
