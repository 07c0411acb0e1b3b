"""Forked workers import nothing heavy: the parent imports what they need before the fork, so a library
is imported once per command, not once per worker and again by the parent."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

HEAVY = ("pandas", "scipy", "nilearn", "sklearn", "matplotlib", "numpy", "pyarrow", "nibabel", "duckdb")

SCRIPT = """
import os, sys, mapstore
root, store, out = sys.argv[1:4]
os.environ["MAPSTORE_TEST_WORKER_IMPORTS"] = out + ".index"
mapstore.index([root], store, rules=os.path.join(root, "name-rules.json"), origins=os.path.join(root, "origins.json"),
               progress=False, jobs=2)
os.environ["MAPSTORE_TEST_WORKER_IMPORTS"] = out + ".features"
mapstore.build_features(store, progress=False, jobs=2)
"""


@pytest.mark.slow
def test_workers_import_no_heavy_library(demo_tree, tmp_path):
    out = tmp_path / "imports"
    env = {**os.environ, "PYTHONPATH": str(Path(__file__).resolve().parents[2])}
    subprocess.run([sys.executable, "-c", SCRIPT, str(demo_tree), str(tmp_path / "store"), str(out)], check=True,
                   env=env, timeout=600)
    for command in ("index", "features"):
        got = {m for m in Path(f"{out}.{command}").read_text().split() if m}
        heavy = sorted(m for m in got if m.split(".")[0] in HEAVY)
        assert not heavy, f"{command} workers imported {json.dumps(heavy)}"
