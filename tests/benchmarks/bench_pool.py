"""Combining study maps at scale: ``pool_maps`` on N study maps x the MNI152 2 mm brain mask against
reading the same bytes with ``np.load`` (same process, same run), with the peak memory of each.

    python tests/benchmarks/bench_pool.py [--maps 1000 --rounds 3]

Effect and variance maps are written straight into two feature sets' shards (bench_stream.make_set);
each measurement runs in a fresh process and reports its own peak RSS (VmHWM) and, timed from outside,
the whole process (start-up and imports included).
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
    ap.add_argument("--rounds", type=int, default=3, help="interleaved rounds (each method's ratio per round)")
    args = ap.parse_args()
    with tempfile.TemporaryDirectory(prefix="mapstore-bench-pool-") as tmp:
        effect, variance = Path(tmp) / "effect", Path(tmp) / "variance"
        t0 = time.perf_counter()
        nv = make_set(effect, args.maps, "MNI152-2mm")
        make_set(variance, args.maps, "MNI152-2mm", positive=True)
        gb = args.maps * nv * 4 / 2 ** 30
        print(f"{args.maps:,} effect and variance maps x {nv:,} voxels ({gb:.2f} GiB each) written in "
              f"{time.perf_counter() - t0:.0f} s")
        # interleaved rounds, each pooling method's ratio taken against the read of the same round: one
        # read of 0.9 GB varies by 2x (up to 4x between runs) on a shared VM
        kinds = ("read", "stouffer", "random", "random-reml")
        rounds = [{k: run(k, effect, variance, args.maps) for k in kinds} for _ in range(args.rounds)]
        best = {k: min((r[k] for r in rounds), key=lambda x: x["seconds"]) for k in kinds}
        base = best["read"]["seconds"]
        print(f"np.load of the effect maps' bytes: {base:.1f} s (rounds: "
              f"{', '.join(format(r['read']['seconds'], '.1f') for r in rounds)}), peak RSS {best['read']['rss_mb']:.0f} MB")
        # bytes read: effect maps once (stouffer); effect and variance maps once per pass
        for k in kinds[1:]:
            reads = {"stouffer": 1, "random": 4}.get(k) or 2 * best[k]["passes"]
            ratios = sorted(r[k]["seconds"] / (r["read"]["seconds"] * reads) for r in rounds)
            whole = sorted(r[k]["wall"] / r["read"]["wall"] for r in rounds)
            print(f"pool_maps {k}: {best[k]['seconds']:.1f} s, peak RSS {best[k]['rss_mb']:.0f} MB; ratio to one read "
                  f"of the bytes it reads ({reads}x the effect maps' bytes), same round: median "
                  f"{ratios[len(ratios) // 2]:.2f} (min {ratios[0]:.2f}, max {ratios[-1]:.2f}); whole processes "
                  f"(start-up and imports included) against the read's: median {whole[len(whole) // 2]:.2f}x")

if __name__ == "__main__":
    os.environ.setdefault("OMP_NUM_THREADS", "2")
    main()
