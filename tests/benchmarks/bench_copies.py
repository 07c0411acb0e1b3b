"""Copy scan at scale: sketches + banding + exact r on candidates, against naive all-pairs correlation.

    python tests/benchmarks/bench_copies.py [--rows 100000 --naive 5000 --copies 600]

Rows are written straight into a feature set (shards + rows table with the sketches a build
records), on the MNI152 brain mask of a 6 mm grid so that 10^5 rows fit a laptop's disk.
Each row is a concept pattern (20 concepts) plus smooth subject noise, so maps of one concept
correlate (r ~ 0.3-0.6) as real ones do.  Planted copies of random rows: rescaled, sign-flipped
or perturbed to r in [0.9, 1).  The scan runs in a fresh process; its time and peak RSS are
printed, with recall of the planted copies by exact r, false alarms (reported pairs with exact
r < 0.8), and the same figures for naive all-pairs correlation (numpy corrcoef) at --naive rows.
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

from mapstore.features._copies import Sketcher  # noqa: E402
from mapstore.targets._volume import grid_from_spec, mni152_brain_mask  # noqa: E402
from mapstore.store._store import ROWS_SCHEMA, write_parquet_atomic  # noqa: E402
from mapstore.store import FeatureSetSpec  # noqa: E402

# VmHWM of this process: ru_maxrss would carry over the parent's peak across fork + exec on Linux
PEAK = """
def peak_mb():
    for line in open("/proc/self/status"):
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) / 1024
"""

SCAN = PEAK + """
import json, sys, time
sys.path.insert(0, {root!r})
from mapstore.features import FeatureSet
from mapstore.features._copies import find_copies
from mapstore.store import FeatureEntry
from pathlib import Path
t0 = time.perf_counter()
fs = FeatureSet(Path({store!r}), "bench", FeatureEntry("features/bench", "features/bench/rows.parquet", ""))
ids = fs.map_ids[:{n}]
table = find_copies(fs, ids if len(ids) < len(fs.map_ids) else None)
t = time.perf_counter() - t0
print(json.dumps({{"seconds": t, "rss_mb": peak_mb(), "pairs": table.to_pylist()}}))
"""


def make_set(folder: Path, n_rows: int, n_copies: int, rng: np.random.Generator) -> dict:
    grid = grid_from_spec((31, 37, 31), [[6, 0, 0, -90], [0, 6, 0, -126], [0, 0, 6, -72], [0, 0, 0, 1]], "6mm")
    mask = mni152_brain_mask(grid)
    nv = mask.n_voxels
    set_dir = folder / "features" / "bench"
    (set_dir / "shards").mkdir(parents=True)
    np.save(set_dir / "mask.npy", mask.indices)
    spec = FeatureSetSpec(name="bench", grid=grid.to_json(), grid_id=grid.grid_id,
                          mask={"name": "brain", "n_voxels": nv, "sha256": mask.sha256}, mask_sha256=mask.sha256,
                          method="linear", stat="native", p_sided="one", zero_as_missing=False)
    (set_dir / "set.json").write_text(json.dumps(spec.to_json()))
    sk = Sketcher.for_set(mask.sha256, nv)
    basis = rng.normal(size=(40, nv)).astype(np.float32)  # smooth-ish shared noise directions
    concepts = rng.normal(size=(20, nv)).astype(np.float32)
    # copy -> source, drawn so that a third of the pairs lie in the first 5% of rows (the naive range)
    dst = np.concatenate([rng.choice(np.arange(1, max(2, n_rows // 20)), size=n_copies // 3, replace=False),
                          rng.choice(np.arange(n_rows // 20, n_rows), size=n_copies - n_copies // 3, replace=False)])
    kinds = ("scaled", "flipped", "perturbed", "perturbed", "perturbed", "perturbed")
    planted = {int(d): (int(rng.integers(0, d)), kinds[k % len(kinds)]) for k, d in enumerate(dst)}
    sources = {s for s, _ in planted.values()}
    block = 2000
    rows = []
    saved: dict[int, np.ndarray] = {}
    for start in range(0, n_rows, block):
        stop = min(n_rows, start + block)
        m = stop - start
        c = rng.integers(0, 20, size=m)
        x = concepts[c] * rng.uniform(0.5, 1.0, size=(m, 1)).astype(np.float32)
        x += (rng.normal(size=(m, 40)).astype(np.float32) @ basis) * 0.15
        x += rng.normal(size=(m, nv)).astype(np.float32) * 0.8
        for i in range(start, stop):
            if i in planted:
                src, kind = planted[i]
                base = saved[src] if src in saved else x[src - start]
                if kind == "scaled":
                    row = base * 3.0
                elif kind == "flipped":
                    row = -base
                else:  # r uniform in [0.9, 0.999]
                    target = rng.uniform(0.9, 0.999)
                    row = base + rng.normal(size=nv).astype(np.float32) * base.std() * np.sqrt(1 / target ** 2 - 1)
                x[i - start] = row
            if i in sources:
                saved[i] = x[i - start].copy()
        shard = f"shard-{start:07d}.npy"
        np.save(set_dir / "shards" / shard, x)
        sketches = sk.sketch(x)
        for j in range(m):
            rows.append({"map_id": f"m{start + j:07d}", "feature_key": "", "sha256": "", "shard": shard, "row": j,
                         "coverage": 1.0, "row_sha256": f"h{start + j}", "sketch": sketches[j].tobytes()})
    table = pa.Table.from_pylist(rows, schema=pa.schema([f for f in ROWS_SCHEMA
                                                         if f.name in rows[0]]))
    write_parquet_atomic(table, set_dir / "rows.parquet")
    return {"n_voxels": nv, "planted": planted}


def exact_r(store: Path, pairs: list[tuple[str, str]]) -> dict:
    """Exact r of the planted pairs (numpy corrcoef on their rows)."""
    from mapstore.features import FeatureSet
    from mapstore.store import FeatureEntry

    fs = FeatureSet(store, "bench", FeatureEntry("features/bench", "features/bench/rows.parquet", ""))
    out = {}
    for a, b in pairs:
        x = fs.matrix([a, b])
        out[(a, b)] = float(np.corrcoef(x[0], x[1])[0, 1])
    return out


def run_scan(store: Path, n: int) -> dict:
    code = SCAN.format(root=str(ROOT), store=str(store), n=n)
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    if out.returncode:
        sys.exit(f"the scan failed:\n{out.stderr}")
    return json.loads(out.stdout)


def naive(store: Path, n: int) -> dict:
    code = PEAK + f"""
import json, sys, time
sys.path.insert(0, {str(ROOT)!r})
import numpy as np
from pathlib import Path
from mapstore.features import FeatureSet
from mapstore.store import FeatureEntry
t0 = time.perf_counter()
fs = FeatureSet(Path({str(store)!r}), "bench", FeatureEntry("features/bench", "features/bench/rows.parquet", ""))
ids = fs.map_ids[:{n}]
r = np.corrcoef(fs.matrix(ids))   # every row is finite here: exact Pearson r of all pairs
iu = np.triu_indices(len(ids), 1)
keep = np.abs(r[iu]) >= 0.9
pairs = [[ids[a], ids[b], float(v)] for a, b, v in zip(iu[0][keep], iu[1][keep], r[iu][keep])]
print(json.dumps({{"seconds": time.perf_counter() - t0, "rss_mb": peak_mb(), "pairs": pairs}}))
"""
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    return json.loads(out.stdout)


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--rows", type=int, default=100_000)
    ap.add_argument("--naive", type=int, default=5_000)
    ap.add_argument("--copies", type=int, default=600)
    args = ap.parse_args()
    rng = np.random.default_rng(20261202)
    with tempfile.TemporaryDirectory(prefix="mapstore-bench-copies-") as tmp:
        store = Path(tmp)
        t0 = time.perf_counter()
        info = make_set(store, args.rows, args.copies, rng)
        print(f"{args.rows:,} rows x {info['n_voxels']:,} voxels written in {time.perf_counter() - t0:.1f} s "
              f"({args.copies} planted copies)")
        ids = [f"m{i:07d}" for i in range(args.rows)]
        want = {tuple(sorted((ids[c], ids[s]))) for c, (s, _) in info["planted"].items()}
        for label, n in (("scan, all rows", args.rows), (f"scan, first {args.naive:,} rows", args.naive)):
            res = run_scan(store, n)
            found = {(p["map_a"], p["map_b"]): p["r"] for p in res["pairs"]}
            sub = {p for p in want if int(p[0][1:]) < n and int(p[1][1:]) < n}
            false = sum(1 for v in found.values() if abs(v) < 0.8)
            print(f"{label:28s} {res['seconds']:7.1f} s  peak RSS {res['rss_mb']:6.0f} MB  pairs reported "
                  f"{len(found)}, with |r| < 0.8: {false}")
            if n == args.naive:
                scan_small = found
            else:
                exact = exact_r(store, sorted(want))
                for lo, hi in ((0.98, 1.01), (0.95, 0.98), (0.9, 0.95)):
                    grp = [p for p in sub if lo <= abs(exact[p]) < hi]
                    print(f"  planted copies with {lo:.2f} <= |r| < {min(hi, 1):.2f}: recall "
                          f"{sum(1 for p in grp if p in found)}/{len(grp)}")
        res = naive(store, args.naive)
        ref = {tuple(sorted((a, b))): v for a, b, v in res["pairs"]}
        agree = sum(1 for p in ref if p in scan_small)
        print(f"{'naive corrcoef, ' + format(args.naive, ',') + ' rows':28s} {res['seconds']:7.1f} s  peak RSS "
              f"{res['rss_mb']:6.0f} MB  pairs with |r| >= 0.9: {len(ref)}, found by the scan: {agree}")
        scale = (args.rows / args.naive) ** 2
        print(f"naive all-pairs at {args.rows:,} rows would take ~{res['seconds'] * scale:,.0f} s "
              f"(x{scale:.0f} the pairs) and a {args.rows ** 2 * 8 / 2 ** 30:,.0f} GiB matrix")


if __name__ == "__main__":
    os.environ.setdefault("OMP_NUM_THREADS", "2")
    main()
