"""A new map against a store: ``similar`` on a large set (time, peak memory, recall of the true top 10)
and ``FeatureSet.transform`` against reading and resampling the same map alone (same process, same run).

    python tests/benchmarks/bench_lookup.py [--rows 100000 --subset 5000 --queries 20]

The large set is written straight into the store (bench_copies.make_set: concept patterns plus noise
on the MNI brain mask of a 6 mm grid).  Queries run in a fresh process; recall is measured on the
first --subset rows against numpy's corrcoef over every one of them.
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

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from bench_copies import PEAK, make_set  # noqa: E402

QUERY = PEAK + """
import json, sys, time
sys.path.insert(0, {root!r})
import numpy as np
from pathlib import Path
from mapstore.features import FeatureSet, most_similar
from mapstore.store import FeatureEntry
fs = FeatureSet(Path({store!r}), "bench", FeatureEntry("features/bench", "features/bench/rows.parquet", ""))
ids = fs.map_ids
t0 = time.perf_counter()
q = ids[{q}]
hits = most_similar(fs, fs.matrix([q])[0], 10, exclude=q)
t_all = time.perf_counter() - t0
rss_query = peak_mb()
sub = ids[:{subset}]
recalls = []
rows = fs.matrix(sub)
for k in range({queries}):
    q = sub[k * 37 % len(sub)]
    got = [m for m, _, _ in most_similar(fs, rows[sub.index(q)], 10, exclude=q, map_ids=sub)]
    r = np.corrcoef(rows[sub.index(q)][None, :], rows)[0, 1:]
    order = [sub[i] for i in np.argsort(-r) if sub[i] != q][:10]
    recalls.append(len(set(got) & set(order)) / 10)
print(json.dumps({{"seconds": t_all, "rss_mb": rss_query, "recall": float(np.mean(recalls)), "hits": len(hits)}}))
"""


def bench_transform(work: Path, repeats: int = 5) -> tuple[float, float]:
    import nibabel as nib
    from nilearn.image import resample_to_img

    import mapstore
    from mapstore.targets import builtin_grid

    ds = work / "one"
    (ds / "sub-01").mkdir(parents=True)
    (ds / "dataset_description.json").write_text(json.dumps({"Name": "one", "BIDSVersion": "1.9.0",
                                                            "DatasetType": "derivative"}))
    aff = np.array([[3.0, 0, 0, -90], [0, 3, 0, -126], [0, 0, 3, -72], [0, 0, 0, 1]])
    rng = np.random.default_rng(0)
    path = ds / "sub-01" / "sub-01_task-x_contrast-a_stat-t_statmap.nii.gz"
    nib.save(nib.Nifti1Image(rng.normal(size=(61, 73, 61)).astype(np.float32), aff), str(path))
    mapstore.index([ds], work / "store", progress=False, jobs=1)
    mapstore.build_features(work / "store", grid="MNI152-2mm", progress=False, jobs=1)
    fs = mapstore.open(work / "store").features()
    grid = builtin_grid("MNI152-2mm")
    ref = nib.Nifti1Image(np.zeros(grid.shape, np.float32), grid.affine_array)

    def median(fn) -> float:
        times = []
        for _ in range(repeats):
            t0 = time.perf_counter()
            fn()
            times.append(time.perf_counter() - t0)
        return float(np.median(times))

    ours = median(lambda: fs.transform(str(path), "t"))
    alone = median(lambda: resample_to_img(nib.load(str(path)), ref, interpolation="linear", force_resample=True,
                                           copy_header=True).get_fdata())
    return ours, alone


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--rows", type=int, default=100_000)
    ap.add_argument("--subset", type=int, default=5_000)
    ap.add_argument("--queries", type=int, default=20)
    args = ap.parse_args()
    rng = np.random.default_rng(20261203)
    with tempfile.TemporaryDirectory(prefix="mapstore-bench-lookup-") as tmp:
        store = Path(tmp)
        t0 = time.perf_counter()
        info = make_set(store, args.rows, 0, rng)
        print(f"{args.rows:,} rows x {info['n_voxels']:,} voxels written in {time.perf_counter() - t0:.1f} s")
        code = QUERY.format(root=str(ROOT), store=str(store), q=args.rows // 2, subset=min(args.subset, args.rows),
                            queries=args.queries)
        out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
        if out.returncode:
            sys.exit(f"the query failed:\n{out.stderr}")
        res = json.loads(out.stdout)
        print(f"similar, top 10 of {args.rows:,} rows: {res['seconds']:.2f} s, peak RSS {res['rss_mb']:.0f} MB "
              f"(the process after one query); recall of the true top 10 on {min(args.subset, args.rows):,} rows over "
              f"{args.queries} queries: {res['recall']:.3f}")
        ours, alone = bench_transform(Path(tmp) / "transform")
        print(f"transform one map {ours * 1000:.0f} ms, nibabel load + nilearn resample_to_img alone "
              f"{alone * 1000:.0f} ms: ratio transform / alone {ours / alone:.2f}")


if __name__ == "__main__":
    os.environ.setdefault("OMP_NUM_THREADS", "2")
    main()
