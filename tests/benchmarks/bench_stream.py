"""Selections beyond memory: a large synthetic feature set (MNI152 3 mm brain mask) read as X, block by
block, through Dask, and written as Zarr against np.save of the same bytes (same process, same run).

    python tests/benchmarks/bench_stream.py [--rows 50000]

Rows are written straight into shards (random float32, 2,000 rows a shard) with a rows table, and a
Selection is made over them directly (no catalog is needed to read rows).  Each measurement runs in a
fresh process and reports its own peak RSS (VmHWM).
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pyarrow as pa

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from bench_copies import PEAK  # noqa: E402

from mapstore.store import FeatureSetSpec, ROWS_SCHEMA, write_parquet_atomic  # noqa: E402
from mapstore.targets._volume import builtin_grid, mni152_brain_mask  # noqa: E402

SHARD = 2000

# the start of every measuring process: a Selection over the synthetic set's shards (no catalog needed),
# and the process's own peak RSS; scripts format it with root and shard, then add their run
PROLOGUE = PEAK + """
import json, sys, time
sys.path.insert(0, {root!r})
import numpy as np, pandas as pd
from pathlib import Path
from mapstore.features import FeatureSet
from mapstore.select import Selection
from mapstore.store import FeatureEntry
def selection(store, n, n_studies, missing):
    fs = FeatureSet(Path(store), "bench", FeatureEntry("features/bench", "features/bench/rows.parquet", ""))
    meta = pd.DataFrame({{"map_id": [f"m{{i:07d}}" for i in range(n)], "study": [f"s{{i % n_studies}}" for i in range(n)],
                         "participant": [f"p{{i}}" for i in range(n)],
                         "feature_shard": [f"shard-{{i // {shard}:05d}}.npy" for i in range(n)],
                         "feature_row": [i % {shard} for i in range(n)], "coverage": np.ones(n)}})
    return Selection(None, fs, meta, None, None, [], meta["study"].to_numpy(object), "study", "none", {{}},
                     missing=missing)
"""

SETUP = PROLOGUE + """
sel = selection({store!r}, {rows}, 20, "common")
fs, meta, n = sel.feature_set, sel.meta, len(sel)
t0 = time.perf_counter()
"""

RUNS = {
    "blocks": "total = 0.0\nfor idx, X, _ in sel.blocks(rows=256):\n    total += float(X[:, 0].sum())\n",
    "dask": ("from dask.distributed import Client, LocalCluster\n"
             "with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None, "
             "memory_limit='3GB') as c, Client(c) as client:\n"
             "    mean = client.compute(sel.to_dask(chunk_rows=256).mean(axis=0)).result()\n"
             "    workers = client.run(lambda: __import__('resource').getrusage(0).ru_maxrss / 1024)\n"
             "ref = np.mean(fs.matrix(sel.map_ids[:512]).astype(np.float64), axis=0)\n"
             "sub = selection({store!r}, 512, 20, 'common')\n"
             "assert np.allclose(sub.to_dask(chunk_rows=100).mean(axis=0).compute(), ref, atol=1e-5)\n"
             "extra = {{'worker_peak_mb': max(workers.values())}}\n"),
    "npy": ("out = np.lib.format.open_memmap({out!r} + '/X.npy', mode='w+', dtype=np.float32, "
            "shape=(n, fs.n_voxels))\nfor idx, X, _ in sel.blocks(rows=64):\n    out[idx[0]:idx[-1] + 1] = X\n"
            "out.flush()\n"),
    "zarr": ("import zarr\ng = zarr.open_group({out!r} + '/X.zarr', mode='w', zarr_format=3)\n"
             "a = g.create_array('X', shape=(n, fs.n_voxels), dtype='float32', chunks=(16, fs.n_voxels), "
             "fill_value=np.nan, dimension_names=('map', 'column'), compressors=[zarr.codecs.ZstdCodec(level=1)])\n"
             "for idx, X, _ in sel.blocks(rows=64):\n    a[idx[0]:idx[-1] + 1] = X\n"),
}


def make_set(folder: Path, n_rows: int, grid_name: str = "MNI152-3mm", positive: bool = False) -> int:
    """A feature set of ``n_rows`` random rows on a template's brain mask (positive values on request)."""
    grid = builtin_grid(grid_name)
    mask = mni152_brain_mask(grid)
    set_dir = folder / "features" / "bench"
    (set_dir / "shards").mkdir(parents=True)
    np.save(set_dir / "mask.npy", mask.indices)
    spec = FeatureSetSpec(name="bench", grid=grid.to_json(), grid_id=grid.grid_id,
                          mask={"name": "brain", "n_voxels": mask.n_voxels, "sha256": mask.sha256},
                          mask_sha256=mask.sha256, method="linear", stat="native", p_sided="one", zero_as_missing=False)
    (set_dir / "set.json").write_text(json.dumps(spec.to_json()))
    rng = np.random.default_rng(0)
    rows = []
    for k, start in enumerate(range(0, n_rows, SHARD)):
        m = min(SHARD, n_rows - start)
        block = rng.standard_normal((m, mask.n_voxels), dtype=np.float32)
        np.save(set_dir / "shards" / f"shard-{k:05d}.npy", np.abs(block) + 0.1 if positive else block)
        rows += [{"map_id": f"m{start + j:07d}", "shard": f"shard-{k:05d}.npy", "row": j, "coverage": 1.0}
                 for j in range(m)]
    write_parquet_atomic(pa.Table.from_pylist(rows, schema=pa.schema([f for f in ROWS_SCHEMA if f.name in rows[0]])),
                         set_dir / "rows.parquet")
    return mask.n_voxels


def run(kind: str, store: Path, rows: int, out: Path) -> dict:
    return measure(kind, SETUP.format(root=str(ROOT), store=str(store), rows=rows, shard=SHARD)
                   + RUNS[kind].format(out=str(out), store=str(store)))


def measure(kind: str, code: str) -> dict:
    """Run ``code`` (which sets ``t0``, and may set ``extra``) in a fresh process: its seconds since ``t0``,
    the whole process's seconds (``wall``), its own peak RSS, and ``extra``."""
    code += ("\nres = {'seconds': time.perf_counter() - t0, 'rss_mb': peak_mb()}\n"
             "res.update(globals().get('extra', {}))\nprint(json.dumps(res))\n")
    started = time.perf_counter()
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    wall = time.perf_counter() - started  # the whole process: start-up and imports included
    if done.returncode:
        sys.exit(f"{kind} failed:\n{done.stderr[-3000:]}")
    return {**json.loads(done.stdout.strip().splitlines()[-1]), "wall": wall}


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--rows", type=int, default=50_000)
    args = ap.parse_args()
    with tempfile.TemporaryDirectory(prefix="mapstore-bench-stream-") as tmp:
        store, out = Path(tmp) / "store", Path(tmp) / "out"
        out.mkdir()
        t0 = time.perf_counter()
        nv = make_set(store, args.rows)
        gb = args.rows * nv * 4 / 2 ** 30
        print(f"{args.rows:,} rows x {nv:,} voxels ({gb:.1f} GiB) written in {time.perf_counter() - t0:.0f} s")
        res = {k: run(k, store, args.rows, out) for k in ("blocks", "dask", "npy", "zarr")}
        print(f"blocks of 256 rows: {res['blocks']['seconds']:.1f} s ({gb / res['blocks']['seconds']:.2f} GiB/s), "
              f"peak RSS {res['blocks']['rss_mb']:.0f} MB")
        print(f"to_dask mean on 2 workers: {res['dask']['seconds']:.1f} s, client peak RSS {res['dask']['rss_mb']:.0f} MB, "
              f"worker peak RSS {res['dask']['worker_peak_mb']:.0f} MB (equal to numpy on the first 512 rows)")
        print(f"np.save-like .npy write: {res['npy']['seconds']:.1f} s; zarr write (zstd level 1, as the export): {res['zarr']['seconds']:.1f} s; "
              f"ratio zarr / npy throughput {res['npy']['seconds'] / res['zarr']['seconds']:.2f}")


if __name__ == "__main__":
    os.environ.setdefault("OMP_NUM_THREADS", "2")
    main()
