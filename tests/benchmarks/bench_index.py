"""Benchmark: index throughput against a hand-written pybids + nibabel baseline.

Generates a tree of small valid statistic maps (10 studies), then measures in one run:

* mapstore index, cold (fresh store) and warm (nothing changed);
* the baseline: a pybids BIDSLayout per dataset + nibabel header of each map;
* the floor: reading and gunzipping every file once;
* what users run: ``mapstore index`` as a command in a fresh process (start-up and imports included)
  against the baseline as a script in a fresh process, minimum of 3 interleaved rounds.

Prints maps/s, ratios and peak memory.  Usage::

    python tests/benchmarks/bench_index.py [--maps 10000] [--workdir DIR]
"""

from __future__ import annotations

import argparse
import gzip
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import nibabel as nib
import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import bench_dataset, floor, pybids_stat_config, script_calling, whole_commands  # noqa: E402


def make_tree(root: Path, n_maps: int, n_studies: int = 10) -> list[Path]:
    """Small valid maps (8x8x8 float32, gzipped), each with distinct bytes."""
    img = nib.Nifti1Image(np.zeros((8, 8, 8), np.float32), np.diag([2.0, 2.0, 2.0, 1.0]))
    img.header.set_sform(img.affine, code=4)
    template = bytearray(img.header.binaryblock + b"\x00" * 4 + np.zeros(512, np.float32).tobytes())
    per_study = n_maps // n_studies
    files = []
    for s in range(n_studies):
        ds = bench_dataset(root, f"study{s:02d}", 50)
        for i in range(per_study):
            sub, con = divmod(i, 20)
            folder = ds / f"sub-{sub:03d}" / "func"
            folder.mkdir(parents=True, exist_ok=True)
            body = bytearray(template)
            body[-8:] = np.array([s, i], np.float32).tobytes()
            f = folder / f"sub-{sub:03d}_task-go_contrast-c{con:02d}_stat-t_statmap.nii.gz"
            f.write_bytes(gzip.compress(bytes(body), compresslevel=1))
            files.append(f)
    return files


def baseline(root: Path) -> tuple[float, int]:
    from bids import BIDSLayout

    stat_cfg = pybids_stat_config(root.parent)
    t0 = time.perf_counter()
    n = 0
    for ds in sorted(root.iterdir()):
        layout = BIDSLayout(str(ds), validate=False, is_derivative=True,
                            config=["bids", "derivatives", stat_cfg])
        for bf in layout.get(suffix="statmap", extension=[".nii", ".nii.gz"]):
            ents = bf.get_entities()
            meta = bf.get_metadata()
            hdr = nib.load(bf.path).header
            _ = (ents, meta, hdr.get_data_shape(), hdr.get_best_affine(), hdr.get_data_dtype())
            n += 1
    return time.perf_counter() - t0, n


def header_parsers(files: list[Path], n: int = 5000) -> tuple[float, float]:
    """Seconds for mapstore's parse_header and for nibabel's header classes on the same prefixes.

    Both get the same uncompressed first bytes and produce the facts the catalog keeps (shape,
    dtype, best affine, scaling, intent); the prefixes are read before timing.
    """
    import io

    from mapstore.formats._header import parse_header

    prefixes = [gzip.decompress(f.read_bytes())[:352] for f in files[:n]]
    t0 = time.perf_counter()
    for i, pre in enumerate(prefixes):
        facts = parse_header(str(i), pre)
        _ = (facts.shape, facts.dtype, facts.affine, facts.scl_slope, facts.intent_code)
    t_ours = time.perf_counter() - t0
    t0 = time.perf_counter()
    for pre in prefixes:
        hdr = nib.Nifti1Header.from_fileobj(io.BytesIO(pre))
        _ = (hdr.get_data_shape(), hdr.get_data_dtype(), hdr.get_best_affine(), hdr.get_slope_inter(),
             hdr.get_intent())
    return t_ours, time.perf_counter() - t0


def ours(root: Path, store: Path, jobs: int | None) -> tuple[float, float, int, int]:
    """Cold and warm index runs in a child process; returns times, maps and its peak RSS (kB)."""
    code = (
        # same footing as the baseline, whose imports (pybids pulls in pandas) are not timed
        "import sys, time, mapstore, pandas, pyarrow.compute, concurrent.futures, multiprocessing\n"
        f"t=time.perf_counter(); r=mapstore.index([{str(root)!r}], {str(store)!r}, jobs={jobs!r}, progress=False)\n"
        "cold=time.perf_counter()-t\n"
        f"t=time.perf_counter(); w=mapstore.index([{str(root)!r}], {str(store)!r}, jobs={jobs!r}, progress=False)\n"
        "warm=time.perf_counter()-t\n"
        "print(cold, warm, r.n_maps, w.n_unchanged)\n"
    )
    before = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    peak = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    cold, warm, n, unchanged = out.split()
    assert int(unchanged) == int(n)
    return float(cold), float(warm), int(n), max(peak, before)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--maps", type=int, default=10_000)
    ap.add_argument("--jobs", type=int, default=None)
    ap.add_argument("--workdir", type=Path, default=None)
    ap.add_argument("--skip-baseline", action="store_true")
    ap.add_argument("--rounds", type=int, default=3, help="rounds of the whole-command comparison (0: skip it)")
    args = ap.parse_args()
    work = Path(args.workdir or tempfile.mkdtemp(prefix="mapstore-bench-"))
    root = work / "tree"
    if not root.exists():
        files = make_tree(root, args.maps)
    else:
        files = sorted(root.rglob("*.nii.gz"))
    n = len(files)
    print(f"tree: {n} maps in 10 studies under {root}")
    store = work / "store"
    if store.exists():
        import shutil

        shutil.rmtree(store)
    floor(files)  # once untimed, so every measurement below starts with the files in the page cache
    t_floor = floor(files)
    cold, warm, n_ours, peak = ours(root, store, args.jobs)
    assert n_ours == n, (n_ours, n)
    print(f"floor (read + gunzip every file once): {n / t_floor:10,.0f} maps/s  ({t_floor:.2f} s)")
    print(f"mapstore index, cold:                  {n / cold:10,.0f} maps/s  ({cold:.2f} s)")
    print(f"mapstore index, warm (no change):      {n / warm:10,.0f} maps/s  ({warm:.2f} s)")
    print(f"mapstore peak RSS (largest process):   {peak / 1024:10,.0f} MB")
    print(f"ratio cold / floor time:               {cold / t_floor:10.2f}x  (target <= 2x)")
    if not args.skip_baseline:
        t_base, n_base = baseline(root)
        assert n_base == n, (n_base, n)
        print(f"baseline (pybids layout + nibabel):    {n / t_base:10,.0f} maps/s  ({t_base:.2f} s)")
        print(f"ratio mapstore cold / baseline speed:  {t_base / cold:10.1f}x  (target >= 50x)")
    if args.rounds:
        cmd = ["index", str(root), "--store", str(work / "store-command")] + (["--jobs", str(args.jobs)] if args.jobs else [])
        t_cmd, t_script = whole_commands([cmd], work / "store-command",
                                         None if args.skip_baseline else script_calling("bench_index", "baseline", str(root)),
                                         args.rounds)
        print(f"whole command 'mapstore index', cold:  {n / t_cmd:10,.0f} maps/s  ({t_cmd:.2f} s, start-up included)")
        if t_script is not None:
            print(f"baseline as a script, fresh process:   {n / t_script:10,.0f} maps/s  ({t_script:.2f} s)")
            print(f"ratio whole command / baseline speed:  {t_script / t_cmd:10.1f}x  (target >= 25x)")
    t_ours, t_nib = header_parsers(files)
    k = min(len(files), 5000)
    print(f"header facts, {k} prefixes: mapstore parse_header {t_ours / k * 1e6:.1f} us each, nibabel "
          f"Nifti1Header {t_nib / k * 1e6:.1f} us each ({t_nib / t_ours:.2f}x)")
    self_peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    print(f"this script's own peak RSS (baseline): {self_peak / 1024:10,.0f} MB")


if __name__ == "__main__":
    main()
