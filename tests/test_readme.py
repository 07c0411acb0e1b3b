"""The README's Python blocks run as written, on the demo (the README's first command writes it)."""

from __future__ import annotations

import pytest

import os
import re
from pathlib import Path

import numpy as np

pytestmark = pytest.mark.slow  # CI runs it; pytest -m 'not slow' skips it

README = Path(__file__).resolve().parents[1] / "README.md"


def test_readme_python_blocks_run_as_written(demo_tree, tmp_path):
    blocks = re.findall(r"```python\n(.*?)```", README.read_text(), re.S)
    assert len(blocks) >= 2
    (tmp_path / "mapstore-demo").mkdir()
    os.symlink(demo_tree, tmp_path / "mapstore-demo" / "data")
    here = os.getcwd()
    os.chdir(tmp_path)
    try:
        ns: dict = {}
        for block in blocks:
            exec(compile(block, str(README), "exec"), ns)  # noqa: S102 - the README's own code
    finally:
        os.chdir(here)
    assert np.isfinite(ns["scores"]).all() and len(ns["scores"]) >= 2
    assert (tmp_path / "reading-vs-listening.nii.gz").exists()
