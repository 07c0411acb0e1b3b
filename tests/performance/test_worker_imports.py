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


WARM = """
import sys, mapstore
store = sys.argv[1]
rep = mapstore.build_features(store, progress=False, jobs=1)
print(rep.n_built, rep.n_unchanged, " ".join(m for m in ("pandas", "pyarrow.compute", "scipy", "nibabel", "nilearn",
                                                          "sklearn") if m in sys.modules))
"""


def test_a_warm_features_run_reads_its_records_and_writes_nothing(demo_store, tmp_path):
    """Nothing changed: the run reads HEAD, the catalog's rows and its own rows table, writes no file, and
    imports none of the libraries building a row needs (the whole command's cost is start-up)."""
    import shutil

    store = tmp_path / "store"
    shutil.copytree(demo_store, store)
    env = {**os.environ, "PYTHONPATH": str(Path(__file__).resolve().parents[2])}
    run = lambda: subprocess.run([sys.executable, "-c", WARM, str(store)], check=True, env=env, timeout=600,  # noqa: E731
                                 capture_output=True, text=True).stdout.split()
    first = run()  # builds the set (or settles one another checkout built)
    before = {p: p.stat().st_mtime_ns for p in store.rglob("*") if p.is_file() and "leases" not in p.parts}
    got = run()
    assert got[0] == "0" and int(got[1]) == int(first[0]) + int(first[1]) > 0
    assert got[2:] == [], f"a warm run imported {got[2:]}"
    after = {p: p.stat().st_mtime_ns for p in store.rglob("*") if p.is_file() and "leases" not in p.parts}
    assert after == before


CLI_WARM = """
import sys
from mapstore.cli import main
code = main(["features", "--store", sys.argv[1], "--grid", "MNI152-3mm"])
print("IMPORTED", " ".join(m for m in ("numpy", "pyarrow", "duckdb", "scipy", "nibabel") if m in sys.modules))
sys.exit(code)
"""


def test_a_warm_features_command_answers_from_its_record_and_any_change_runs_the_build(demo_store, tmp_path):
    """The same settings on the same catalog: the command answers without importing numpy, pyarrow or
    DuckDB. A missing shard, a new catalog snapshot or other settings: the build runs and decides."""
    import shutil

    import mapstore

    store = tmp_path / "store"
    shutil.copytree(demo_store, store)
    env = {**os.environ, "PYTHONPATH": str(Path(__file__).resolve().parents[2])}

    def run() -> tuple[str, list[str]]:
        out = subprocess.run([sys.executable, "-c", CLI_WARM, str(store)], check=True, env=env, timeout=600,
                             capture_output=True, text=True).stdout
        return out, out.split("IMPORTED", 1)[1].split()

    first, imported = run()
    assert "built 0 rows" not in first and "numpy" in imported  # the first build reads and writes
    again, imported = run()
    assert imported == [], imported
    n = mapstore.open(store).sql("SELECT count(*) AS n FROM features")["n"][0].as_py()
    assert f"built 0 rows (0.0 maps/s), kept {n:,} unchanged" in again
    assert again.splitlines()[0] == first.splitlines()[0]  # the set, grid and mask said alike
    shard = next((store / "features").glob("*/shards/shard-*.npy"))
    shard.unlink()  # a shard gone: the build runs and makes its rows again
    repaired, imported = run()
    assert "numpy" in imported and "built 0 rows" not in repaired
    assert run()[1] == []
    mapstore.index([mapstore.open(store).sql("SELECT root FROM datasets")["root"][0].as_py()], store,
                   progress=False, jobs=1)  # a new catalog snapshot (nothing changed in it): the build decides
    _, imported = run()
    assert "numpy" in imported
    # a record that is damaged, or crafted with other types, is not one to answer from: the build runs
    records = store / "features" / "unchanged.json"
    for text in ("not json", json.dumps({k: {**v, "left_out": 5} for k, v in json.loads(records.read_text()).items()})):
        records.write_text(text)
        out, imported = run()
        assert "numpy" in imported and "feature set" in out
