"""Every script in examples/ runs, as written, against the built-in demo store."""

from __future__ import annotations

import shutil
import subprocess
import sys
from pathlib import Path

import pytest

import mapstore

EXAMPLES = sorted((Path(__file__).resolve().parents[2] / "examples").glob("*.py"))


@pytest.mark.slow
@pytest.mark.parametrize("script", EXAMPLES, ids=[p.name for p in EXAMPLES])
def test_example_runs_on_the_demo(script, demo_store, demo_tree, tmp_path):
    store = tmp_path / "store"
    shutil.copytree(demo_store, store)  # then what 'mapstore demo' adds: the default set and the labels
    mapstore.build_features(store, grid="MNI152-3mm", progress=False)
    mapstore.label(store, demo_tree / "concepts.json")
    out = subprocess.run([sys.executable, str(script), str(store)], capture_output=True, text=True, timeout=600,
                         cwd=tmp_path)
    assert out.returncode == 0, out.stdout + out.stderr
    # an example writes only into the folder it names beside the store: nothing lands where it was run
    assert sorted(p.name for p in tmp_path.iterdir()) in (["store"], ["example-outputs", "store"]), out.stdout
    if script.name == "decode_across_studies.py":  # drawn with nilearn (matplotlib from the plot extra)
        png = tmp_path / "example-outputs" / "reading-weights.png"
        assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert out.stdout.strip(), "the example printed nothing"
