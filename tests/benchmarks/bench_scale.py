"""Benchmark: how index and reads grow with the number of maps (10^4 .. 10^6 files, 10^7 rows).

For each tree size (tiny valid maps in 10 studies, generated here and removed afterwards):

* floors measured in the same run, one process: read + gunzip every file once; walk the tree
  and stat every file;
* mapstore index, cold, with --jobs 1 and --jobs 2 (fresh store each, own process, peak RSS);
* warm re-index (nothing changed, --jobs 2);
* a fresh process that opens the store and runs a filtered query returning ~1% of the maps
  (time after Python, pyarrow and DuckDB are imported, and peak RSS), and `mapstore sql` counting
  as a whole command against DuckDB alone counting from the same files.

``--catalog-rows N`` writes a synthetic catalog of N rows straight into a store (rows generated,
no files), then measures open + filtered query and the catalog's size on disk.  Usage::

    python tests/benchmarks/bench_scale.py --maps 10000,100000,1000000
    python tests/benchmarks/bench_scale.py --maps 0 --catalog-rows 10000000
"""

from __future__ import annotations

import argparse
import hashlib
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import floor  # noqa: E402
from bench_index import make_tree  # noqa: E402

# peak RSS in MB of this process (VmHWM: ru_maxrss would carry over the benchmark's own size
# through fork + exec) and of the worker processes it waited for
_CHILD_PEAK = ("import resource\n"
               "def _peak():\n"
               "    hwm = next(int(l.split()[1]) for l in open('/proc/self/status') if l.startswith('VmHWM'))\n"
               "    return max(hwm, resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss) / 1024\n")


def _child(code: str) -> dict:
    out = subprocess.run([sys.executable, "-c", _CHILD_PEAK + code], capture_output=True, text=True)
    if out.returncode:
        raise SystemExit(out.stderr)
    return json.loads(out.stdout.strip().splitlines()[-1])


def walk_floor(root: Path) -> float:
    """Seconds to walk the tree and stat every file, one process."""
    t0 = time.perf_counter()
    stack = [str(root)]
    while stack:
        for e in os.scandir(stack.pop()):
            if e.is_dir():
                stack.append(e.path)
            else:
                e.stat()
    return time.perf_counter() - t0


def index_run(root: Path, store: Path, jobs: int, runs: int = 1) -> dict:
    code = ("import json, time, mapstore\n"
            "times = []\n"
            f"for _ in range({runs}):\n"
            "    t = time.perf_counter()\n"
            f"    r = mapstore.index([{str(root)!r}], {str(store)!r}, jobs={jobs}, progress=False)\n"
            "    times.append(time.perf_counter() - t)\n"
            "print(json.dumps({'times': times, 'maps': r.n_maps, 'unchanged': r.n_unchanged, 'peak': _peak()}))\n")
    return _child(code)


def query_run(store: Path, where: str) -> dict:
    """Open + one query in a fresh process, timed after Python, pyarrow and DuckDB are imported (what
    any program reading the catalog pays first), and the same query on the first open's warm store."""
    code = ("import json, time, pyarrow, duckdb\n"
            "rss0 = _peak()\n"
            "t = time.perf_counter()\n"
            "import mapstore\n"
            f"st = mapstore.open({str(store)!r})\n"
            f"n = st.sql(\"SELECT map_id, relpath, sub, contrast, sha256 FROM maps WHERE {where}\").num_rows\n"
            "took = time.perf_counter() - t\n"
            "t = time.perf_counter()\n"
            f"c = st.sql(\"SELECT count(*) AS n FROM maps WHERE {where}\")['n'][0].as_py()\n"
            "count = time.perf_counter() - t\n"
            "print(json.dumps({'seconds': took, 'rows': n, 'count': count, 'peak': _peak(), 'after_import': rss0}))\n")
    return _child(code)


def count_commands(store: Path, where: str, rounds: int = 3) -> tuple[float, float]:
    """``mapstore sql`` counting the maps of ``where`` as a whole command (start-up included) against
    DuckDB alone counting them from the catalog's files in a fresh process; minimum of interleaved rounds."""
    parts = sorted(str(f) for f in (store / "catalog" / "parts").glob("*.parquet"))
    baseline = (f"import duckdb\nprint(duckdb.sql(\"SELECT count(*) FROM read_parquet({parts!r}) "
                f"WHERE {where}\").fetchall())\n")
    ours, theirs = [], []
    for _ in range(rounds):
        t = time.perf_counter()
        subprocess.run([sys.executable, "-m", "mapstore.cli", "sql", "--store", str(store),
                        f"SELECT count(*) FROM maps WHERE {where}"], check=True, capture_output=True)
        ours.append(time.perf_counter() - t)
        t = time.perf_counter()
        subprocess.run([sys.executable, "-c", baseline], check=True, capture_output=True)
        theirs.append(time.perf_counter() - t)
    return min(ours), min(theirs)


def scale_series(sizes: list[int], work: Path) -> None:
    print(f"{'maps':>9} | {'floor read':>10} {'floor walk':>10} | {'cold j1':>8} {'cold j2':>8} {'RSS':>6} | "
          f"{'warm j2':>8} {'RSS':>6} | {'cold/floor':>10} {'warm/walk':>9} {'j2/j1':>6} | "
          f"{'query':>6} {'rows':>6} {'RSS':>5} | {'us/map cold j2':>14}")
    for n in sizes:
        root = work / f"tree-{n}"
        t = time.perf_counter()
        files = make_tree(root, n)
        made = time.perf_counter() - t
        floor(files)  # page cache warm for everyone
        f_read = min(floor(files), floor(files))
        del files
        f_walk = min(walk_floor(root), walk_floor(root))
        s1, s2 = work / f"store1-{n}", work / f"store2-{n}"
        c1 = index_run(root, s1, 1)
        c2 = index_run(root, s2, 2)
        w2 = index_run(root, s2, 2, runs=2)
        assert c1["maps"] == c2["maps"] == n and w2["unchanged"] == n, (c1, c2, w2)
        # ~1% of the maps: one study, a tenth of its subjects (labels as make_tree writes them)
        subs = n // 10 // 20  # subjects per study
        q = query_run(s2, f"dataset = 'study03' AND sub IN ({', '.join(repr(f'{i:03d}') for i in range(subs // 10))})")
        cold1, cold2, warm = c1["times"][0], c2["times"][0], min(w2["times"])
        print(f"{n:>9,} | {f_read:>9.2f}s {f_walk:>9.2f}s | {cold1:>7.2f}s {cold2:>7.2f}s {max(c1['peak'], c2['peak']):>5.0f}M | "
              f"{warm:>7.2f}s {w2['peak']:>5.0f}M | {cold2 / f_read:>9.2f}x {warm / f_walk:>8.2f}x "
              f"{cold2 / cold1:>5.2f}x | {q['seconds']:>5.2f}s {q['rows']:>6} {q['peak']:>4.0f}M | "
              f"{cold2 / n * 1e6:>14.1f}", flush=True)
        print(f"          (tree made in {made:.0f} s; query process RSS after imports {q['after_import']:.0f} MB)")
        for p in (root, s1, s2):
            shutil.rmtree(p, ignore_errors=True)
    print("targets at 10^6: cold j2 <= 3x floor read, warm <= 2x floor walk, RSS <= 1 GB, j2/j1 < 1, "
          "query <= 0.3 s and <= 300 MB")


def synthetic_catalog(store: Path, n_rows: int, n_datasets: int = 100) -> float:
    """A store whose catalog holds ``n_rows`` generated rows (no files); returns seconds to write."""
    import numpy as np
    import pyarrow as pa
    import pyarrow.parquet as pq

    sys.path.insert(0, str(Path(__file__).resolve().parents[2]))
    from mapstore.store._store import (DATASETS_SCHEMA, MAPS_SCHEMA, PROBLEMS_SCHEMA, CatalogManifest, CatalogPart,
                                Head, commit_head, ensure_store, new_snapshot_id)

    t0 = time.perf_counter()
    store = ensure_store(store)
    snap = new_snapshot_id()
    (store / "catalog" / snap).mkdir(parents=True)
    (store / "catalog" / "parts").mkdir(parents=True)
    per = n_rows // n_datasets
    parts, ds_rows = [], []
    for d in range(n_datasets):
        key = f"study{d:03d}"
        for start in range(0, per, 250_000):
            k = min(250_000, per - start)
            i = np.arange(start, start + k)
            sub = np.char.zfill((i // 20).astype(str), 5)
            con = np.char.add("c", np.char.zfill((i % 20).astype(str), 2))
            rel = np.char.add(np.char.add(np.char.add("sub-", sub), "/func/sub-"),
                              np.char.add(np.char.add(sub, "_task-go_contrast-"),
                                          np.char.add(con, "_stat-t_statmap.nii.gz")))
            h = np.frombuffer(hashlib.sha256(f"{key}{start}".encode()).digest() * (k // 32 + 1), np.uint8)
            cols = {f.name: pa.nulls(k, f.type) for f in MAPS_SCHEMA}
            cols.update({
                "map_id": pa.array(np.char.add(key[-3:], np.char.zfill(i.astype(str), 13))),
                "dataset": pa.array(np.full(k, key)), "relpath": pa.array(rel), "sub": pa.array(sub),
                "task": pa.array(np.where(i % 3 == 0, "go", "stop")), "contrast": pa.array(con),
                "stat": pa.array(np.full(k, "t")), "map_kind": pa.array(np.full(k, "contrast")),
                "suffix": pa.array(np.full(k, "statmap")), "extension": pa.array(np.full(k, ".nii.gz")),
                "study": pa.array(np.full(k, key)), "participant": pa.array(np.char.add(f"{key}/sub-", sub)),
                "sha256": pa.array(np.char.add(np.char.zfill(i.astype(str), 16), h[:k].astype(str))),
                "nbytes": pa.array(np.full(k, 400, np.int64)), "mtime_ns": pa.array(i.astype(np.int64)),
                "shape": pa.array([[8, 8, 8]] * k, pa.list_(pa.int64())),
                "affine": pa.array([[2.0, 0, 0, 0, 0, 2, 0, 0, 0, 0, 2, 0, 0, 0, 0, 1]] * k, pa.list_(pa.float64())),
                "grid_id": pa.array(np.full(k, "g8")), "dtype": pa.array(np.full(k, "float32")),
                "metadata": pa.array(np.full(k, '{"DegreesOfFreedom": 50}')), "dof": pa.array(np.full(k, 50.0)),
            })
            table = pa.Table.from_arrays([cols[f.name].cast(f.type) for f in MAPS_SCHEMA], schema=MAPS_SCHEMA)
            name = f"catalog/parts/{key}-{start}.parquet"
            pq.write_table(table, store / name, compression="zstd", row_group_size=32768)
            parts.append(CatalogPart(key, f"{key}|{start}", name, k))
        ds_rows.append({"dataset": key, "name": key, "study": key, "root": f"/nowhere/{key}", "n_maps": per})
    folder = store / "catalog" / snap
    pq.write_table(pa.Table.from_pylist(ds_rows, schema=DATASETS_SCHEMA), folder / "datasets.parquet")
    pq.write_table(PROBLEMS_SCHEMA.empty_table(), folder / "problems.parquet")
    (folder / "parts.json").write_text(json.dumps(CatalogManifest(parts).to_json()))
    commit_head(store, Head(catalog=f"catalog/{snap}"), {"event": "synthetic", "maps": n_rows})
    return time.perf_counter() - t0


def synthetic_features(store: Path, n_voxels: int = 100, shard_rows: int = 65536, grid: dict | None = None,
                       mask=None) -> float:
    """A feature set over every map of a synthetic catalog (random rows, one dataset per shard).

    ``grid`` (set.json's grid record) and ``mask`` (flat indices into it) make a set on a real grid.
    """
    import numpy as np
    import pyarrow as pa
    import pyarrow.parquet as pq

    from mapstore.store._store import commit_head, read_head
    from mapstore.store._tables import ROWS_SCHEMA, FeatureEntry, FeatureSetSpec

    t0 = time.perf_counter()
    head = read_head(store)
    parts = json.loads((store / head.catalog / "parts.json").read_text())["parts"]
    folder = store / "features" / "synthetic"
    (folder / "shards").mkdir(parents=True)
    rng = np.random.default_rng(0)
    tables = []
    for k, part in enumerate(parts):
        ids = pq.read_table(store / part["maps"], columns=["map_id"])["map_id"]
        for start in range(0, len(ids), shard_rows):
            chunk = ids.slice(start, shard_rows)
            shard = f"shard-{part['dataset']}-{k:05d}-{start:08d}.npy"
            np.save(folder / "shards" / shard, rng.standard_normal((len(chunk), n_voxels), dtype=np.float32))
            n = len(chunk)
            cols = {f.name: pa.nulls(n, f.type) for f in ROWS_SCHEMA}
            cols.update(map_id=chunk, feature_key=chunk, shard=pa.array([shard] * n), row=pa.array(np.arange(n)),
                        coverage=pa.array(np.ones(n)))
            tables.append(pa.Table.from_arrays([cols[f.name].cast(f.type) for f in ROWS_SCHEMA], schema=ROWS_SCHEMA))
    rows = pa.concat_tables(tables).sort_by([("map_id", "ascending")])
    pq.write_table(rows, folder / "rows-0.parquet", compression="zstd")
    pq.write_table(pa.schema([("map_id", pa.string()), ("path", pa.string()), ("code", pa.string()),
                              ("reason", pa.string()), ("remedy", pa.string())]).empty_table(),
                   folder / "problems-0.parquet")
    np.save(folder / "mask.npy", np.arange(n_voxels, dtype=np.int64) if mask is None else np.asarray(mask))
    if grid is None:
        grid = {"name": "synthetic", "shape": [n_voxels, 1, 1], "affine": np.eye(4).tolist(), "grid_id": "synthetic"}
    spec = FeatureSetSpec("synthetic", grid, "synthetic", {"name": "all", "n_voxels": n_voxels, "sha256": "x"},
                          "x", "linear", "native", "one", False, spec_id="synthetic")
    (folder / "set.json").write_text(json.dumps(spec.to_json()))
    from mapstore.store._tables import COPIES_SCHEMA

    pq.write_table(COPIES_SCHEMA.empty_table(), folder / "copies-0.parquet")  # random rows: no copies
    head.features["synthetic"] = FeatureEntry("features/synthetic", "features/synthetic/rows-0.parquet",
                                              "features/synthetic/problems-0.parquet",
                                              "features/synthetic/copies-0.parquet", n_rows=rows.num_rows)
    head.default_features = "synthetic"
    commit_head(store, head, {"event": "synthetic features", "rows": rows.num_rows})
    return time.perf_counter() - t0


def x_run(store: Path, where: str, by_id: bool) -> dict:
    """X of a selection in a fresh process: as the selection reads it, or by map id through matrix()."""
    code = ("import json, time, mapstore\n"
            f"st = mapstore.open({str(store)!r})\n"
            "t = time.perf_counter()\n"
            f"sel = st.select({where!r}, missing='keep')\n"
            + ("X = st.features().matrix(sel.map_ids)\n" if by_id else "X = sel.X\n") +
            "took = time.perf_counter() - t\n"
            "print(json.dumps({'seconds': took, 'rows': X.shape[0], 'peak': _peak()}))\n")
    return _child(code)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--maps", default="10000,100000", help="comma-separated tree sizes (0: none)")
    ap.add_argument("--catalog-rows", type=int, default=0)
    ap.add_argument("--feature-rows", type=int, default=0,
                    help="a synthetic catalog and feature set of this many rows: X of one dataset's 1%%")
    ap.add_argument("--workdir", type=Path, default=None)
    args = ap.parse_args()
    work = Path(args.workdir or tempfile.mkdtemp(prefix="mapstore-scale-"))
    sizes = [int(x) for x in args.maps.split(",") if int(x) > 0]
    try:
        if sizes:
            scale_series(sizes, work)
        if args.catalog_rows:
            store = work / "synthetic"
            took = synthetic_catalog(store, args.catalog_rows)
            size = sum(f.stat().st_size for f in (store / "catalog").rglob("*") if f.is_file())
            per_ds = args.catalog_rows // 100
            subs = per_ds // 20
            q = query_run(store, f"dataset = 'study042' AND sub < '{subs // 10:05d}'")
            q2 = query_run(store, "task = 'go' AND contrast = 'c03' AND sub = '00042'")
            print(f"synthetic catalog: {args.catalog_rows:,} rows written in {took:.0f} s, "
                  f"{size / 1e6:,.0f} MB on disk ({size / args.catalog_rows:.1f} bytes/row)")
            print(f"open + query by dataset and subject: {q['seconds']:.3f} s, {q['rows']} rows, peak RSS "
                  f"{q['peak']:.0f} MB (after imports {q['after_import']:.0f} MB); a count on the open store "
                  f"{q['count']:.3f} s")
            ours, duck = count_commands(store, "dataset = 'study042'")
            print(f"whole command 'mapstore sql' counting one dataset's maps: {ours:.2f} s; DuckDB alone "
                  f"(import, read the parts, count) {duck:.2f} s: {ours / duck:.2f}x")
            print(f"open + query across all datasets (task, contrast, subject): {q2['seconds']:.3f} s, "
                  f"{q2['rows']} rows, peak RSS {q2['peak']:.0f} MB")
        if args.feature_rows:
            store = work / "synthetic-features"
            took = synthetic_catalog(store, args.feature_rows) + synthetic_features(store)
            where = "dataset = 'study042'"
            a = x_run(store, where, by_id=False)
            b = x_run(store, where, by_id=True)
            print(f"synthetic feature set: {args.feature_rows:,} rows (100 voxels) made in {took:.0f} s")
            print(f"select + X of one dataset ({a['rows']:,} rows), rows located by the selection's query: "
                  f"{a['seconds']:.2f} s, peak RSS {a['peak']:.0f} MB")
            print(f"the same through matrix(map_ids) (reads the map_id, shard and row columns of every row): "
                  f"{b['seconds']:.2f} s, peak RSS {b['peak']:.0f} MB")
    finally:
        if args.workdir is None:
            shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
