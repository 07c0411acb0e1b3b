"""Combining study maps at scale: ``pool_maps`` on N study maps x the MNI152 2 mm brain mask against
reading the same bytes with ``np.load`` (same process, same run), with the peak memory of each.

    python tests/benchmarks/bench_pool.py [--maps 1000]

Effect and variance maps are written straight into two feature sets' shards (bench_stream.make_set);
each measurement runs in a fresh process and reports its own peak RSS (VmHWM).
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from bench_stream import PROLOGUE, SHARD, make_set, measure  # noqa: E402

SETUP = PROLOGUE + """
import glob
from mapstore.analyses import pool_maps
import scipy.stats  # imported before the clock starts (once per process, ~1 s here): steady-state figures
t0 = time.perf_counter()
"""

RUNS = {
    "read": "total = 0.0\nfor f in sorted(glob.glob({effect!r} + '/features/bench/shards/*.npy')):\n"
            "    total += float(np.load(f)[0, 0])\n",
    "stouffer": "res = pool_maps(selection({effect!r}, {maps}, {maps}, 'keep'), 'stouffer')\n",
    "random": "res = pool_maps(selection({effect!r}, {maps}, {maps}, 'keep'), 'random', "
              "variance=selection({variance!r}, {maps}, {maps}, 'keep'))\n",
    "random-reml": "res = pool_maps(selection({effect!r}, {maps}, {maps}, 'keep'), 'random-reml', "
                   "variance=selection({variance!r}, {maps}, {maps}, 'keep'))\n"
                   "extra = {{'passes': 1 + res.provenance['reml_passes']}}\n",
}


def run(kind: str, effect: Path, variance: Path, maps: int) -> dict:
    return measure(kind, SETUP.format(root=str(ROOT), shard=SHARD)
                   + RUNS[kind].format(effect=str(effect), variance=str(variance), maps=maps))


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--maps", type=int, default=1000)
    args = ap.parse_args()
    with tempfile.TemporaryDirectory(prefix="mapstore-bench-pool-") as tmp:
        effect, variance = Path(tmp) / "effect", Path(tmp) / "variance"
        t0 = time.perf_counter()
        nv = make_set(effect, args.maps, "MNI152-2mm")
        make_set(variance, args.maps, "MNI152-2mm", positive=True)
        gb = args.maps * nv * 4 / 2 ** 30
        print(f"{args.maps:,} effect and variance maps x {nv:,} voxels ({gb:.2f} GiB each) written in "
              f"{time.perf_counter() - t0:.0f} s")
        # the better of two fresh processes each: one read of 0.9 GB varies by 2x on a shared VM
        res = {k: min((run(k, effect, variance, args.maps) for _ in range(2)), key=lambda r: r["seconds"])
               for k in ("read", "stouffer", "random", "random-reml")}
        base = res["read"]["seconds"]
        print(f"np.load of the effect maps' bytes: {base:.1f} s, peak RSS {res['read']['rss_mb']:.0f} MB")
        # bytes read: effect maps once (stouffer); effect and variance maps once per pass
        for k, reads in (("stouffer", 1), ("random", 4), ("random-reml", 2 * res["random-reml"]["passes"])):
            print(f"pool_maps {k}: {res[k]['seconds']:.1f} s, peak RSS {res[k]['rss_mb']:.0f} MB; ratio to one read of "
                  f"the bytes it reads ({reads}x the effect maps' bytes): {res[k]['seconds'] / (base * reads):.2f}")


if __name__ == "__main__":
    os.environ.setdefault("OMP_NUM_THREADS", "2")
    main()
